"""The shape every bridge shares, and the checks of its array inputs."""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Any, ClassVar, Self

import numpy as np

from xrec._validation import check_fitted
from xrec.errors import DataError

__all__ = ["Bridge", "as_matrix", "class_probabilities", "paired_rows"]


def as_matrix(x: Any, what: str, dim: int | None = None) -> np.ndarray:
    arr = np.asarray(x, dtype=np.float32)
    if arr.ndim != 2:
        raise DataError(f"{what} must be a 2-D array (items × dims), got shape {arr.shape}")
    if dim is not None and arr.shape[1] != dim:
        raise DataError(f"{what} has {arr.shape[1]} columns, the bridge was fitted on {dim}")
    if not np.isfinite(arr).all():
        bad = np.flatnonzero(~np.isfinite(arr).all(axis=1))
        raise DataError(f"{what} has non-finite values in {len(bad)} rows, first: {bad[:5].tolist()}")
    return arr


def class_probabilities(image: Any, n_classes: int) -> np.ndarray:
    probs = as_matrix(image, "class probabilities", n_classes)
    if (probs < 0).any():
        raise DataError("class probabilities must be >= 0")
    return probs


def paired_rows(image: Any, text: Any) -> tuple[np.ndarray, np.ndarray]:
    x = as_matrix(image, "image")
    y = as_matrix(text, "text")
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
        return as_matrix(text, "text").copy()

    def _check_fitted(self) -> None:
        check_fitted(self)

    def __repr__(self) -> str:
        import inspect

        names = [n for n in inspect.signature(type(self).__init__).parameters if n != "self"]
        shown = ", ".join(f"{n}={getattr(self, n)!r}" for n in names if not isinstance(getattr(self, n), np.ndarray))
        return f"{type(self).__name__}({shown})"
