"""Row-wise helpers shared by the normalizers and the fusion rules: candidates and tie-aware ranks."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp


@dataclass(frozen=True)
class Candidates:
    """Which items of a block of users are candidates (not seen in training).

    Built once per block and shared by every source's normalization. ``seen_rows`` /
    ``seen_cols`` list the non-candidate cells, which are few next to the block, so
    per-row statistics are taken over whole rows and corrected on those cells.
    """

    mask: np.ndarray  # bool (n_users, n_items), True = candidate
    seen_rows: np.ndarray  # int64
    seen_cols: np.ndarray  # int64
    n_cand: np.ndarray  # int64 (n_users,)

    @property
    def shape(self) -> tuple[int, int]:
        return self.mask.shape  # type: ignore[return-value]

    @classmethod
    def from_seen(cls, seen: sp.spmatrix | None, n_users: int, n_items: int) -> Candidates:
        """From the CSR training rows of the block's users (``None``: everything is a candidate)."""
        mask = np.ones((n_users, n_items), dtype=bool)
        if seen is None:
            empty = np.zeros(0, dtype=np.int64)
            return cls(mask, empty, empty, np.full(n_users, n_items, dtype=np.int64))
        seen = sp.csr_matrix(seen)
        if seen.shape != (n_users, n_items):
            raise ValueError(f"seen rows have shape {seen.shape}, scores have shape {(n_users, n_items)}")
        seen = seen.copy()
        seen.sum_duplicates()
        rows = np.repeat(np.arange(n_users, dtype=np.int64), np.diff(seen.indptr))
        cols = seen.indices.astype(np.int64)
        mask[rows, cols] = False
        n_cand = n_items - np.diff(seen.indptr).astype(np.int64)
        return cls(mask, rows, cols, n_cand)

    @classmethod
    def from_mask(cls, mask: np.ndarray) -> Candidates:
        """From a boolean candidate mask."""
        mask = np.asarray(mask, dtype=bool)
        rows, cols = np.nonzero(~mask)
        return cls(mask, rows.astype(np.int64), cols.astype(np.int64), mask.sum(axis=1).astype(np.int64))

    def keyed(self, scores: np.ndarray, fill: float) -> np.ndarray:
        """A float32 copy of ``scores`` with ``fill`` in the non-candidate cells."""
        out = np.array(scores, dtype=np.float32, copy=True)
        out[self.seen_rows, self.seen_cols] = fill
        return out


def candidate_mask(seen: sp.spmatrix | None, n_users: int, n_items: int) -> np.ndarray:
    """Boolean ``(n_users, n_items)`` array, True where an item is a candidate (not seen in training)."""
    return Candidates.from_seen(seen, n_users, n_items).mask


def average_ranks(scores: np.ndarray, cand: Candidates) -> np.ndarray:
    """Ascending average rank of each candidate in its row (float64; 0 for non-candidates).

    1 = lowest candidate score; tied candidates share the mean of the ranks they span,
    as ``scipy.stats.rankdata(method="average")`` on the row's candidates.
    """
    n_users, n_items = scores.shape
    out = np.zeros((n_users, n_items))
    if n_users == 0 or n_items == 0:
        return out
    keyed = cand.keyed(scores, -np.inf)
    order = np.argsort(keyed, axis=1)
    ordered = np.take_along_axis(keyed, order, axis=1)
    n_seen = (n_items - cand.n_cand)[:, None]
    pos = np.arange(n_items, dtype=np.int64)
    avg_sorted = (pos - n_seen + 1).astype(np.float64)
    # Non-candidates sort first (-inf); only ties between two candidates need the slow path.
    tie = ordered[:, 1:] == ordered[:, :-1]
    tie &= pos[None, :-1] >= n_seen
    tied_rows = np.flatnonzero(tie.any(axis=1))
    if len(tied_rows):
        sub = ordered[tied_rows]
        differs = sub[:, 1:] != sub[:, :-1]
        starts = np.ones(sub.shape, dtype=bool)
        starts[:, 1:] = differs
        ends = np.ones(sub.shape, dtype=bool)
        ends[:, :-1] = differs
        first = np.maximum.accumulate(np.where(starts, pos, 0), axis=1)
        last = np.minimum.accumulate(np.where(ends, pos, n_items)[:, ::-1], axis=1)[:, ::-1]
        avg_sorted[tied_rows] = (first + last) / 2.0 - n_seen[tied_rows] + 1.0
    np.put_along_axis(out, order, avg_sorted, axis=1)
    out[cand.seen_rows, cand.seen_cols] = 0.0
    return out


def within_depth(scores: np.ndarray, cand: Candidates, depth: int) -> np.ndarray:
    """True for candidates with fewer than ``depth`` candidates scoring strictly higher in their row.

    That is a row's top ``depth`` candidates, with every item tied at the cut included.
    """
    n_users, n_items = scores.shape
    keyed = cand.keyed(scores, -np.inf)
    if depth >= n_items:
        return cand.mask.copy()
    # The depth-th largest value (with multiplicity): x >= it  <=>  fewer than depth are above x.
    threshold = np.partition(keyed, n_items - depth, axis=1)[:, n_items - depth]
    keep = keyed >= threshold[:, None]
    keep &= cand.mask
    short = cand.n_cand <= depth  # fewer candidates than depth: all are within it
    keep[short] = cand.mask[short]
    return keep
