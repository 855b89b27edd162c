"""Ridge regression from image features to text vectors (scikit-learn's ``Ridge``)."""

from __future__ import annotations

from typing import Self

import numpy as np

from xrec._validation import check_number
from xrec.encoders._bridge_base import Bridge, as_matrix, paired_rows
from xrec.errors import DataError

__all__ = ["RidgeBridge"]


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
        check_number(self.alpha, "ridge setting 'alpha'", low=0)
        x, y = paired_rows(image, text)
        model = Ridge(alpha=float(self.alpha), fit_intercept=True).fit(x.astype(np.float64), y.astype(np.float64))
        self.coef_ = np.ascontiguousarray(np.atleast_2d(model.coef_).T, dtype=np.float32)
        self.intercept_ = np.atleast_1d(model.intercept_).astype(np.float32)
        self.fitted_ = True
        return self

    def transform(self, image: np.ndarray) -> np.ndarray:
        """Image features → text-space vectors ``(n, text dim)``."""
        self._check_fitted()
        x = as_matrix(image, "image", self.coef_.shape[0])
        return (x @ self.coef_ + self.intercept_).astype(np.float32)

