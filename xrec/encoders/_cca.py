"""Canonical correlation analysis between image features and text vectors (scikit-learn's ``CCA``)."""

from __future__ import annotations

from typing import Self

import numpy as np

from xrec._validation import check_int, check_number
from xrec.encoders._bridge_base import Bridge, as_matrix, paired_rows
from xrec.errors import DataError

__all__ = ["CCABridge"]


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
        x, y = paired_rows(image, text)
        power = self.correlation_power
        check_number(power, "cca setting 'correlation_power'", low=0)
        p = self.pca_components
        check_int(p, "cca setting 'pca_components'", low=1, allow_none=True, expected="a positive int")
        self.x_pca_mean_, self.x_pca_components_ = _pca(x, p)
        self.y_pca_mean_, self.y_pca_components_ = _pca(y, p)
        xr, yr = self._reduce(x, "x"), self._reduce(y, "y")
        k = self.n_components
        limit = min(len(x), xr.shape[1], yr.shape[1])
        check_int(k, "cca setting 'n_components'", low=1, high=limit, expected=f"an int in [1, {limit}] for these pairs")
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
        x = self._reduce(as_matrix(image, "image", dim), "x")
        return (((x - self.x_mean_) / self.x_std_) @ self.x_rotations_ * self._scale()).astype(np.float32)

    def transform_text(self, text: np.ndarray) -> np.ndarray:
        """Text vectors → canonical variates ``(n, n_components)``."""
        self._check_fitted()
        dim = len(self.y_pca_mean_) if self.y_pca_components_ is not None else len(self.y_mean_)
        y = self._reduce(as_matrix(text, "text", dim), "y")
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
