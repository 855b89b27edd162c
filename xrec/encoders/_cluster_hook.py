"""Which Dask client, if any, catalog encodings fill the embedding cache on (set by spec runs with a cluster).

Kept free of Dask imports: content sources ask :func:`encoding_client` on every fit, and
only when a client is set do they import :mod:`xrec.encoders.sharded`.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from contextvars import ContextVar
from typing import Any

__all__ = ["encoding_client", "encoding_on"]

_CLIENT: ContextVar[Any] = ContextVar("xrec_encoding_client", default=None)


def encoding_client() -> Any:
    """The :class:`distributed.Client` set by :func:`encoding_on`, or ``None`` (encode in this process)."""
    return _CLIENT.get()


@contextlib.contextmanager
def encoding_on(client: Any) -> Iterator[None]:
    """Inside the block, catalog texts and images missing from the cache are encoded on ``client``'s workers.

    ``client=None`` leaves encoding in this process. The vectors are the same either way:
    the workers write them into the shared cache, which the sources then read.
    """
    token = _CLIENT.set(client)
    try:
        yield
    finally:
        _CLIENT.reset(token)
