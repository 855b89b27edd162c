"""ConSE (Norouzi et al., "Zero-Shot Learning by Convex Combination of Semantic Embeddings", ICLR 2014)."""

from __future__ import annotations

from typing import Self

import numpy as np

from xrec._validation import check_int
from xrec.encoders._bridge_base import Bridge, as_matrix, class_probabilities
from xrec.encoders._imagenet_probs import class_name_vectors
from xrec.errors import ConfigError, DataError

__all__ = ["ConSEBridge"]


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
        check_int(self.top_t, "conse setting 'top_t'", low=1, expected="a positive int")
        if not isinstance(self.prior_correction, (bool, np.bool_)):
            raise ConfigError(f"conse setting 'prior_correction' must be true or false, got {self.prior_correction!r}")
        if self.class_vectors is not None:
            vectors = as_matrix(self.class_vectors, "class_vectors")
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
        probs = class_probabilities(image, n_classes)
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
        probs = class_probabilities(image, len(self.class_vectors_))
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
