"""Which items a held-out item is ranked against: every unseen item, or a seeded sample."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from xrec._validation import check_int
from xrec.errors import ConfigError

SAMPLED_WARNING = (
    "sampled-negatives metrics can rank systems differently from full ranking "
    "(Krichene & Rendle, 'On Sampled Metrics for Item Recommendation', KDD 2020); "
    "use FullRanking() for decisions"
)


@dataclass(frozen=True)
class FullRanking:
    """Every catalog item the user did not interact with in training is a candidate (default)."""

    def describe(self) -> dict:
        """The protocol as a plain dict (kept in scorecards)."""
        return {"kind": "full_ranking"}


@dataclass(frozen=True)
class SampledNegatives:
    """Rank each held-out item among ``n_negatives`` sampled non-relevant items + the relevant ones.

    Negatives are drawn without replacement, per user, from the items the user neither
    interacted with in training nor holds out; the draw for user ``u`` depends only on
    ``(seed, u)``, so it does not change with chunking or with which other users are
    evaluated. When fewer than ``n_negatives`` items qualify, all of them are used.
    Evaluating with this protocol emits a :class:`UserWarning`: sampled metrics can
    reorder systems (Krichene & Rendle, KDD 2020).

    Parameters
    ----------
    n_negatives
        Negatives per user (> 0).
    seed
        Seed of the per-user draws.
    """

    n_negatives: int = 100
    seed: int = 0

    def __post_init__(self) -> None:
        check_int(self.n_negatives, "SampledNegatives.n_negatives", low=1, expected="a positive int")
        check_int(self.seed, "SampledNegatives.seed", low=0, expected="a non-negative int")

    def describe(self) -> dict:
        """The protocol as a plain dict (kept in scorecards)."""
        return {"kind": "sampled_negatives", "n_negatives": int(self.n_negatives), "seed": int(self.seed)}

    def sample(
        self, users: np.ndarray, seen: sp.csr_matrix, truth: sp.csr_matrix, n_items: int
    ) -> tuple[np.ndarray, np.ndarray]:
        """Sampled negatives as parallel arrays ``(row, item)``, rows ascending."""
        rows_out: list[np.ndarray] = []
        items_out: list[np.ndarray] = []
        for row, user in enumerate(np.asarray(users)):
            excluded = np.union1d(
                seen.indices[seen.indptr[row] : seen.indptr[row + 1]],
                truth.indices[truth.indptr[row] : truth.indptr[row + 1]],
            ).astype(np.int64)
            n_free = n_items - len(excluded)
            m = min(int(self.n_negatives), n_free)
            if m <= 0:
                continue
            rng = np.random.default_rng([int(self.seed), int(user)])
            picks = np.sort(rng.choice(n_free, size=m, replace=False))
            # The p-th free item is p + (number of excluded items at or below it).
            shift = excluded - np.arange(len(excluded))
            items = picks + np.searchsorted(shift, picks, side="right")
            rows_out.append(np.full(m, row, dtype=np.int64))
            items_out.append(items)
        if not rows_out:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
        return np.concatenate(rows_out), np.concatenate(items_out)


def protocol_from_dict(d: dict) -> FullRanking | SampledNegatives:
    """Inverse of ``describe()``."""
    kind = d.get("kind")
    if kind == "full_ranking":
        return FullRanking()
    if kind == "sampled_negatives":
        return SampledNegatives(int(d["n_negatives"]), int(d["seed"]))
    raise ConfigError(f"unknown protocol kind {kind!r}; known: ['full_ranking', 'sampled_negatives']")
