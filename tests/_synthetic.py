"""Synthetic blend problems shared by the engine, gating and weight-learning tests.

These are test inputs only, never references for the checks.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from xrec.data.catalog import Catalog
from xrec.fold import Fold
from xrec.sources.base import Source


class FixedScores(Source):
    """Scores read from a dense matrix (no kind: not registered)."""

    def __init__(self, matrix: np.ndarray) -> None:
        self.matrix = matrix

    def fit(self, fold):
        self.fitted_ = True
        return self

    def score(self, users):
        return self.matrix[np.asarray(users)].astype(np.float32)


def interaction_frame(users, items) -> pd.DataFrame:
    """Interaction rows for ``users[k]`` × ``items[k]``, timestamp 0 and weight 1."""
    return pd.DataFrame({"user_idx": np.asarray(users), "item_idx": np.asarray(items), "timestamp": 0.0, "weight": np.float32(1.0)})


def pairs_frame(pairs) -> pd.DataFrame:
    """:func:`interaction_frame` from a list of ``(user_idx, item_idx)`` pairs."""
    a = np.array(pairs)
    return interaction_frame(a[:, 0], a[:, 1])


def synthetic_fold(n_users: int, n_items: int, train: pd.DataFrame, heldout: pd.DataFrame | None = None) -> Fold:
    """Fold over items ``i0, i1, ...`` and users ``u0, u1, ...``; no held-out rows unless given."""
    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    user_ids = np.array([f"u{u}" for u in range(n_users)])
    return Fold(catalog, user_ids, train, train.iloc[:0] if heldout is None else heldout)


def argmax_heldout(probe: Fold, truth: np.ndarray) -> Fold:
    """``probe`` with one held-out item per user: the argmax of ``truth`` over items it did not train on.

    ``truth`` (users × items) is changed in place: training entries become ``-inf``.
    """
    truth[probe.train_matrix.toarray() > 0] = -np.inf
    held = interaction_frame(np.arange(probe.n_users), truth.argmax(axis=1))
    return dataclasses.replace(probe, heldout=held)


def fixed_sources(fold: Fold, raws) -> dict[str, Source]:
    """``{"s0": FixedScores(raws[0]), ...}``, each fitted on ``fold``."""
    return {f"s{j}": FixedScores(r).fit(fold) for j, r in enumerate(raws)}
