"""A fold: training interactions to fit on, held-out interactions to evaluate against."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp

from xrec.data.catalog import Catalog


@dataclass(frozen=True)
class Fold:
    """Train and held-out interactions over a fixed user and item index.

    Users are indexed by position in ``user_ids``; items by catalog row.

    Attributes
    ----------
    catalog
        The items; row ``j`` is item index ``j``.
    user_ids
        External user ids; position ``u`` is user index ``u``.
    train
        Training rows with integer columns ``user_idx``, ``item_idx`` plus ``timestamp``, ``weight``.
    heldout
        Held-out rows, same columns (test or validation interactions).
    settings
        How the fold was made (split rule, seed, ...), for reports and blend files.
    """

    catalog: Catalog
    user_ids: np.ndarray
    train: pd.DataFrame
    heldout: pd.DataFrame
    settings: dict = field(default_factory=dict)

    @property
    def n_users(self) -> int:
        """Number of users in the fold's user index."""
        return len(self.user_ids)

    @property
    def n_items(self) -> int:
        """Number of catalog items."""
        return self.catalog.n_items

    def _matrix(self, rows: pd.DataFrame, values: np.ndarray) -> sp.csr_matrix:
        m = sp.csr_matrix(
            (values, (rows["user_idx"].to_numpy(), rows["item_idx"].to_numpy())),
            shape=(self.n_users, self.n_items),
            dtype=np.float32,
        )
        m.sum_duplicates()
        m.sort_indices()
        return m

    @property
    def train_matrix(self) -> sp.csr_matrix:
        """Users × items, training weights (CSR, float32)."""
        cached = self.__dict__.get("_train_matrix")
        if cached is None:
            cached = self._matrix(self.train, self.train["weight"].to_numpy(dtype=np.float32))
            object.__setattr__(self, "_train_matrix", cached)
        return cached

    @property
    def heldout_matrix(self) -> sp.csr_matrix:
        """Users × items, 1 where an interaction is held out (CSR, float32)."""
        cached = self.__dict__.get("_heldout_matrix")
        if cached is None:
            cached = self._matrix(self.heldout, np.ones(len(self.heldout), dtype=np.float32))
            object.__setattr__(self, "_heldout_matrix", cached)
        return cached

    @property
    def eval_users(self) -> np.ndarray:
        """Indices of users with at least one held-out interaction."""
        return np.flatnonzero(np.diff(self.heldout_matrix.indptr) > 0)

    @property
    def item_train_counts(self) -> np.ndarray:
        """Training interactions per item (popularity), int64 of length n_items."""
        return np.bincount(self.train["item_idx"].to_numpy(), minlength=self.n_items).astype(np.int64)

    @property
    def new_items(self) -> np.ndarray:
        """Indices of held-out items with no training interaction (new items), sorted."""
        held = np.unique(self.heldout["item_idx"].to_numpy())
        return held[self.item_train_counts[held] == 0].astype(np.int64)

    @property
    def cold_users(self) -> np.ndarray:
        """Indices of users with held-out interactions but no training interaction (cold users), sorted."""
        has_train = np.diff(self.train_matrix.indptr) > 0
        users = self.eval_users
        return users[~has_train[users]].astype(np.int64)
