"""User profiles from item vectors: the maths every content source shares.

A user's profile is the (optionally recency-weighted) mean of the vectors of the items in
their training history, L2-normalized; an item's score is the cosine between that profile
and the item's vector. :class:`ProfileSource` is the base of every content source.
"""

from __future__ import annotations

from typing import Any, Self

import numpy as np
import scipy.sparse as sp

from xrec._validation import check_number
from xrec.data.catalog import Catalog
from xrec.fold import Fold
from xrec.sources.base import LowRankSource

__all__ = ["ProfileSource", "center_vectors", "check_half_life", "history_weights", "l2_normalize", "user_profiles"]

_DAY = 86400.0


def l2_normalize(rows: np.ndarray) -> np.ndarray:
    """Rows scaled to unit length (float32); zero rows stay zero."""
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


def check_half_life(kind: str, value: Any) -> None:
    """``ConfigError`` unless ``value`` (a kind's ``half_life_days`` setting) is ``None`` or a positive number."""
    check_number(value, f"{kind} setting 'half_life_days'", low=0, low_open=True, allow_none=True, expected="a positive number")


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
    return l2_normalize(np.asarray(history @ np.asarray(item_vectors, dtype=np.float64)))


class ProfileSource(LowRankSource):
    """Profiles from one set of item vectors, scored against another (often the same)."""

    half_life_days: float | None

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        """(vectors the profiles are built from, vectors the items are scored with), same space."""
        raise NotImplementedError

    def fit(self, fold: Fold) -> Self:
        """Encode the catalog (through the cache) and build profiles from ``fold.train``; returns ``self``."""
        check_half_life(self.kind, self.half_life_days)
        profile_side, item_side = self._vectors(fold.catalog)
        # each history item counts as a direction, whatever its vector's length
        profile_side, item_side = l2_normalize(profile_side), l2_normalize(item_side)
        if getattr(self, "center", False):
            profile_side, item_side = center_vectors(profile_side), center_vectors(item_side)
        self.item_factors_ = l2_normalize(item_side)
        self.user_factors_ = user_profiles(fold, profile_side, self.half_life_days)
        self.fitted_ = True
        return self

