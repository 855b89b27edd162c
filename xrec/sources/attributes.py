"""Attribute similarity: a user's profile of attribute vectors against every item."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Self

import numpy as np
import scipy.sparse as sp

from xrec.encoders.attributes import AttributeEncoder
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources.base import LowRankSource

_DAY = 86400.0


def _l2_normalize(rows: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(rows.astype(np.float64), axis=1, keepdims=True)
    return np.divide(rows, norms, out=np.zeros_like(rows, dtype=np.float64), where=norms > 0).astype(np.float32)


class AttributeSource(LowRankSource):
    """Cosine between a user's attribute profile and each item's attribute vector.

    Item vectors are :class:`~xrec.encoders.attributes.AttributeEncoder` rows, L2-normalized.
    A user's profile is the (optionally recency-weighted) mean of the vectors of their
    training items, L2-normalized; users without training rows get a zero profile.

    Parameters
    ----------
    columns
        Attribute columns to use; ``None`` uses every attribute column of the catalog schema.
    numeric_bins
        Quantile bins for numeric columns (one-hot) instead of robust-scaled values.
    half_life_days
        Weight of a training interaction halves every ``half_life_days`` days before the
        user's latest training interaction; ``None`` weights all equally.
    block_weights
        Per-column multipliers passed to the encoder.

    Attributes
    ----------
    encoder_
        The fitted :class:`AttributeEncoder`.
    user_factors_
        ``(n_users, n_features)`` normalized profiles.
    item_factors_
        ``(n_items, n_features)`` normalized item vectors.
    """

    kind = "attributes"

    def __init__(
        self,
        columns: Sequence[str] | None = None,
        numeric_bins: int | None = None,
        half_life_days: float | None = None,
        block_weights: Mapping[str, float] | None = None,
    ) -> None:
        self.columns = columns
        self.numeric_bins = numeric_bins
        self.half_life_days = half_life_days
        self.block_weights = block_weights

    def fit(self, fold: Fold) -> Self:
        """Encode the catalog and build user profiles from ``fold.train``; returns ``self``."""
        if self.half_life_days is not None and not (np.isfinite(self.half_life_days) and self.half_life_days > 0):
            raise ConfigError(f"attributes setting 'half_life_days' must be a positive number or None, got {self.half_life_days!r}")
        self.encoder_ = AttributeEncoder(
            columns=self.columns,
            numeric_bins=self.numeric_bins,
            block_weights=self.block_weights,
        ).fit(fold.catalog)
        self.item_factors_ = _l2_normalize(self.encoder_.transform(fold.catalog))
        train = fold.train
        users = train["user_idx"].to_numpy(dtype=np.int64)
        items = train["item_idx"].to_numpy(dtype=np.int64)
        if self.half_life_days is None:
            weights = np.ones(len(train), dtype=np.float64)
        else:
            # relative to each user's own latest interaction: the profile is normalized per
            # user, so any per-user reference gives the same direction, and this one cannot
            # underflow for users who stopped long before the fold's end
            times = train["timestamp"].to_numpy(dtype=np.float64)
            latest = np.full(fold.n_users, -np.inf)
            np.maximum.at(latest, users, times)
            age_days = (latest[users] - times) / _DAY
            weights = np.exp2(-age_days / float(self.half_life_days))
        history = sp.csr_matrix((weights, (users, items)), shape=(fold.n_users, fold.n_items))
        history.sum_duplicates()
        # the mean's 1/sum(weights) factor vanishes in the normalization below
        self.user_factors_ = _l2_normalize(np.asarray(history @ self.item_factors_.astype(np.float64)))
        self.fitted_ = True
        return self
