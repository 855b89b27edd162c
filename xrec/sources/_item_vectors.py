"""Item vectors per modality, through the on-disk embedding cache: texts, images, CLIP."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from xrec.data.catalog import Catalog
from xrec.encoders.catalog import joined_rows
from xrec.errors import ConfigError

__all__ = ["check_images", "clip_vectors", "image_features_and_probs", "image_vectors", "item_labels", "item_texts", "text_vectors"]


def _format_value(value: Any) -> str:
    if isinstance(value, str):
        return value.strip()
    if isinstance(value, (tuple, list, set, frozenset, np.ndarray)):
        return ", ".join(str(v).strip() for v in value if str(v).strip())
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return ""
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value).strip()


def item_texts(catalog: Catalog, columns: Sequence[str] | None = None, *, sep: str = "\n") -> list[str]:
    """One text per item: the non-blank values of ``columns`` joined by ``sep``.

    Unlike :func:`xrec.encoders.cache.catalog_texts` (which shares its joining), label columns (tuples, e.g. genres)
    are written as ``"a, b"`` and numbers as text, so ``columns=["title", "genres"]``
    works. With text columns only, the texts are the same (so are their cache entries).

    Raises
    ------
    ConfigError
        When no column is given or declared, or a column is not in the catalog.
    """
    cols = list(catalog.schema.text if columns is None else ([columns] if isinstance(columns, str) else columns))
    if not cols:
        raise ConfigError("text source: the catalog declares no text columns; declare text=[...] or set columns=[...]")
    unknown = [c for c in cols if c not in catalog.items.columns]
    if unknown:
        raise ConfigError(f"text source setting 'columns': {unknown} are not catalog columns; it has {list(catalog.items.columns)}")
    return joined_rows(catalog, cols, sep, _format_value)


def item_labels(catalog: Catalog) -> list[str]:
    return [f"item {i!r}" for i in catalog.item_ids]


def _fill_on_cluster(encoder: Any, contents: Sequence[Any], cache_dir: str | None, labels: list[str], progress: bool) -> None:
    """Encode what the cache lacks on the Dask workers of a spec run with a cluster (no-op otherwise).

    The in-process encoding that follows then finds every vector in the cache.
    """
    from xrec.encoders._cluster_hook import encoding_client

    client = encoding_client()
    if client is None:
        return
    from xrec.encoders.sharded import encode_sharded

    encode_sharded(encoder, contents, cache=cache_dir, labels=labels, progress=progress, client=client)


def _image_paths(catalog: Catalog) -> list[str]:
    return [str(catalog.image_path(i)) for i in range(catalog.n_items)]  # read on the workers


def text_vectors(
    catalog: Catalog,
    columns: Sequence[str] | None = None,
    encoder: str = "minilm",
    *,
    cache_dir: str | None = None,
    progress: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Text vectors of every item (cached) and the mask of items that have one.

    Items with no text in ``columns`` get a zero row, ``False`` in the mask and a warning.
    """
    from xrec.encoders.bridge import make_text_encoder
    from xrec.encoders.cache import EmbeddingCache

    texts = item_texts(catalog, columns)
    enc, labels = make_text_encoder(encoder, on_error="skip"), item_labels(catalog)
    _fill_on_cluster(enc, texts, cache_dir, labels, progress)
    return EmbeddingCache(cache_dir).encode_with_mask(enc, texts, progress=progress, labels=labels)


def image_vectors(
    catalog: Catalog,
    encoder: str = "efficientnet_lite0",
    *,
    probs: bool = False,
    crop: float = 1.0,
    cache_dir: str | None = None,
    progress: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Image vectors (or, with ``probs``, ImageNet class probabilities) of every item, cached.

    Items whose image cannot be read get a zero row, ``False`` in the mask and a warning.
    ``crop`` is the share of each side kept around the centre (see :func:`make_image_encoder`).
    """
    if probs:
        _, class_probs, ok = image_features_and_probs(catalog, encoder, crop=crop, cache_dir=cache_dir, progress=progress)
        return class_probs, ok
    from xrec.encoders.bridge import make_image_encoder
    from xrec.encoders.cache import EmbeddingCache, encode_catalog_images

    check_images(catalog)
    enc = make_image_encoder(encoder, on_error="skip", crop=crop)
    _fill_on_cluster(enc, _image_paths(catalog), cache_dir, item_labels(catalog), progress)
    return encode_catalog_images(catalog, enc, cache=EmbeddingCache(cache_dir), progress=progress, return_mask=True)  # type: ignore[return-value]


def image_features_and_probs(
    catalog: Catalog,
    encoder: str = "efficientnet_lite0",
    *,
    crop: float = 1.0,
    cache_dir: str | None = None,
    progress: bool = False,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Image features, ImageNet class probabilities and the ok mask of every item, both cached.

    An image missing from both caches goes through the encoder once for the two.
    """
    from xrec.encoders.bridge import ImageNetProbsEncoder, make_image_encoder
    from xrec.encoders.cache import EmbeddingCache, encode_catalog_images

    check_images(catalog)
    cache = EmbeddingCache(cache_dir)
    probs_enc = ImageNetProbsEncoder(make_image_encoder(encoder, on_error="skip", crop=crop))
    for enc in (probs_enc.features_encoder(), probs_enc):
        _fill_on_cluster(enc, _image_paths(catalog), cache_dir, item_labels(catalog), progress)
    features, ok_f = encode_catalog_images(catalog, probs_enc.features_encoder(), cache=cache, progress=progress, return_mask=True)
    class_probs, ok_p = encode_catalog_images(catalog, probs_enc, cache=cache, progress=progress, return_mask=True)
    return features, class_probs, ok_f & ok_p  # type: ignore[operator]


def check_images(catalog: Catalog) -> None:
    if not catalog.schema.image:
        raise ConfigError("image source: the catalog declares no image column; declare image=... when building it")


def clip_vectors(
    catalog: Catalog,
    modality: str,
    *,
    model: str,
    weights: str | None,
    columns: Sequence[str] | None,
    cache_dir: str | None,
    progress: bool,
) -> tuple[np.ndarray, np.ndarray]:
    from xrec.encoders.cache import EmbeddingCache, encode_catalog_images

    if weights is None:
        raise ConfigError(
            "cross_modal bridge 'clip' needs the setting 'clip_weights': the path of an open_clip weights "
            "file for clip_model (no CLIP weights ship with xrec)"
        )
    from xrec.encoders._by_name import make_clip_encoders

    clip = make_clip_encoders(model, weights)
    cache = EmbeddingCache(cache_dir)
    if modality == "image":
        check_images(catalog)
        return encode_catalog_images(catalog, clip.image, cache=cache, progress=progress, return_mask=True)  # type: ignore[return-value]
    texts = item_texts(catalog, columns)
    return cache.encode_with_mask(clip.text, texts, progress=progress, labels=item_labels(catalog))

