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

import os
from collections.abc import Mapping, Sequence
from numbers import Real
from typing import Any, Self

import numpy as np
import scipy.sparse as sp

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.fold import Fold
from xrec.sources.base import LowRankSource

_DAY = 86400.0
MODALITIES = ("text", "image")
FUSION_MODALITIES = ("text", "image", "attributes")


# ---------------------------------------------------------------------------------------
# profiles
# ---------------------------------------------------------------------------------------


def _l2_normalize(rows: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(rows.astype(np.float64), axis=1, keepdims=True)
    return np.divide(rows, norms, out=np.zeros_like(rows, dtype=np.float64), where=norms > 0).astype(np.float32)


def center_vectors(rows: np.ndarray) -> np.ndarray:
    """Subtract the mean of the non-zero rows from them (zero rows, items without content, stay zero).

    Encoders give every item of a catalog a large shared component (all product photos
    look alike next to an arbitrary image); removing it leaves the directions that tell
    items apart, which is what a profile mean should be made of.
    """
    rows = np.asarray(rows, dtype=np.float32)
    present = np.any(rows != 0, axis=1)
    if not present.any():
        return rows.copy()
    out = rows.copy()
    out[present] -= rows[present].mean(axis=0, dtype=np.float64).astype(np.float32)
    return out


def _check_half_life(kind: str, value: Any) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, Real) or not (np.isfinite(value) and value > 0):
        raise ConfigError(f"{kind} setting 'half_life_days' must be a positive number or None, got {value!r}")


def history_weights(fold: Fold, half_life_days: float | None) -> sp.csr_matrix:
    """Users × items matrix of profile weights from ``fold.train``.

    Each training row weighs 1, or ``2 ** (-age / half_life_days)`` where ``age`` is in
    days before the user's own latest training interaction (the same weighting as
    :class:`~xrec.sources.attributes.AttributeSource`). Repeated rows add up.
    """
    train = fold.train
    users = train["user_idx"].to_numpy(dtype=np.int64)
    items = train["item_idx"].to_numpy(dtype=np.int64)
    if half_life_days is None:
        weights = np.ones(len(train), dtype=np.float64)
    else:
        # measured from each user's own latest interaction: profiles are normalized per
        # user, so the reference point only scales a row, and this one cannot underflow
        # for users who stopped long before the fold's end
        times = train["timestamp"].to_numpy(dtype=np.float64)
        latest = np.full(fold.n_users, -np.inf)
        np.maximum.at(latest, users, times)
        weights = np.exp2(-((latest[users] - times) / _DAY) / float(half_life_days))
    history = sp.csr_matrix((weights, (users, items)), shape=(fold.n_users, fold.n_items))
    history.sum_duplicates()
    return history


def user_profiles(fold: Fold, item_vectors: np.ndarray, half_life_days: float | None = None) -> np.ndarray:
    """L2-normalized (recency-weighted) mean of each user's training-item vectors.

    Parameters
    ----------
    fold
        Training rows define each user's history.
    item_vectors
        ``(n_items, dim)``; zero rows (items without content) add nothing.
    half_life_days
        See :func:`history_weights`.

    Returns
    -------
    np.ndarray
        ``(n_users, dim)`` float32; zero rows for users with no (usable) history.
    """
    history = history_weights(fold, half_life_days)
    # the mean's 1/Σweights factor vanishes in the normalization
    return _l2_normalize(np.asarray(history @ np.asarray(item_vectors, dtype=np.float64)))


# ---------------------------------------------------------------------------------------
# item vectors per modality
# ---------------------------------------------------------------------------------------


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

    Unlike :func:`xrec.encoders.cache.catalog_texts`, label columns (tuples, e.g. genres)
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
    frame = catalog.items[cols]
    out = []
    for row in frame.itertuples(index=False, name=None):
        parts = [_format_value(v) for v in row]
        out.append(sep.join(p for p in parts if p))
    return out


def _labels(catalog: Catalog) -> list[str]:
    return [f"item {i!r}" for i in catalog.item_ids]


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
    return EmbeddingCache(cache_dir).encode_with_mask(
        make_text_encoder(encoder, on_error="skip"), texts, progress=progress, labels=_labels(catalog)
    )


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

    _check_images(catalog)
    enc = make_image_encoder(encoder, on_error="skip", crop=crop)
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

    _check_images(catalog)
    cache = EmbeddingCache(cache_dir)
    probs_enc = ImageNetProbsEncoder(make_image_encoder(encoder, on_error="skip", crop=crop))
    features, ok_f = encode_catalog_images(catalog, probs_enc.features_encoder(), cache=cache, progress=progress, return_mask=True)
    class_probs, ok_p = encode_catalog_images(catalog, probs_enc, cache=cache, progress=progress, return_mask=True)
    return features, class_probs, ok_f & ok_p  # type: ignore[operator]


def _check_images(catalog: Catalog) -> None:
    if not catalog.schema.image:
        raise ConfigError("image source: the catalog declares no image column; declare image=... when building it")


_CLIP: dict[tuple[str, str, int, int], Any] = {}


