"""Bridges from image vectors into the text space, for cross-modal scoring without CLIP.

Three estimators share one shape: ``fit(image, text)`` on (image, description) pairs,
``transform(image)`` puts image inputs into the shared space and
``transform_text(text)`` puts text vectors there (the identity when the shared space
*is* the text space).

- :class:`ConSEBridge` — ConSE (Norouzi et al., "Zero-Shot Learning by Convex
  Combination of Semantic Embeddings", ICLR 2014): an image becomes the convex
  combination of the text vectors of its top-``T`` ImageNet class names, weighted by
  the classifier's probabilities renormalized over those ``T``. Its image input is the
  1,000 class probabilities; it needs no pairs.
- :class:`CCABridge` — canonical correlation analysis (scikit-learn's ``CCA``) fitted on
  the catalog's own pairs; both sides go to the canonical space.
- :class:`RidgeBridge` — ridge regression (scikit-learn's ``Ridge``) from image features
  to text vectors, fitted on the catalog's own pairs.

:func:`bridge_recall` measures a bridge by text → image retrieval on held-out pairs.
"""

from __future__ import annotations

import os
from abc import ABC, abstractmethod
from collections.abc import Sequence
from typing import Any, ClassVar, Self

import numpy as np

from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

__all__ = [
    "BRIDGES",
    "Bridge",
    "CCABridge",
    "ConSEBridge",
    "ImageNetProbsEncoder",
    "RidgeBridge",
    "bridge_recall",
    "class_name_vectors",
    "make_bridge",
    "make_image_encoder",
    "make_text_encoder",
]

TEXT_ENCODERS = ("minilm",)
IMAGE_ENCODERS = ("efficientnet_lite0",)
# One encoder (one loaded model) per name and error policy for the whole process: several
# content sources fitted side by side would otherwise each load the same weights.
_SHARED: dict[tuple[str, str, str], Encoder] = {}


# ---------------------------------------------------------------------------------------
# encoders by name (the plain values a spec or blend file holds)
# ---------------------------------------------------------------------------------------


def make_text_encoder(name: str = "minilm", *, on_error: str = "skip") -> Encoder:
    """The text encoder a setting names.

    Parameters
    ----------
    name
        ``"minilm"``: :class:`~xrec.encoders.text.MiniLMTextEncoder` (all-MiniLM-L6-v2, 384-d).
    on_error
        Passed to the encoder: ``"skip"`` gives blank texts a zero row and a warning.

    Returns
    -------
    Encoder
        Shared by every caller in this process that asks for the same name and policy,
        so its model is loaded once.

    Raises
    ------
    ConfigError
        For an unknown name.
    """
    key = ("text", name, on_error)
    if key in _SHARED:
        return _SHARED[key]
    if name == "minilm":
        from xrec.encoders.text import MiniLMTextEncoder

        return _SHARED.setdefault(key, MiniLMTextEncoder(on_error=on_error))  # type: ignore[arg-type]
    raise ConfigError(f"text encoder {name!r} is unknown; known: {list(TEXT_ENCODERS)} (CLIP: use kind 'cross_modal' with bridge='clip')")


def make_image_encoder(name: str = "efficientnet_lite0", *, on_error: str = "skip", crop: float = 1.0) -> Encoder:
    """The image encoder a setting names.

    Parameters
    ----------
    name
        ``"efficientnet_lite0"``: :class:`~xrec.encoders.image.EfficientNetLite0Encoder`
        (ImageNet-1k, 1,280-d pooled features).
    on_error
        Passed to the encoder: ``"skip"`` gives unreadable images a zero row and a warning.
    crop
        Share of each side kept around the centre (see the encoder's ``crop``).

    Returns
    -------
    Encoder
        Shared within the process, like :func:`make_text_encoder`'s.

    Raises
    ------
    ConfigError
        For an unknown name.
    """
    key = ("image", name, on_error, crop)
    if key in _SHARED:
        return _SHARED[key]
    if name == "efficientnet_lite0":
        from xrec.encoders.image import EfficientNetLite0Encoder

        encoder = EfficientNetLite0Encoder(on_error=on_error, crop=crop)  # type: ignore[arg-type]
        encoder._check_settings()  # a bad crop fails here, before the encoder is shared
        return _SHARED.setdefault(key, encoder)
    raise ConfigError(f"image encoder {name!r} is unknown; known: {list(IMAGE_ENCODERS)}")


