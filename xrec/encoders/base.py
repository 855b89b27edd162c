"""The encoder interface: one modality in, float32 vectors out."""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Sequence
from typing import Any

import numpy as np


class Encoder(ABC):
    """Turns raw content of one modality into vectors.

    ``identity`` and ``version`` key the on-disk cache: change either when the
    vectors an encoder produces would change (weights, preprocessing, pooling).
    Inputs are raw content: ``bytes`` of an image file for image encoders,
    ``str`` for text encoders.
    """

    modality: str = ""  # "image" or "text"
    identity: str = ""
    version: str = "1"

    @property
    @abstractmethod
    def dim(self) -> int:
        """Length of each output vector."""

    @abstractmethod
    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Vectors of shape ``(len(contents), dim)``, float32, L2-normalized rows."""

    @property
    def cache_key(self) -> str:
        """``identity@version``: the key of this encoder's folder in the embedding cache."""
        return f"{self.identity}@{self.version}"
