"""Early fusion: concatenated per-modality item vectors as one content source."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, ClassVar

import numpy as np

from xrec._validation import check_number
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.sources._item_vectors import image_vectors, text_vectors
from xrec.sources._profiles import ProfileSource, l2_normalize
from xrec.sources.vectors import vectors_from_setting

__all__ = ["FUSION_MODALITIES", "EarlyFusionSource"]

FUSION_MODALITIES = ("text", "image", "attributes")


class EarlyFusionSource(ProfileSource):
    """Concatenated per-modality item vectors as one content source.

    Each modality's item vectors are L2-normalized, multiplied by the modality's weight
    and concatenated; profiles and cosine scores are then taken on the concatenation.
    Before the final normalization, modality ``m`` adds ``w_m² · cos_m`` to the dot
    product, so a weight of 2 counts that modality four times as much.

    Parameters
    ----------
    modalities
        Which of ``"text"``, ``"image"``, ``"attributes"`` and the names in ``vectors`` to
        concatenate.
    weights
        Modality → weight (>= 0); modalities left out weigh 1; ``None``: all 1.
    text_columns, text_encoder, image_encoder, image_crop
        See :class:`CrossModalSource`.
    half_life_days, cache_dir, progress
        See :class:`TextSource`.
    vectors
        Your own item vectors as extra modalities: name → a vector file path, or a table of
        :func:`~xrec.sources.vectors.read_item_vectors` options; e.g.
        ``modalities = ["text", "mine"]`` with ``vectors = { mine = "mine.parquet" }``.
        Paths are relative to the spec file in a spec.

    Attributes
    ----------
    item_factors_, user_factors_
        See :class:`TextSource`; on the concatenation.
    blocks_
        Modality → ``(start, stop)`` columns of its block in ``item_factors_``.
    """

    kind = "early_fusion"
    path_settings: ClassVar[tuple[str, ...]] = ("vectors",)

    def __init__(
        self,
        modalities: Sequence[str] = ("text", "image"),
        weights: Mapping[str, float] | None = None,
        text_columns: Sequence[str] | None = None,
        text_encoder: str = "minilm",
        image_encoder: str = "efficientnet_lite0",
        image_crop: float = 1.0,
        half_life_days: float | None = None,
        cache_dir: str | None = None,
        progress: bool = False,
        vectors: Mapping[str, Any] | None = None,
    ) -> None:
        self.modalities = modalities
        self.weights = weights
        self.text_columns = text_columns
        self.text_encoder = text_encoder
        self.image_encoder = image_encoder
        self.image_crop = image_crop
        self.half_life_days = half_life_days
        self.cache_dir = cache_dir
        self.progress = progress
        self.vectors = vectors

    def _checked(self) -> tuple[list[str], dict[str, float], dict[str, Any]]:
        mods = [self.modalities] if isinstance(self.modalities, str) else list(self.modalities)
        if self.vectors is not None and not isinstance(self.vectors, Mapping):
            raise ConfigError(f"early_fusion setting 'vectors': a table of name = vector file, got {self.vectors!r}")
        own = dict(self.vectors or {})
        clash = [m for m in own if m in FUSION_MODALITIES]
        if clash:
            raise ConfigError(f"early_fusion setting 'vectors': {clash} name built-in modalities; give your vectors other names")
        known = [*FUSION_MODALITIES, *own]
        bad = [m for m in mods if m not in known]
        if not mods or bad or len(set(mods)) != len(mods):
            raise ConfigError(f"early_fusion setting 'modalities' must list distinct names among {known}, got {self.modalities!r}")
        weights = dict(self.weights or {})
        unknown = [m for m in weights if m not in mods]
        if unknown:
            raise ConfigError(f"early_fusion setting 'weights': {unknown} are not among modalities {mods}")
        out = {}
        for m in mods:
            out[m] = check_number(weights.get(m, 1.0), f"early_fusion setting 'weights.{m}'", low=0)
        if not any(out.values()):
            raise ConfigError(f"early_fusion setting 'weights': all zero ({out})")
        return mods, out, own

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        mods, weights, own = self._checked()
        opts = {"cache_dir": self.cache_dir, "progress": self.progress}
        parts, self.blocks_ = [], {}
        start = 0
        for m in mods:
            if m == "text":
                vectors, _ = text_vectors(catalog, self.text_columns, self.text_encoder, **opts)
            elif m == "image":
                vectors, _ = image_vectors(catalog, self.image_encoder, crop=self.image_crop, **opts)
            elif m == "attributes":
                from xrec.encoders.attributes import AttributeEncoder

                vectors = AttributeEncoder().fit_transform(catalog)
            else:
                vectors, _ = vectors_from_setting(catalog, own[m], f"vectors.{m}", progress=self.progress)
            block = l2_normalize(np.asarray(vectors, dtype=np.float32)) * np.float32(weights[m])
            parts.append(block)
            self.blocks_[m] = (start, start + block.shape[1])
            start += block.shape[1]
        fused = np.concatenate(parts, axis=1)
        return fused, fused