class _ReadsThroughBase(Encoder):
    """An encoder that answers through ``self.base``, an image classifier's encoder."""

    modality = "image"
    base: Encoder

    @property
    def version(self) -> str:  # type: ignore[override]
        """The base encoder's version."""
        return self.base.version

    @property
    def on_error(self) -> str:
        """The base encoder's ``on_error`` policy (``"raise"`` when it has none)."""
        return getattr(self.base, "on_error", "raise")


class ImageNetProbsEncoder(_ReadsThroughBase):
    """The ImageNet-1k class probabilities of an image classifier, as an encoder.

    Wrapping the probabilities as "vectors" lets the embedding cache store them beside
    (not instead of) the classifier's features, under their own identity.

    Parameters
    ----------
    base
        An image encoder with ``encode_with_probs`` (e.g.
        :class:`~xrec.encoders.image.EfficientNetLite0Encoder`); default the shared
        EfficientNet-Lite0 encoder.

    Notes
    -----
    Rows sum to 1 (they are not L2-normalized); skipped images give all-zero rows.
    :meth:`features_encoder` gives a twin that encodes features and keeps the
    probabilities of the same forward pass for this encoder, so that caching both
    costs one pass per image.
    """

    def __init__(self, base: Encoder | None = None) -> None:
        if base is None:
            base = make_image_encoder("efficientnet_lite0")
        if not callable(getattr(base, "encode_with_probs", None)):
            raise ConfigError(f"ImageNetProbsEncoder: {type(base).__name__} gives no class probabilities (no encode_with_probs)")
        self.base = base
        self._kept: dict[str, np.ndarray] = {}

    @property
    def identity(self) -> str:  # type: ignore[override]
        """The base encoder's identity with a ``:class-probs`` suffix."""
        return f"{self.base.identity}:class-probs"

    @property
    def dim(self) -> int:
        """Number of ImageNet classes (vector length)."""
        return int(getattr(self.base, "n_classes", 1000))

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """The base encoder's cheap checks."""
        finder = getattr(self.base, "problems", None)
        return finder(contents) if callable(finder) else {}

    def features_encoder(self) -> Encoder:
        """An encoder with the base's identity (same cache entries) that gives features and
        keeps each image's probabilities for this encoder's next call."""
        return _FeaturesKeepingProbs(self)

    def encode_with_mask(self, contents: Sequence[Any], *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Probabilities ``(n, n_classes)`` and the mask of images that were encoded."""
        from xrec.encoders.cache import content_hash

        contents = list(contents)
        keys = [content_hash(c) for c in contents]
        out = np.zeros((len(contents), self.dim), dtype=np.float32)
        ok = np.zeros(len(contents), dtype=bool)
        todo = []
        for i, key in enumerate(keys):
            kept = self._kept.pop(key, None) if key is not None else None
            if kept is None:
                todo.append(i)
            else:
                out[i], ok[i] = kept, True
        if todo:
            result = self.base.encode_with_probs([contents[i] for i in todo], progress=progress)  # type: ignore[attr-defined]
            out[todo], ok[todo] = result.probs, result.ok
        return out, ok

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Probabilities ``(n, n_classes)``, float32, rows summing to 1."""
        return self.encode_with_mask(contents, progress=progress)[0]


class _FeaturesKeepingProbs(_ReadsThroughBase):
    """The base image encoder's features; each forward pass's probabilities go to the probs encoder."""

    def __init__(self, probs: ImageNetProbsEncoder) -> None:
        self.probs = probs
        self.base = probs.base

    @property
    def identity(self) -> str:  # type: ignore[override]
        return self.base.identity

    @property
    def dim(self) -> int:
        return self.base.dim

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        return self.probs.problems(contents)

    def encode_with_mask(self, contents: Sequence[Any], *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
        from xrec.encoders.cache import content_hash

        contents = list(contents)
        result = self.base.encode_with_probs(contents, progress=progress)  # type: ignore[attr-defined]
        for content, probs, good in zip(contents, result.probs, result.ok):
            key = content_hash(content)
            if good and key is not None:
                self.probs._kept[key] = probs
        return result.vectors, result.ok

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        return self.encode_with_mask(contents, progress=progress)[0]


def class_name_vectors(
    text_encoder: Encoder | str = "minilm",
    *,
    style: str = "clip",
    template: str = "{}",
    cache_dir: str | os.PathLike | None = None,
    progress: bool = False,
) -> np.ndarray:
    """Text vectors of the 1,000 ImageNet class names, in class-index order, cached.

    Parameters
    ----------
    text_encoder
        An encoder or a name for :func:`make_text_encoder`.
    style
        Class-name spelling, see :func:`xrec.encoders._imagenet.imagenet_class_names`.
    template
        Each name is put into this text at ``{}`` (e.g. ``"a photo of a {}"``).
    cache_dir
        Embedding cache folder; ``None`` uses the cache's default folder.
    progress
        Progress bar while encoding uncached names.
    """
    from xrec.encoders._imagenet import imagenet_class_names
    from xrec.encoders.cache import EmbeddingCache

    if "{}" not in template:
        raise ConfigError(f"template must contain '{{}}' where the class name goes, got {template!r}")
    # class names are never blank, so the shared "skip" encoder is as strict here
    encoder = make_text_encoder(text_encoder) if isinstance(text_encoder, str) else text_encoder
    texts = [template.format(name) for name in imagenet_class_names(style)]  # type: ignore[arg-type]
    return EmbeddingCache(cache_dir).encode(encoder, texts, progress=progress)


# ---------------------------------------------------------------------------------------
# bridges
# ---------------------------------------------------------------------------------------


def _as_matrix(x: Any, what: str, dim: int | None = None) -> np.ndarray:
    arr = np.asarray(x, dtype=np.float32)
    if arr.ndim != 2:
        raise DataError(f"{what} must be a 2-D array (items × dims), got shape {arr.shape}")
    if dim is not None and arr.shape[1] != dim:
        raise DataError(f"{what} has {arr.shape[1]} columns, the bridge was fitted on {dim}")
    if not np.isfinite(arr).all():
        bad = np.flatnonzero(~np.isfinite(arr).all(axis=1))
        raise DataError(f"{what} has non-finite values in {len(bad)} rows, first: {bad[:5].tolist()}")
    return arr


def _class_probabilities(image: Any, n_classes: int) -> np.ndarray:
    probs = _as_matrix(image, "class probabilities", n_classes)
    if (probs < 0).any():
        raise DataError("class probabilities must be >= 0")
    return probs


def _pairs(image: Any, text: Any) -> tuple[np.ndarray, np.ndarray]:
    x = _as_matrix(image, "image")
    y = _as_matrix(text, "text")
    if len(x) != len(y):
        raise DataError(f"image and text must hold the same items (pairs); got {len(x)} and {len(y)} rows")
    return x, y


class Bridge(ABC):
    """Puts image inputs and text vectors into one space where cosine compares them.

    ``input`` says what :meth:`transform` takes: ``"probs"`` (ImageNet class
    probabilities) or ``"features"`` (image encoder vectors).
    """

    name: ClassVar[str] = ""
    input: ClassVar[str] = "features"

    @abstractmethod
    def fit(self, image: np.ndarray | None = None, text: np.ndarray | None = None) -> Self:
        """Learn from paired rows ``image[i]`` ↔ ``text[i]``; returns ``self``."""

    @abstractmethod
    def transform(self, image: np.ndarray) -> np.ndarray:
        """Image inputs into the shared space, ``(n, dim)`` float32."""

    def transform_text(self, text: np.ndarray) -> np.ndarray:
        """Text vectors into the shared space (the identity unless overridden)."""
        self._check_fitted()
        return _as_matrix(text, "text").copy()

    def _check_fitted(self) -> None:
        if not getattr(self, "fitted_", False):
            raise RuntimeError(f"{type(self).__name__} is not fitted: call fit(...) first")

    def __repr__(self) -> str:
        import inspect

        names = [n for n in inspect.signature(type(self).__init__).parameters if n != "self"]
        shown = ", ".join(f"{n}={getattr(self, n)!r}" for n in names if not isinstance(getattr(self, n), np.ndarray))
        return f"{type(self).__name__}({shown})"


class ConSEBridge(Bridge):
    """ConSE: an image as the convex combination of its top-``T`` class-name text vectors.

    For class probabilities ``p`` over classes with text vectors ``s_c``, and ``C_T`` the
    ``T`` most probable classes (Norouzi et al., ICLR 2014, eq. 1)::

        f(x) = (1 / Z) · Σ_{c ∈ C_T} p_c · s_c,    Z = Σ_{c ∈ C_T} p_c

    Parameters
    ----------
    top_t
        ``T``, the number of most probable classes combined (the paper's default: 10).
    class_vectors
        ``(n_classes, dim)`` text vectors of the class names, row ``c`` for class ``c``.
        ``None``: the 1,000 ImageNet class names encoded by ``text_encoder`` (cached).
    text_encoder
        Name of the text encoder for the class names (see :func:`make_text_encoder`).
    template
        Each class name is put into this text at ``{}`` before encoding.
    cache_dir
        Embedding cache folder for the class-name vectors; ``None``: the cache's default.
    prior_correction
        Divide each image's probabilities by the mean probability of that class over the
        images given to :meth:`fit` before taking the top ``T``: Bayes' rule with the
        catalog's average prediction as the old class prior and a uniform new one
        (Saerens, Latinne & Decaestecker, Neural Computation 14(1), 2002). Classes the
        classifier says for every catalog image (a frame, a background texture) then stop
        crowding out the ones that tell images apart. Needs ``fit(image)``.

    Attributes
    ----------
    class_vectors_
        ``(n_classes, dim)`` float32 class-name vectors.
    class_prior_
        ``(n_classes,)`` mean class probability over the fitted images (``None`` without
        ``prior_correction``).
    """

    name = "conse"
    input = "probs"

    def __init__(
        self,
        top_t: int = 10,
        class_vectors: np.ndarray | None = None,
        text_encoder: str = "minilm",
        template: str = "{}",
        cache_dir: str | None = None,
        prior_correction: bool = False,
    ) -> None:
        self.top_t = top_t
        self.class_vectors = class_vectors
        self.text_encoder = text_encoder
        self.template = template
        self.cache_dir = cache_dir
        self.prior_correction = prior_correction

    def fit(self, image: np.ndarray | None = None, text: np.ndarray | None = None) -> Self:
        """Get the class-name vectors and, with ``prior_correction``, the class prior of ``image``.

        ConSE learns nothing from pairs: ``text`` is ignored, and ``image`` (class
        probabilities) is read only for its mean, when ``prior_correction`` is on.
        """
        if isinstance(self.top_t, bool) or not isinstance(self.top_t, (int, np.integer)) or self.top_t < 1:
            raise ConfigError(f"conse setting 'top_t' must be a positive int, got {self.top_t!r}")
        if not isinstance(self.prior_correction, (bool, np.bool_)):
            raise ConfigError(f"conse setting 'prior_correction' must be true or false, got {self.prior_correction!r}")
        if self.class_vectors is not None:
            vectors = _as_matrix(self.class_vectors, "class_vectors")
        else:
            vectors = class_name_vectors(self.text_encoder, template=self.template, cache_dir=self.cache_dir)
        if self.top_t > len(vectors):
            raise ConfigError(f"conse setting 'top_t' = {self.top_t} exceeds the {len(vectors)} classes")
        self.class_vectors_ = np.ascontiguousarray(vectors, dtype=np.float32)
        self.class_prior_ = self._class_prior(image, len(vectors)) if self.prior_correction else None
        self.fitted_ = True
        return self

    @staticmethod
    def _class_prior(image: np.ndarray | None, n_classes: int) -> np.ndarray:
        if image is None:
            raise ConfigError("conse with prior_correction needs the catalog's class probabilities: call fit(image)")
        probs = _class_probabilities(image, n_classes)
        totals = probs.sum(axis=1)
        present = totals > 0  # zero rows are skipped images, not evidence
        if not present.any():
            raise DataError("conse prior_correction: every image row is zero; no class prior to estimate")
        # each row is scaled to sum 1 so an image counts once whatever its scale
        prior = (probs[present] / totals[present, None]).mean(axis=0, dtype=np.float64)
        # a class no catalog image gives any probability to keeps weight 0, not 0/0
        return np.where(prior > 0, prior, np.inf)

    def transform(self, image: np.ndarray) -> np.ndarray:
        """Class probabilities ``(n, n_classes)`` → ``(n, dim)`` text-space vectors.

        Rows whose top-``T`` probabilities sum to 0 (skipped images) give zero rows.
        """
        self._check_fitted()
        probs = _class_probabilities(image, len(self.class_vectors_))
        if self.class_prior_ is not None:
            probs = probs / self.class_prior_
        t = int(self.top_t)
        # stable order: among equal probabilities the lower class index is taken, every run
        top = np.argsort(-probs, axis=1, kind="stable")[:, :t]
        p_top = np.take_along_axis(probs, top, axis=1).astype(np.float64)
        z = p_top.sum(axis=1, keepdims=True)
        w = np.divide(p_top, z, out=np.zeros_like(p_top), where=z > 0)
        out = np.einsum("nt,ntd->nd", w, self.class_vectors_[top].astype(np.float64))
        return out.astype(np.float32)


class CCABridge(Bridge):
    """Canonical correlation analysis on (image feature, text vector) pairs.

    Each side is first reduced by PCA to ``pca_components`` dimensions (CCA on more
    dimensions than a catalog has pairs finds spurious perfect correlations), then
    standardized (column mean 0, standard deviation 1, as scikit-learn's
    ``CCA(scale=True)`` does) and rotated into ``n_components`` canonical variates;
    cosine in that space compares an image with a text.

    Parameters
    ----------
    n_components
        Canonical variates kept; at most the reduced dimension of either side.
    pca_components
        Dimensions each side keeps before CCA (at most ``n_pairs - 1`` and the side's
        dimension); ``None`` runs CCA on the raw vectors.
    correlation_power
        Canonical variate ``j`` is multiplied by ``r_j ** correlation_power``, ``r_j`` its
        correlation on the training pairs, so weakly correlated (noisy) directions count
        less in the cosine; 0 keeps scikit-learn's plain canonical variates.
    max_iter
        Iterations of scikit-learn's NIPALS inner loop per component.
    tol
        Its convergence tolerance.

    Attributes
    ----------
    x_pca_mean_, x_pca_components_
        Image-side PCA centring and ``(k, image dim)`` axes (``None`` without PCA).
    x_mean_, x_std_, x_rotations_
        Image-side standardization and ``(k, n_components)`` rotation of the CCA.
    correlations_
        ``(n_components,)`` canonical correlations on the training pairs.
    y_pca_mean_, y_pca_components_, y_mean_, y_std_, y_rotations_
        Text-side counterparts.
    """

    name = "cca"

    def __init__(
        self,
        n_components: int = 16,
        pca_components: int | None = 64,
        correlation_power: float = 2.0,
        max_iter: int = 500,
        tol: float = 1e-6,
    ) -> None:
        self.n_components = n_components
        self.pca_components = pca_components
        self.correlation_power = correlation_power
        self.max_iter = max_iter
        self.tol = tol

    def fit(self, image: np.ndarray | None = None, text: np.ndarray | None = None) -> Self:
        """Fit PCA per side and scikit-learn's CCA on the pairs; keep the transform as plain arrays."""
        from sklearn.cross_decomposition import CCA

        if image is None or text is None:
            raise DataError("cca bridge: fit needs image and text pairs")
        x, y = _pairs(image, text)
        power = self.correlation_power
        if isinstance(power, bool) or not isinstance(power, (int, float)) or not (np.isfinite(power) and power >= 0):
            raise ConfigError(f"cca setting 'correlation_power' must be a finite number >= 0, got {power!r}")
        p = self.pca_components
        if p is not None and (isinstance(p, bool) or not isinstance(p, (int, np.integer)) or p < 1):
            raise ConfigError(f"cca setting 'pca_components' must be a positive int or None, got {p!r}")
        self.x_pca_mean_, self.x_pca_components_ = _pca(x, p)
        self.y_pca_mean_, self.y_pca_components_ = _pca(y, p)
        xr, yr = self._reduce(x, "x"), self._reduce(y, "y")
        k = self.n_components
        limit = min(len(x), xr.shape[1], yr.shape[1])
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= limit:
            raise ConfigError(f"cca setting 'n_components' must be an int in [1, {limit}] for these pairs, got {k!r}")
        model = CCA(n_components=int(k), scale=True, max_iter=self.max_iter, tol=self.tol)
        model.fit(xr, yr)
        # stored as float64: the PCA, centring and rotation are small next to the data
        self.x_mean_, self.x_std_ = _standardizer(xr)
        self.y_mean_, self.y_std_ = _standardizer(yr)
        self.x_rotations_ = np.asarray(model.x_rotations_, dtype=np.float64)
        self.y_rotations_ = np.asarray(model.y_rotations_, dtype=np.float64)
        u = ((xr - self.x_mean_) / self.x_std_) @ self.x_rotations_
        v = ((yr - self.y_mean_) / self.y_std_) @ self.y_rotations_
        corr = [np.corrcoef(u[:, j], v[:, j])[0, 1] for j in range(u.shape[1])]
        self.correlations_ = np.clip(np.nan_to_num(np.asarray(corr, dtype=np.float64)), 0.0, 1.0)
        self.fitted_ = True
        return self

    def _reduce(self, a: np.ndarray, side: str) -> np.ndarray:
        comps = getattr(self, f"{side}_pca_components_")
        a = a.astype(np.float64)
        return a if comps is None else (a - getattr(self, f"{side}_pca_mean_")) @ comps.T.astype(np.float64)

    def transform(self, image: np.ndarray) -> np.ndarray:
        """Image features → canonical variates ``(n, n_components)``."""
        self._check_fitted()
        dim = len(self.x_pca_mean_) if self.x_pca_components_ is not None else len(self.x_mean_)
        x = self._reduce(_as_matrix(image, "image", dim), "x")
        return (((x - self.x_mean_) / self.x_std_) @ self.x_rotations_ * self._scale()).astype(np.float32)

    def transform_text(self, text: np.ndarray) -> np.ndarray:
        """Text vectors → canonical variates ``(n, n_components)``."""
        self._check_fitted()
        dim = len(self.y_pca_mean_) if self.y_pca_components_ is not None else len(self.y_mean_)
        y = self._reduce(_as_matrix(text, "text", dim), "y")
        return (((y - self.y_mean_) / self.y_std_) @ self.y_rotations_ * self._scale()).astype(np.float32)

    def _scale(self) -> np.ndarray:
        # weighting canonical variates by a power of their correlation before comparing
        # views: Gong, Ke, Isard & Lazebnik, "A Multi-View Embedding Space for Modeling
        # Internet Images, Tags, and their Semantics", IJCV 2014 (from memory)
        if self.correlation_power == 0:
            return np.ones_like(self.correlations_)
        return self.correlations_ ** float(self.correlation_power)


def _pca(a: np.ndarray, k: int | None) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Centring and the top-``k`` principal axes of ``a`` (``None``s when ``k`` is ``None``)."""
    if k is None:
        return None, None
    from sklearn.decomposition import PCA

    k = min(int(k), len(a) - 1, a.shape[1])
    if k < 1:
        raise DataError(f"cca bridge: too few pairs ({len(a)}) for PCA")
    # the full SVD is exact and has no random start, so refits give the same axes
    pca = PCA(n_components=k, svd_solver="full").fit(a.astype(np.float64))
    return pca.mean_.astype(np.float64), pca.components_.astype(np.float64)


def _standardizer(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    # the same centring and scaling as scikit-learn's PLS/CCA (ddof=1; constant columns
    # keep scale 1) so that transform matches scikit-learn's own transform
    mean = a.astype(np.float64).mean(axis=0)
    std = a.astype(np.float64).std(axis=0, ddof=1)
    std[std == 0.0] = 1.0
    return mean, std


class RidgeBridge(Bridge):
    """Ridge regression from image features to text vectors (the text space is shared).

    Parameters
    ----------
    alpha
        L2 penalty of scikit-learn's ``Ridge`` (with an intercept).

    Attributes
    ----------
    coef_
        ``(image dim, text dim)`` float32 map.
    intercept_
        ``(text dim,)`` float32 offset.
    """

    name = "ridge"

    def __init__(self, alpha: float = 1.0) -> None:
        self.alpha = alpha

    def fit(self, image: np.ndarray | None = None, text: np.ndarray | None = None) -> Self:
        """Fit ``text ≈ image @ coef_ + intercept_`` on the pairs."""
        from sklearn.linear_model import Ridge

        if image is None or text is None:
            raise DataError("ridge bridge: fit needs image and text pairs")
        if isinstance(self.alpha, bool) or not isinstance(self.alpha, (int, float)) or not (np.isfinite(self.alpha) and self.alpha >= 0):
            raise ConfigError(f"ridge setting 'alpha' must be a finite number >= 0, got {self.alpha!r}")
        x, y = _pairs(image, text)
        model = Ridge(alpha=float(self.alpha), fit_intercept=True).fit(x.astype(np.float64), y.astype(np.float64))
        self.coef_ = np.ascontiguousarray(np.atleast_2d(model.coef_).T, dtype=np.float32)
        self.intercept_ = np.atleast_1d(model.intercept_).astype(np.float32)
        self.fitted_ = True
        return self

    def transform(self, image: np.ndarray) -> np.ndarray:
        """Image features → text-space vectors ``(n, text dim)``."""
        self._check_fitted()
        x = _as_matrix(image, "image", self.coef_.shape[0])
        return (x @ self.coef_ + self.intercept_).astype(np.float32)


BRIDGES: dict[str, type[Bridge]] = {"conse": ConSEBridge, "cca": CCABridge, "ridge": RidgeBridge}


def make_bridge(name: str, **settings: Any) -> Bridge:
    """A bridge by name (``"conse"``, ``"cca"``, ``"ridge"``) with its settings.

    Raises
    ------
    ConfigError
        For an unknown name or setting.
    """
    from xrec._settings import check_settings

    if name not in BRIDGES:
        raise ConfigError(f"bridge {name!r} is unknown; known: {sorted(BRIDGES)}")
    cls = BRIDGES[name]
    check_settings(cls, settings, f"bridge {name!r}")
    return cls(**settings)


# ---------------------------------------------------------------------------------------
# measurement
# ---------------------------------------------------------------------------------------


def _unit_rows(a: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(a, axis=1, keepdims=True)
    return np.divide(a, norms, out=np.zeros_like(a), where=norms > 0)


def bridge_recall(
    bridge: Bridge,
    image: np.ndarray,
    text: np.ndarray,
    *,
    k: int = 10,
    test_fraction: float = 0.3,
    seed: int = 0,
    center: bool = False,
) -> dict[str, float]:
    """Text → image retrieval recall@k of a bridge on held-out catalog pairs.

    A seeded ``test_fraction`` of the pairs is held out; the bridge is fitted on the
    rest (ConSE ignores them). Each held-out item's text vector is the query; the
    target is the same item's bridged image among all held-out items; its rank counts
    every other held-out image scoring at least as high (ties never favour the bridge).

    Parameters
    ----------
    bridge
        An unfitted bridge (it is fitted here).
    image
        ``(n, ·)`` the bridge's image input (``bridge.input``: probabilities or features).
    text
        ``(n, dim)`` text vectors of the same items.
    k
        Cut-off.
    test_fraction
        Share of pairs held out, in (0, 1).
    seed
        Seed of the held-out draw.
    center
        Subtract each side's mean over all given items before the cosine, as the content
        sources' ``center`` setting does with the catalog's mean (no pairing is used).

    Returns
    -------
    dict
        ``recall`` (share of held-out items whose own image is in the top ``k``),
        ``random`` (``k / n_test``, the expectation of a random ranking), ``lift``
        (``recall / random``), ``n_test``, ``n_train``.
    """
    x, y = _pairs(image, text)
    if not 0.0 < test_fraction < 1.0:
        raise ConfigError(f"test_fraction must be in (0, 1), got {test_fraction!r}")
    n = len(x)
    rng = np.random.default_rng(seed)
    order = rng.permutation(n)
    n_test = max(1, int(round(test_fraction * n)))
    if n_test >= n:
        raise DataError(f"too few pairs ({n}) to hold out {test_fraction:.0%} and fit on the rest")
    test, train = np.sort(order[:n_test]), np.sort(order[n_test:])
    bridge.fit(x[train], y[train])
    queries = bridge.transform_text(y).astype(np.float64)
    targets = bridge.transform(x).astype(np.float64)
    if center:
        queries -= queries.mean(axis=0)
        targets -= targets.mean(axis=0)
    queries, targets = _unit_rows(queries[test]), _unit_rows(targets[test])
    sims = queries @ targets.T
    own = np.diag(sims)
    rank = (sims >= own[:, None]).sum(axis=1)  # 1 = best; counts the target itself
    recall = float(np.mean(rank <= k))
    random = min(1.0, k / n_test)
    return {"recall": recall, "random": random, "lift": recall / random, "n_test": n_test, "n_train": len(train)}
