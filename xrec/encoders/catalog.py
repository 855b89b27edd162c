"""Vectors of a whole catalog: its texts or its images, in catalog order, through the cache."""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from xrec.encoders._fill import encode_through_cache
from xrec.encoders._store import EmbeddingCache
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError

if TYPE_CHECKING:
    from xrec.data.catalog import Catalog

__all__ = ["catalog_texts", "encode_catalog_images", "encode_catalog_text", "joined_rows"]


def _resolve_cache(cache: EmbeddingCache | str | os.PathLike | bool | None) -> EmbeddingCache | None:
    if cache is True:
        return EmbeddingCache()
    if cache is False or cache is None:
        return None
    if isinstance(cache, EmbeddingCache):
        return cache
    if isinstance(cache, (str, os.PathLike)):
        return EmbeddingCache(cache)
    raise ConfigError(f"cache must be an EmbeddingCache, a folder path, True or False; got {type(cache).__name__}")


def catalog_texts(catalog: Catalog, columns: Sequence[str] | None = None, *, sep: str = "\n") -> list[str]:
    """One string per item: the non-blank values of ``columns`` (default: the declared text columns), joined by ``sep``.

    Raises
    ------
    ConfigError
        When no text column is declared or given, or a given column is not in the catalog.
    """
    cols = list(catalog.schema.text if columns is None else columns)
    if not cols:
        raise ConfigError("catalog declares no text columns; declare text=[...] or pass columns=[...]")
    unknown = [c for c in cols if c not in catalog.items.columns]
    if unknown:
        raise ConfigError(f"columns {unknown} are not in the catalog; it has {list(catalog.items.columns)}")
    return joined_rows(catalog, cols, sep, lambda v: v.strip() if isinstance(v, str) else "")


def joined_rows(catalog: Catalog, columns: Sequence[str], sep: str, as_text: Callable[[Any], str]) -> list[str]:
    """One string per item: the non-blank ``as_text(value)`` of its ``columns`` cells, joined by ``sep``."""
    return [sep.join(p for p in map(as_text, row) if p) for row in catalog.items[list(columns)].itertuples(index=False, name=None)]


def encode_catalog_text(
    catalog: Catalog,
    encoder: Encoder,
    columns: Sequence[str] | None = None,
    *,
    cache: EmbeddingCache | str | os.PathLike | bool | None = True,
    sep: str = "\n",
    progress: bool = False,
    return_mask: bool = False,
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Text vectors of every catalog item, in catalog order.

    Parameters
    ----------
    catalog
        The items.
    encoder
        A text encoder (e.g. :class:`~xrec.encoders.text.MiniLMTextEncoder`).
    columns
        Text columns to join per item (default: the catalog's declared text columns).
    cache
        An :class:`EmbeddingCache`, a cache folder, ``True`` for the default cache or
        ``False`` to encode everything without storing it.
    sep
        Placed between the columns' values.
    progress
        Progress bar over the uncached items.
    return_mask
        Also return the bool mask of items that got a vector.

    Returns
    -------
    np.ndarray or (np.ndarray, np.ndarray)
        ``(n_items, dim)`` float32 (zero rows for skipped items), and the mask if asked.

    Raises
    ------
    DataError
        Items with no text in ``columns``, named by item id, when the encoder's
        ``on_error`` is ``"raise"`` (with ``"skip"`` they get zero rows and a warning).
    """
    texts = catalog_texts(catalog, columns, sep=sep)
    cols = ", ".join(catalog.schema.text if columns is None else columns)
    blank = {i: f"no text in {cols}" for i, text in enumerate(texts) if not text}
    labels = [f"item {i!r}" for i in catalog.item_ids]
    vectors, ok = encode_through_cache(
        encoder, texts, cache=_resolve_cache(cache), progress=progress, labels=labels, known_problems=blank
    )
    return (vectors, ok) if return_mask else vectors


def encode_catalog_images(
    catalog: Catalog,
    encoder: Encoder,
    *,
    cache: EmbeddingCache | str | os.PathLike | bool | None = True,
    progress: bool = False,
    return_mask: bool = False,
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Image vectors of every catalog item, from the bytes of ``catalog.image_path(i)``.

    A missing or unreadable file follows the encoder's ``on_error``: ``"raise"`` raises
    :class:`DataError` naming the items and paths before anything is encoded; ``"skip"``
    gives the item a zero row and a warning. See :func:`encode_catalog_text` for the
    other parameters.
    """
    if not catalog.schema.image:
        raise ConfigError("catalog declares no image column; declare image=... when building it")
    contents: list[bytes | None] = []
    unreadable: dict[int, str] = {}
    for i in range(catalog.n_items):
        path = catalog.image_path(i)
        try:
            contents.append(path.read_bytes())
        except OSError as exc:
            contents.append(None)
            unreadable[i] = f"cannot read image file {str(path)!r} ({type(exc).__name__})"
    labels = [f"item {i!r}" for i in catalog.item_ids]
    vectors, ok = encode_through_cache(
        encoder,
        contents,
        cache=_resolve_cache(cache),
        progress=progress,
        labels=labels,
        known_problems=unreadable,
    )
    return (vectors, ok) if return_mask else vectors
