"""Content similarity: user profiles of item text / image vectors, within or across modalities.

Every source here is low-rank: a user's profile is the (optionally recency-weighted)
mean of the vectors of the items in their training history, L2-normalized, and the
score of an item is the cosine between that profile and the item's vector. Item
vectors come from encoders through the on-disk embedding cache, so only content
never seen before is encoded.

Kinds:

- ``"text"`` (:class:`TextSource`): catalog text (and label) columns → text encoder.
- ``"image"`` (:class:`ImageSource`): catalog image column → image encoder.
- ``"cross_modal"`` (:class:`CrossModalSource`): profile in one modality, items scored
  in the other, in a shared space (a bridge from image into text space, or CLIP).
  Items nobody has bought still get a score, from their content alone.
- ``"early_fusion"`` (:class:`EarlyFusionSource`): concatenated per-modality
  L2-normalized (optionally weighted) item vectors as one source.

Every setting is a plain value (str, number, bool, list, table), so a source can be
written to and rebuilt from a TOML blend file.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from xrec.data.catalog import Catalog
from xrec.sources._item_vectors import image_features_and_probs, image_vectors, item_texts, text_vectors
from xrec.sources._profiles import ProfileSource, center_vectors, history_weights, user_profiles
from xrec.sources.cross_modal import MODALITIES, CrossModalSource
from xrec.sources.early_fusion import FUSION_MODALITIES, EarlyFusionSource

__all__ = [
    "FUSION_MODALITIES",
    "MODALITIES",
    "CrossModalSource",
    "EarlyFusionSource",
    "ImageSource",
    "TextSource",
    "center_vectors",
    "history_weights",
    "image_features_and_probs",
    "image_vectors",
    "item_texts",
    "text_vectors",
    "user_profiles",
]


class TextSource(ProfileSource):
    """Cosine between a user's text profile and each item's text vector.

    Parameters
    ----------
    columns
        Catalog columns whose values form each item's text (text columns, and label or
        number columns, written out); ``None``: the catalog's declared text columns.
    encoder
        Text encoder name: ``"minilm"`` (all-MiniLM-L6-v2), ``"minilm_int8"`` (the same, int8).
    half_life_days
        A training interaction's weight in the profile halves every ``half_life_days``
        days before the user's latest one; ``None`` weighs all equally.
    cache_dir
        Embedding cache folder; ``None``: the cache's default (``XREC_CACHE_DIR`` or
        ``.xrec-cache``).
    progress
        Progress bar while encoding uncached items.
    center
        Subtract the catalog's mean vector before building profiles and scoring (see
        :func:`center_vectors`); often much sharper on catalogs of look-alike items.

    Attributes
    ----------
    item_factors_
        ``(n_items, dim)`` normalized item text vectors (zero rows for items without text).
    user_factors_
        ``(n_users, dim)`` normalized profiles (zero rows for users without history).
    has_content_
        ``(n_items,)`` bool, items that got a vector.
    """

    kind = "text"

    def __init__(
        self,
        columns: Sequence[str] | None = None,
        encoder: str = "minilm",
        half_life_days: float | None = None,
        cache_dir: str | None = None,
        progress: bool = False,
        center: bool = False,
    ) -> None:
        self.columns = columns
        self.encoder = encoder
        self.half_life_days = half_life_days
        self.cache_dir = cache_dir
        self.progress = progress
        self.center = center

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        vectors, ok = text_vectors(catalog, self.columns, self.encoder, cache_dir=self.cache_dir, progress=self.progress)
        self.has_content_ = ok
        return vectors, vectors


class ImageSource(ProfileSource):
    """Cosine between a user's image profile and each item's image vector.

    Parameters
    ----------
    encoder
        Image encoder name: ``"efficientnet_lite0"`` (ImageNet-1k, 1,280-d; ``"_onnx"`` / ``"_torch"`` suffixes pin the runtime).
    half_life_days
        See :class:`TextSource`.
    cache_dir
        See :class:`TextSource`.
    progress
        Progress bar while encoding uncached images.
    center
        See :class:`TextSource`.
    crop
        Share of each image's side kept around its centre before encoding, in (0, 1];
        1 keeps the whole image (see :func:`~xrec.encoders.bridge.make_image_encoder`).

    Attributes
    ----------
    item_factors_, user_factors_, has_content_
        See :class:`TextSource`.
    """

    kind = "image"

    def __init__(
        self,
        encoder: str = "efficientnet_lite0",
        half_life_days: float | None = None,
        cache_dir: str | None = None,
        progress: bool = False,
        center: bool = False,
        crop: float = 1.0,
    ) -> None:
        self.encoder = encoder
        self.half_life_days = half_life_days
        self.cache_dir = cache_dir
        self.progress = progress
        self.center = center
        self.crop = crop

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        vectors, ok = image_vectors(catalog, self.encoder, crop=self.crop, cache_dir=self.cache_dir, progress=self.progress)
        self.has_content_ = ok
        return vectors, vectors

