"""The dominance shortcut of :class:`~xrec.blend.BlendEngine` (exact, for scalar weights).

When every user has one held-out item, the candidates that beat it in every source beat it
under any non-negative weights, and those that lose to it in every source never do; only
the undecided rest needs the weighted sum. :class:`DominancePruning` is the part of the
engine that sorts candidates once at prepare time and ranks from them afterwards.
"""

from __future__ import annotations

import numpy as np
from tqdm.auto import tqdm

from xrec.errors import ConfigError
from xrec.evaluate._ranking import UNRANKED

__all__ = ["PRUNE_MIN_WEIGHT", "DominancePruning"]

# Smallest positive weight for which the dominance shortcut is exact (below it, float32
# products can underflow and rounding is no longer relative).
PRUNE_MIN_WEIGHT = 1e-12


class DominancePruning:
    """Engine methods of the dominance shortcut; mixed into :class:`~xrec.blend.BlendEngine`.

    Reads the prepared engine's ``blocks_``, ``names_``, ``users_`` and truth layout.
    """

    def _build_pruning(self, progress: bool) -> None:
        """Split each user's candidates by dominance against the held-out item.

        For non-negative scalar weights, summing in float32 is monotone in every term
        (rounding is monotone), so a candidate scoring at least the held-out item's value in
        *every* source is placed above it for *any* weights ("always above"), and one scoring
        below it in every source by more than the rounding error of the sums is never placed
        above it. Only the rest ("undecided") needs the weighted sum. A user with at least
        ``max(ks)`` always-above candidates misses at every cut-off whatever the weights,
        and is not summed at all. Applies to users with exactly one held-out item, all
        sources stored as blocks; exact (the same numbers as the dense path) as long as
        positive weights are not tiny (>= ``PRUNE_MIN_WEIGHT``).
        """
        self.pruned_ = False
        if self.prune is False or self.factors_ or len(self._multi) or not self._single.any():
            return
        if self.prune not in (True, "auto"):
            raise ConfigError(f"prune must be True, False or 'auto', got {self.prune!r}")
        n_rows, n_items = len(self.users_), self._n_items
        kmax = max(self._ks)
        n_src = len(self.names_)
        # Rounding error bound of a float32 sum of n_src products, relative to the summed
        # magnitudes (Higham 2002, ch. 3: gamma_{n+1}; from memory), with a 4x safety factor.
        rel = 4.0 * (n_src + 1) * 2.0**-24
        always = np.zeros(n_rows, dtype=np.int64)
        rows_out: list[np.ndarray] = []
        items_out: list[np.ndarray] = []
        step = max(1, (1 << 22) // max(n_items, 1))
        rows_all = np.arange(n_rows)
        # Summing a gathered undecided cell costs several times a dense one: past ~15 % of
        # the cells the dense path is faster (measured in benchmarks/bench_blend.py).
        budget = 0.15 * n_rows * n_items if self.prune == "auto" else np.inf
        kept = 0
        for lo in tqdm(range(0, n_rows, step), desc="sorting candidates by dominance", unit="chunk", disable=not progress):
            hi = min(lo + step, n_rows)
            r = rows_all[lo:hi]
            ok = self._single[lo:hi]
            t_items = self._target[lo:hi]
            ge = np.ones((hi - lo, n_items), dtype=bool)
            below = np.ones((hi - lo, n_items), dtype=bool)
            finite = np.ones((hi - lo, n_items), dtype=bool)
            for name in self.names_:
                b = self.blocks_[name][lo:hi].astype(np.float32, copy=False)
                t = b[r - lo, t_items][:, None].astype(np.float32)
                finite &= np.isfinite(b)
                ge &= b >= t
                margin = rel * (np.abs(b) + np.abs(t)) + 1e-30
                with np.errstate(invalid="ignore"):
                    below &= (t - b) > margin
            finite[r - lo, t_items] = False  # the held-out item itself
            finite[~ok] = False
            a = ge & finite
            always[lo:hi] = a.sum(axis=1)
            undecided = finite & ~a & ~below
            undecided[always[lo:hi] >= kmax] = False
            ur, ui = np.nonzero(undecided)
            kept += len(ur)
            if kept > budget:
                return
            rows_out.append(ur + lo)
            items_out.append(ui)
        p_rows = np.concatenate(rows_out) if rows_out else np.zeros(0, dtype=np.int64)
        p_items = np.concatenate(items_out) if items_out else np.zeros(0, dtype=np.int64)
        self._p_rows = p_rows.astype(np.int64)
        self._p_vals = [np.ascontiguousarray(self.blocks_[n][p_rows, p_items], dtype=np.float32) for n in self.names_]
        live = self._single & (always < kmax)
        self._p_live = np.flatnonzero(live)
        self._p_tvals = [self.blocks_[n][self._p_live, self._target[self._p_live]].astype(np.float32) for n in self.names_]
        self._p_always = always
        self._p_kmax = kmax
        self.pruned_ = True

    def _run_pruned(self, weights: dict[str, float | np.ndarray]) -> np.ndarray | None:
        """Ranks by the dominance shortcut, or ``None`` when it does not apply to ``weights``."""
        if not getattr(self, "pruned_", False):
            return None
        values = [weights[n] for n in self.names_]
        if any(isinstance(w, np.ndarray) for w in values):
            return None  # per-item weights: dominance between items no longer holds
        if any(0 < w < PRUNE_MIN_WEIGHT for w in values):
            return None
        idx = [j for j, w in enumerate(values) if w > 0]

        def summed(columns: list[np.ndarray]) -> np.ndarray:
            # Same operations in the same order as the dense path (and Blend.score).
            out = np.multiply(columns[idx[0]], np.float32(values[idx[0]]))
            for j in idx[1:]:
                out += np.multiply(columns[j], np.float32(values[j]))
            return out

        ranks = np.full(len(self._truth.indices), UNRANKED, dtype=np.int64)
        single = np.flatnonzero(self._single)
        # Users with at least max(ks) always-above candidates: a miss at every cut-off.
        ranks[self._truth.indptr[single]] = self._p_always[single] + 1
        live = self._p_live
        if len(live):
            t = summed(self._p_tvals)
            pos = np.empty(len(self.users_), dtype=np.int64)
            pos[live] = np.arange(len(live))
            if len(self._p_rows):
                above = summed(self._p_vals) >= t[pos[self._p_rows]]
                extra = np.bincount(pos[self._p_rows], weights=above, minlength=len(live)).astype(np.int64)
            else:
                extra = np.zeros(len(live), dtype=np.int64)
            ranks[self._truth.indptr[live]] = 1 + self._p_always[live] + extra
        return ranks
