"""Popularity: how often each item was chosen in training, the same for every user."""

from __future__ import annotations

from typing import Self

import numpy as np

from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources.base import LowRankSource

_DAY = 86400.0


class PopularitySource(LowRankSource):
    """Scores every item by its training count (rank 1: a column of ones times the counts).

    Parameters
    ----------
    weighted
        Sum the training weights (e.g. ratings) instead of counting rows.
    recent_days
        Count only interactions in the last ``recent_days`` days up to and including the
        fold's latest training timestamp (timestamps are seconds). ``None`` counts all.

    Attributes
    ----------
    popularity_
        Float32 array of length ``n_items``.
    user_factors_, item_factors_
        ``(n_users, 1)`` ones and ``(n_items, 1)`` popularity, so scores are identical per user.
    """

    kind = "popularity"

    def __init__(self, weighted: bool = False, recent_days: float | None = None) -> None:
        self.weighted = weighted
        self.recent_days = recent_days

    def fit(self, fold: Fold) -> Self:
        """Count training interactions per item; returns ``self``."""
        if self.recent_days is not None and not (np.isfinite(self.recent_days) and self.recent_days > 0):
            raise ConfigError(f"popularity setting 'recent_days' must be a positive number or None, got {self.recent_days!r}")
        train = fold.train
        if self.recent_days is not None and len(train):
            times = train["timestamp"].to_numpy(dtype=np.float64)
            train = train[times >= times.max() - float(self.recent_days) * _DAY]
        weights = train["weight"].to_numpy(dtype=np.float64) if self.weighted else None
        counts = np.bincount(train["item_idx"].to_numpy(dtype=np.int64), weights=weights, minlength=fold.n_items)
        self.popularity_ = counts.astype(np.float32)
        self.user_factors_ = np.ones((fold.n_users, 1), dtype=np.float32)
        self.item_factors_ = self.popularity_[:, None].copy()
        self.fitted_ = True
        return self
