"""Early fusion: concatenated per-modality item vectors as one content source."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, ClassVar

import numpy as np

from xrec._validation import check_choice, check_number
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.sources._item_vectors import image_vectors, text_vectors
from xrec.sources._profiles import ProfileSource, l2_normalize
from xrec.sources.vectors import vectors_from_setting

__all__ = ["FUSION_MODALITIES", "EarlyFusionSource"]

FUSION_MODALITIES = ("text", "image", "attributes")
# bridges fitted on the catalog's own pairs, usable on the text and image blocks
BRIDGED = ("ridge", "cca", "contrastive")


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
    bridge
        ``None``: the text and image blocks are the encoders' own vectors. ``"ridge"``,
        ``"cca"`` or ``"contrastive"``: both blocks are first put into that bridge's
        shared space (see :mod:`xrec.encoders.bridge`), fitted on the catalog's items
        that have both an image and a text, so the image block keeps what the images
        share with the descriptions. The bridge's own settings are its defaults (the
        contrastive heads are cached under ``cache_dir``).

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
        bridge: str | None = None,
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
        self.bridge = bridge

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
        if self.bridge is not None:
            check_choice(self.bridge, "early_fusion setting 'bridge'", BRIDGED)
            if not {"text", "image"} & set(mods):
                raise ConfigError(f"early_fusion setting 'bridge': it bridges the 'text' and 'image' blocks, and modalities {mods} has neither")
        return mods, out, own

    def _bridged(self, catalog: Catalog, opts: dict[str, Any]) -> dict[str, np.ndarray]:
        """The text and image blocks in the bridge's shared space (zero rows where an item lacks one)."""
        from xrec.encoders.bridge import make_bridge

        text, text_ok = text_vectors(catalog, self.text_columns, self.text_encoder, **opts)
        image, image_ok = image_vectors(catalog, self.image_encoder, crop=self.image_crop, **opts)
        both = text_ok & image_ok
        if both.sum() < 2:
            raise DataError(f"early_fusion bridge {self.bridge!r}: needs items with both an image and a text; found {int(both.sum())}")
        settings = {"cache_dir": self.cache_dir} if self.bridge == "contrastive" else {}
        self.bridge_ = make_bridge(str(self.bridge), **settings).fit(image[both], text[both])
        return {
            "text": np.where(text_ok[:, None], self.bridge_.transform_text(text), 0.0).astype(np.float32),
            "image": np.where(image_ok[:, None], self.bridge_.transform(image), 0.0).astype(np.float32),
        }

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        mods, weights, own = self._checked()
        opts = {"cache_dir": self.cache_dir, "progress": self.progress}
        parts, self.blocks_ = [], {}
        self.bridge_ = None
        bridged = self._bridged(catalog, opts) if self.bridge is not None else {}
        start = 0
        for m in mods:
            if m in bridged:
                vectors = bridged[m]
            elif m == "text":
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
