"""How much two scorers' top-K lists differ: overlap per user and the items that moved most.

Paired metric differences (:func:`xrec.evaluate.compare`) say whether a change (a new
encoder, a quantized one, another runtime) helps or hurts; this says how much of what
users would see changes at all. Two scorers with equal NDCG can still show users
different items, and a swap that keeps ~all top-10 lists is safe to roll out even when
the metric difference is inside noise.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from xrec.errors import ConfigError

__all__ = ["TopListChange", "top_list_change"]


@dataclass
class TopListChange:
    """Top-K list overlap between a baseline and a candidate scorer on one fold.

    Attributes
    ----------
    baseline, candidate
        Scorer names.
    k
        List length.
    users
        ``(m,)`` user indices compared (the fold's evaluation users by default).
    overlap
        ``(m,)`` float: for each user, ``|top_k(baseline) ∩ top_k(candidate)| / k``
        (overlap@K; 1 = the same items, in any order).
    moved
        The items whose number of appearances in users' top-K lists changed most: columns
        ``item``, ``in_baseline``, ``in_candidate``, ``change`` (candidate minus baseline),
        largest absolute change first.
    """

    baseline: str
    candidate: str
    k: int
    users: np.ndarray
    overlap: np.ndarray
    moved: pd.DataFrame = field(default_factory=pd.DataFrame)

    @property
    def mean(self) -> float:
        """Mean overlap@K over users."""
        return float(self.overlap.mean()) if self.overlap.size else float("nan")

    @property
    def identical_share(self) -> float:
        """Share of users whose top-K sets are the same."""
        return float((self.overlap >= 1.0).mean()) if self.overlap.size else float("nan")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready summary (mean, share identical, quartiles, the items that moved most)."""
        q = np.quantile(self.overlap, [0.25, 0.5, 0.75]) if self.overlap.size else [float("nan")] * 3
        return {
            "baseline": self.baseline,
            "candidate": self.candidate,
            "k": self.k,
            "n_users": int(self.users.size),
            "mean_overlap": self.mean,
            "identical_share": self.identical_share,
            "overlap_quartiles": [float(v) for v in q],
            "moved": self.moved.to_dict(orient="records"),
        }

    def describe(self) -> str:
        """One line: ``"text_int8 vs text_fp32: mean overlap@10 0.912 (58.1% of 600 users identical); moved most: ..."``."""
        moved = ", ".join(f"{r.item} {r.change:+d}" for r in self.moved.head(5).itertuples())
        return (
            f"{self.candidate} vs {self.baseline}: mean overlap@{self.k} {self.mean:.3f} "
            f"({100 * self.identical_share:.1f}% of {self.users.size} users identical)"
            + (f"; moved most (lists gained/lost): {moved}" if moved else "")
        )


def top_list_change(
    baseline: Any,
    candidate: Any,
    fold: Any,
    *,
    k: int = 10,
    users: np.ndarray | None = None,
    names: tuple[str, str] = ("baseline", "candidate"),
    n_moved: int = 10,
    chunk_size: int = 1024,
) -> TopListChange:
    """Overlap@K of two scorers' top-K lists per user, and the items that moved most.

    Parameters
    ----------
    baseline, candidate
        Scorers as :func:`~xrec.evaluate.evaluate` takes them (arrays, sources, blends,
        callables), fitted on ``fold``.
    fold
        The fold both were fitted on; items a user saw in training are never listed.
    k
        List length.
    users
        User indices; default ``fold.eval_users``.
    names
        Labels of the two scorers in the result.
    n_moved
        How many items to list in ``moved``.
    chunk_size
        Users scored per block.

    Returns
    -------
    TopListChange
    """
    from xrec.evaluate import as_score_fn, top_k_items

    if not isinstance(k, int) or isinstance(k, bool) or k < 1:
        raise ConfigError(f"top-list overlap: k must be a positive int, got {k!r}")
    users = np.asarray(fold.eval_users if users is None else users, dtype=np.int64)
    fa = as_score_fn(baseline, fold.n_users, fold.n_items)
    fb = as_score_fn(candidate, fold.n_users, fold.n_items)
    seen = fold.train_matrix.tocsr()
    overlap = np.zeros(users.size, dtype=np.float64)
    counts_a = np.zeros(fold.n_items, dtype=np.int64)
    counts_b = np.zeros(fold.n_items, dtype=np.int64)
    for start in range(0, users.size, chunk_size):
        chunk = users[start : start + chunk_size]
        sub = seen[chunk]
        top_a = top_k_items(np.asarray(fa(chunk)), sub, k)
        top_b = top_k_items(np.asarray(fb(chunk)), sub, k)
        overlap[start : start + chunk.size] = _row_overlap(top_a, top_b) / k
        np.add.at(counts_a, top_a[top_a >= 0], 1)
        np.add.at(counts_b, top_b[top_b >= 0], 1)
    change = counts_b - counts_a
    order = np.lexsort((np.arange(fold.n_items), -np.abs(change)))[:n_moved]
    order = order[change[order] != 0]
    item_ids = getattr(getattr(fold, "catalog", None), "item_ids", None)
    labels = np.asarray(item_ids)[order] if item_ids is not None else order
    moved = pd.DataFrame({"item": labels, "in_baseline": counts_a[order], "in_candidate": counts_b[order], "change": change[order]})
    return TopListChange(names[0], names[1], k, users, overlap, moved)


def _row_overlap(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Per row, how many listed items (``>= 0``) of ``a`` also appear in ``b`` (rows hold distinct items)."""
    hit = (a[:, :, None] == b[:, None, :]) & (a[:, :, None] >= 0)
    return hit.any(axis=2).sum(axis=1).astype(np.float64)
