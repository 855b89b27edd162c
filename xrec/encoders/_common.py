"""Pieces shared by the torch-based encoders (image, text, CLIP): settings checks, thread
limits, problem listings and the folders of packaged model files.

Nothing here imports torch at module level, so the text encoder stays importable without it.
"""

from __future__ import annotations

import contextlib
import hashlib
import importlib.util
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any, Literal

from xrec._validation import check_int
from xrec.errors import ConfigError

OnError = Literal["raise", "skip"]

_SHOW = 5  # problems listed by name in a message; the rest are counted


def package_folder(module: str, requirement: str, who: str, setting: str) -> Path:
    """Folder of an installed package, found from its import spec without importing it.

    ``requirement`` is the pinned pip name (``"name==version"``) shown in the error, and
    ``setting`` the encoder parameter that can be passed instead.
    """
    spec = importlib.util.find_spec(module)
    if spec is None or not spec.submodule_search_locations:
        name = requirement.split("==")[0]
        raise ConfigError(f"{who}: package '{name}' is not installed; install it (pip install {requirement}) or pass {setting}=")
    return Path(list(spec.submodule_search_locations)[0])


def check_on_error(value: Any, who: str) -> None:
    if value not in ("raise", "skip"):
        raise ConfigError(f"{who}: on_error must be 'raise' or 'skip', got {value!r}")


def check_batching(batch_size: Any, num_threads: Any, who: str) -> None:
    """``batch_size`` a positive int; ``num_threads`` a positive int or ``None``."""
    check_int(batch_size, f"{who}: batch_size", low=1, expected="a positive int")
    check_int(num_threads, f"{who}: num_threads", low=1, allow_none=True, expected="a positive int")


@contextlib.contextmanager
def torch_threads(n: int | None) -> Iterator[None]:
    """Run with ``n`` intra-op torch threads, restoring the caller's setting afterwards."""
    import torch

    before = torch.get_num_threads()
    if n is not None and n != before:
        torch.set_num_threads(n)
    try:
        yield
    finally:
        if torch.get_num_threads() != before:
            torch.set_num_threads(before)


def describe_problems(problems: dict[int, str], total: int, what: str, positions: Sequence[int] | None = None) -> str:
    """``"2 of 10 images: #3 file not found: 'a.jpg'; ..."``, listing the first few.

    ``positions`` maps each problem key to the number shown (default: the key itself).
    """
    keys = sorted(problems)
    shown = "; ".join(f"#{positions[k] if positions is not None else k} {problems[k]}" for k in keys[:_SHOW])
    more = f" (and {len(keys) - _SHOW} more)" if len(keys) > _SHOW else ""
    return f"{len(keys)} of {total} {what}: {shown}{more}"


def text_problems(contents: Sequence[Any]) -> dict[int, str]:
    """Positions of texts that cannot be encoded, with the reason for each.

    A text is bad when it is not a ``str`` or holds only whitespace.
    """
    problems: dict[int, str] = {}
    for i, text in enumerate(contents):
        if not isinstance(text, str):
            problems[i] = f"not a string ({type(text).__name__}: {text!r:.40})"
        elif not text.strip():
            problems[i] = f"empty text ({text!r:.40})"
    return problems


def file_sha256(path: Path) -> str:
    """sha256 hex of a file's bytes, read in 1 MiB pieces."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()