def _clip_vectors(
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
    try:
        stat = os.stat(weights)
        key = (str(model), str(weights), stat.st_mtime_ns, stat.st_size)
    except OSError:
        key = (str(model), str(weights), 0, 0)  # ClipEncoders names the missing file
    if key not in _CLIP:  # one loaded model per process (and file version), as for the other encoders
        from xrec.encoders.clip import ClipEncoders

        _CLIP[key] = ClipEncoders(model, weights=weights, on_error="skip")
    clip = _CLIP[key]
    cache = EmbeddingCache(cache_dir)
    if modality == "image":
        _check_images(catalog)
        return encode_catalog_images(catalog, clip.image, cache=cache, progress=progress, return_mask=True)  # type: ignore[return-value]
    texts = item_texts(catalog, columns)
    return cache.encode_with_mask(clip.text, texts, progress=progress, labels=_labels(catalog))


# ---------------------------------------------------------------------------------------
# sources
# ---------------------------------------------------------------------------------------


class _ProfileSource(LowRankSource):
    """Profiles from one set of item vectors, scored against another (often the same)."""

    half_life_days: float | None

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        """(vectors the profiles are built from, vectors the items are scored with), same space."""
        raise NotImplementedError

    def fit(self, fold: Fold) -> Self:
        """Encode the catalog (through the cache) and build profiles from ``fold.train``; returns ``self``."""
        _check_half_life(self.kind, self.half_life_days)
        profile_side, item_side = self._vectors(fold.catalog)
        # each history item counts as a direction, whatever its vector's length
        profile_side, item_side = _l2_normalize(profile_side), _l2_normalize(item_side)
        if getattr(self, "center", False):
            profile_side, item_side = center_vectors(profile_side), center_vectors(item_side)
        self.item_factors_ = _l2_normalize(item_side)
        self.user_factors_ = user_profiles(fold, profile_side, self.half_life_days)
        self.fitted_ = True
        return self


class TextSource(_ProfileSource):
    """Cosine between a user's text profile and each item's text vector.

    Parameters
    ----------
    columns
        Catalog columns whose values form each item's text (text columns, and label or
        number columns, written out); ``None``: the catalog's declared text columns.
    encoder
        Text encoder name: ``"minilm"`` (all-MiniLM-L6-v2).
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


class ImageSource(_ProfileSource):
    """Cosine between a user's image profile and each item's image vector.

    Parameters
    ----------
    encoder
        Image encoder name: ``"efficientnet_lite0"`` (ImageNet-1k, 1,280-d).
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


class CrossModalSource(_ProfileSource):
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

    def _check(self) -> None:
        for name in ("profile", "items"):
            value = getattr(self, name)
            if value not in MODALITIES:
                raise ConfigError(f"cross_modal setting {name!r} must be one of {list(MODALITIES)}, got {value!r}")
        if self.bridge not in ("conse", "cca", "ridge", "clip"):
            raise ConfigError(f"cross_modal setting 'bridge' must be 'conse', 'cca', 'ridge' or 'clip', got {self.bridge!r}")

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
                m: _clip_vectors(catalog, m, model=self.clip_model, weights=self.clip_weights, columns=self.text_columns, **opts)
                for m in dict.fromkeys((self.profile, self.items))
            }
        else:
            bridge = self._make_bridge()
            text, text_ok = text_vectors(catalog, self.text_columns, self.text_encoder, **opts)
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


class EarlyFusionSource(_ProfileSource):
    """Concatenated per-modality item vectors as one content source.

    Each modality's item vectors are L2-normalized, multiplied by the modality's weight
    and concatenated; profiles and cosine scores are then taken on the concatenation.
    Before the final normalization, modality ``m`` adds ``w_m² · cos_m`` to the dot
    product, so a weight of 2 counts that modality four times as much.

    Parameters
    ----------
    modalities
        Which of ``"text"``, ``"image"``, ``"attributes"`` to concatenate.
    weights
        Modality → weight (>= 0); modalities left out weigh 1; ``None``: all 1.
    text_columns, text_encoder, image_encoder, image_crop
        See :class:`CrossModalSource`.
    half_life_days, cache_dir, progress
        See :class:`TextSource`.

    Attributes
    ----------
    item_factors_, user_factors_
        See :class:`TextSource`; on the concatenation.
    blocks_
        Modality → ``(start, stop)`` columns of its block in ``item_factors_``.
    """

    kind = "early_fusion"

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

    def _checked(self) -> tuple[list[str], dict[str, float]]:
        mods = [self.modalities] if isinstance(self.modalities, str) else list(self.modalities)
        bad = [m for m in mods if m not in FUSION_MODALITIES]
        if not mods or bad or len(set(mods)) != len(mods):
            raise ConfigError(
                f"early_fusion setting 'modalities' must list distinct names among {list(FUSION_MODALITIES)}, got {self.modalities!r}"
            )
        weights = dict(self.weights or {})
        unknown = [m for m in weights if m not in mods]
        if unknown:
            raise ConfigError(f"early_fusion setting 'weights': {unknown} are not among modalities {mods}")
        out = {}
        for m in mods:
            w = weights.get(m, 1.0)
            if isinstance(w, bool) or not isinstance(w, Real) or not (np.isfinite(w) and w >= 0):
                raise ConfigError(f"early_fusion setting 'weights.{m}' must be a finite number >= 0, got {w!r}")
            out[m] = float(w)
        if not any(out.values()):
            raise ConfigError(f"early_fusion setting 'weights': all zero ({out})")
        return mods, out

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        mods, weights = self._checked()
        opts = {"cache_dir": self.cache_dir, "progress": self.progress}
        parts, self.blocks_ = [], {}
        start = 0
        for m in mods:
            if m == "text":
                vectors, _ = text_vectors(catalog, self.text_columns, self.text_encoder, **opts)
            elif m == "image":
                vectors, _ = image_vectors(catalog, self.image_encoder, crop=self.image_crop, **opts)
            else:
                from xrec.encoders.attributes import AttributeEncoder

                vectors = AttributeEncoder().fit_transform(catalog)
            block = _l2_normalize(np.asarray(vectors, dtype=np.float32)) * np.float32(weights[m])
            parts.append(block)
            self.blocks_[m] = (start, start + block.shape[1])
            start += block.shape[1]
        fused = np.concatenate(parts, axis=1)
        return fused, fused
