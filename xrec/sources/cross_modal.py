"""Cross-modal content similarity: a profile in one modality, items scored in the other."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, ClassVar

import numpy as np

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.sources._item_vectors import clip_vectors, image_vectors, text_vectors
from xrec.sources._profiles import ProfileSource
from xrec.sources.vectors import vectors_from_setting

__all__ = ["MODALITIES", "CrossModalSource"]

MODALITIES = ("text", "image")


class CrossModalSource(ProfileSource):
    """A profile built in one modality, items scored in another, in a shared space.

    With ``profile="image", items="text"`` a shopper's history is read from the images
    of what they bought and compared with every item's description; the reverse reads
    the history's descriptions and compares them with every item's image. Scores need no
    interactions on the scored item, so cold items are ranked too.

    Parameters
    ----------
    profile
        Modality of the history vectors: ``"image"`` or ``"text"``.
    items
        Modality of the scored item vectors: ``"image"`` or ``"text"``.
    bridge
        How the two modalities meet:

        - ``"conse"``: images → text space through the ImageNet class names (ConSE,
          Norouzi et al., ICLR 2014; settings ``top_t``, ``class_template``);
        - ``"cca"``: both → the canonical space of a CCA fitted on the catalog's own
          (image, text) pairs (setting ``n_components``);
        - ``"ridge"``: images → text space by ridge regression fitted on the catalog's
          own pairs (setting ``alpha``);
        - ``"clip"``: CLIP image and text encoders (open_clip; settings ``clip_model``,
          ``clip_weights``).
    text_columns
        Columns forming each item's text (see :class:`TextSource`).
    text_encoder
        Text encoder name (not used with ``"clip"``).
    image_encoder, image_crop
        Image encoder name and the share of each image's side it sees around the centre
        (see :class:`ImageSource`'s ``crop``; not used with ``"clip"``).
    top_t, class_template, prior_correction
        ConSE's number of classes combined, the text each class name is put in, and
        whether class probabilities are divided by the catalog's mean prediction first
        (see :class:`~xrec.encoders.bridge.ConSEBridge`).
    n_components, pca_components
        CCA's canonical variates, and the PCA dimensions each side keeps before CCA.
    alpha
        Ridge's L2 penalty.
    clip_model, clip_weights
        open_clip architecture name and the path of its weights file.
    half_life_days, cache_dir, progress
        See :class:`TextSource`.
    image_vectors, text_vectors
        Your own vectors for a side, in place of the encoder's: a vector file path, or a
        table of :func:`~xrec.sources.vectors.read_item_vectors` options
        (``{ path = "v.npy", ids = "ids.txt" }``); relative to the spec file in a spec. Only
        with the ``"cca"`` and ``"ridge"`` bridges, which learn the link from the catalog's
        own pairs.

    Attributes
    ----------
    bridge_
        The fitted bridge (``None`` with ``"clip"``).
    item_factors_, user_factors_
        See :class:`TextSource`; in the shared space.
    has_content_
        ``(n_items,)`` bool, items with a vector in the scored modality.

    Notes
    -----
    The CCA and ridge bridges are fitted on every catalog item that has both an image
    and a text: catalog content, not interactions, so nothing held out leaks in.
    """

    kind = "cross_modal"
    path_settings: ClassVar[tuple[str, ...]] = ("image_vectors", "text_vectors")

    def __init__(
        self,
        profile: str = "image",
        items: str = "text",
        bridge: str = "conse",
        text_columns: Sequence[str] | None = None,
        text_encoder: str = "minilm",
        image_encoder: str = "efficientnet_lite0",
        image_crop: float = 1.0,
        top_t: int = 10,
        class_template: str = "{}",
        prior_correction: bool = False,
        n_components: int = 16,
        pca_components: int | None = 64,
        alpha: float = 1.0,
        clip_model: str = "ViT-B-32",
        clip_weights: str | None = None,
        half_life_days: float | None = None,
        cache_dir: str | None = None,
        progress: bool = False,
        image_vectors: str | Mapping[str, Any] | None = None,
        text_vectors: str | Mapping[str, Any] | None = None,
    ) -> None:
        self.profile = profile
        self.items = items
        self.bridge = bridge
        self.text_columns = text_columns
        self.text_encoder = text_encoder
        self.image_encoder = image_encoder
        self.image_crop = image_crop
        self.top_t = top_t
        self.class_template = class_template
        self.prior_correction = prior_correction
        self.n_components = n_components
        self.pca_components = pca_components
        self.alpha = alpha
        self.clip_model = clip_model
        self.clip_weights = clip_weights
        self.half_life_days = half_life_days
        self.cache_dir = cache_dir
        self.progress = progress
        self.image_vectors = image_vectors
        self.text_vectors = text_vectors

    def _check(self) -> None:
        for name in ("profile", "items"):
            value = getattr(self, name)
            if value not in MODALITIES:
                raise ConfigError(f"cross_modal setting {name!r} must be one of {list(MODALITIES)}, got {value!r}")
        if self.bridge not in ("conse", "cca", "ridge", "clip"):
            raise ConfigError(f"cross_modal setting 'bridge' must be 'conse', 'cca', 'ridge' or 'clip', got {self.bridge!r}")
        own = [name for name in ("image_vectors", "text_vectors") if getattr(self, name) is not None]
        if own and self.bridge not in ("cca", "ridge"):
            raise ConfigError(f"cross_modal settings {own}: your own vectors work with the 'cca' and 'ridge' bridges, not {self.bridge!r}")

    def _make_bridge(self) -> Any:
        from xrec.encoders.bridge import make_bridge

        if self.bridge == "conse":
            return make_bridge(
                "conse",
                top_t=self.top_t,
                text_encoder=self.text_encoder,
                template=self.class_template,
                cache_dir=self.cache_dir,
                prior_correction=self.prior_correction,
            )
        if self.bridge == "cca":
            return make_bridge("cca", n_components=self.n_components, pca_components=self.pca_components)
        return make_bridge("ridge", alpha=self.alpha)

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        self._check()
        opts = {"cache_dir": self.cache_dir, "progress": self.progress}
        if self.bridge == "clip":
            self.bridge_ = None
            space = {
                m: clip_vectors(catalog, m, model=self.clip_model, weights=self.clip_weights, columns=self.text_columns, **opts)
                for m in dict.fromkeys((self.profile, self.items))
            }
        else:
            bridge = self._make_bridge()
            if self.text_vectors is not None:
                text, text_ok = vectors_from_setting(catalog, self.text_vectors, "text_vectors", progress=self.progress)
            else:
                text, text_ok = text_vectors(catalog, self.text_columns, self.text_encoder, **opts)
            if self.image_vectors is not None:
                image, image_ok = vectors_from_setting(catalog, self.image_vectors, "image_vectors", progress=self.progress)
            else:
                image, image_ok = image_vectors(
                    catalog, self.image_encoder, probs=bridge.input == "probs", crop=self.image_crop, **opts
                )
            both = text_ok & image_ok
            if bridge.input == "probs":
                bridge.fit(image[image_ok])  # unpaired: ConSE reads only the catalog's class prior
            else:
                if both.sum() < 2:
                    raise DataError(f"cross_modal bridge {self.bridge!r}: needs items with both an image and a text; found {int(both.sum())}")
                bridge.fit(image[both], text[both])
            self.bridge_ = bridge
            # skipped items keep zero rows (bridging would turn them into an offset)
            space = {
                "text": (np.where(text_ok[:, None], bridge.transform_text(text), 0.0).astype(np.float32), text_ok),
                "image": (np.where(image_ok[:, None], bridge.transform(image), 0.0).astype(np.float32), image_ok),
            }
        profile_side, _ = space[self.profile]
        item_side, ok = space[self.items]
        self.has_content_ = ok
        return profile_side, item_side
