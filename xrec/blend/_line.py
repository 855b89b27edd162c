"""Every grid point of one weight coordinate in one pass over the blocks.

A coordinate line search changes one weight (a source's, or a source's in one popularity
band) and keeps the others fixed. :class:`LineEvaluator` computes, for each chunk of users,
the parts of the weighted sum that do not move (the sum of the sources before the moving
one, the weighted blocks after it) once, then the held-out rank for every candidate weight
while the chunk is still in cache. The float32 operations are those of
:class:`~xrec.blend.engine.BlendEngine` (and ``Blend.score``) in the same order, so the
numbers are exactly the engine's for the same weights.

Most cells do not need the sum at every grid point: for users with one held-out item,
a candidate whose every term is at least the held-out item's at both ends of the weight
range is placed above it for every weight in the range (float rounding is monotone), and
one whose summed score stays below the held-out item's by more than the rounding error of
the sums is never placed above it (the gap is linear in the moving weight, so its two
ends bound it). Users with ``K`` candidates always above miss at every weight. Only the
remaining cells of the remaining users are summed per grid point; where they are many,
the chunk is summed densely instead.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from xrec.evaluate import UNRANKED, BlockRanks, count_at_least, metrics_from_ranks, rank_heldout

# Cells per chunk of users (about 4 MiB per float32 array).
_CHUNK_CELLS = 1 << 20
# Past this share of undecided cells in a chunk, dense sums are cheaper than gathered ones.
_DENSE_SHARE = 0.3
# Largest copy of a user sample's rows of every block (beyond it, rows are gathered per chunk).
_COPY_BYTES = 1 << 30
# Memory a line may keep for its densely summed chunks between calls.
_KEEP_BYTES = 256 << 20


class LineEvaluator:
    """Per-user main metric of a prepared engine's blend, on a subset of its users.

    Parameters
    ----------
    engine
        A prepared :class:`~xrec.blend.engine.BlendEngine`.
    rows
        Positions in ``engine.users_`` to evaluate (ascending); ``None`` for all.
    row_weights
        Weight of each row in the mean (sums to 1); default equal weights.
    """

    def __init__(self, engine: Any, rows: np.ndarray | None = None, row_weights: np.ndarray | None = None) -> None:
        # The engine's arrays, not the engine: evaluators are cached per engine (weakly keyed),
        # so they must not keep it alive.
        self._blocks, self._factors, self._users = engine.blocks_, engine.factors_, engine.users_
        self._train = engine.fold.train_matrix
        self.names = list(engine.names_)
        n_all = len(engine.users_)
        self.rows = np.arange(n_all) if rows is None else np.asarray(rows, dtype=np.int64)
        self.all_rows = rows is None
        n = len(self.rows)
        self.row_weights = np.full(n, 1.0 / n) if row_weights is None else np.asarray(row_weights, dtype=np.float64)
        users = engine.users_[self.rows]
        fold = engine.fold
        self.n_items = fold.n_items
        seen = fold.train_matrix[users].tocsr()
        truth = fold.heldout_matrix[users].tocsr()
        seen.sort_indices()
        truth.sort_indices()
        self.seen, self.truth = seen, truth
        n_rel = np.diff(truth.indptr)
        single = n_rel == 1
        target = np.where(single, truth.indices[np.minimum(truth.indptr[:-1], max(len(truth.indices) - 1, 0))], 0)
        seen_flag = np.zeros(n, dtype=bool)
        if single.any():
            seen_flag[single] = np.asarray(seen[np.flatnonzero(single), target[single]]).ravel() != 0
        self.single = single
        self.one_each = bool(single.all())
        self.reach = single & ~seen_flag
        self.target = np.where(self.reach, target, 0)
        self.n_cand = (self.n_items - np.diff(seen.indptr)).astype(np.int64)
        name, _, k = engine.metric.rpartition("@")
        self.metric_name, self.k = name, int(k)
        self.column = engine.metric
        self.step = max(1, _CHUNK_CELLS // max(self.n_items, 1))
        self._copies: dict[str, np.ndarray] = {}
        if not self.all_rows and len(self.names) * n * self.n_items * 4 <= _COPY_BYTES:
            # A sample's rows are gathered once (row gathers per chunk and call cost more).
            for s in self.names:
                self._copies[s] = self._fetch(s, self.rows)
        self._point_cache: dict[tuple, np.ndarray] = {}
        self._maxabs: dict[str, np.ndarray] = {}

    # ------------------------------------------------------------------ blocks
    def _fetch(self, name: str, rows: np.ndarray | slice) -> np.ndarray:
        """float32 rows of a source's block, ``-inf`` at seen items."""
        block = self._blocks.get(name)
        if block is not None:
            return np.asarray(block[rows], dtype=np.float32)
        uf, vt = self._factors[name]
        out = np.ascontiguousarray(uf[rows] @ vt, dtype=np.float32)
        sub = self._train[self._users[rows]].tocsr()
        out[np.repeat(np.arange(out.shape[0]), np.diff(sub.indptr)), sub.indices] = -np.inf
        return out

    def _rows_of(self, name: str, lo: int, hi: int) -> np.ndarray:
        if self.all_rows:
            return self._fetch(name, slice(lo, hi))
        if name in self._copies:
            return self._copies[name][lo:hi]
        return self._fetch(name, self.rows[lo:hi])

    def multi_rows(self, lo: int, hi: int) -> np.ndarray:
        """Rows in ``lo:hi`` with several held-out items (local positions)."""
        return np.flatnonzero(~self.single[lo:hi])

    # ------------------------------------------------------------------ metrics
    def _values(self, ranks: np.ndarray) -> np.ndarray:
        """``(G, n_rows)`` metric values from ``(G, n_heldout)`` ranks."""
        if self.one_each:
            # One held-out item per row: the metric is a function of its rank alone
            # (the same definitions as metrics_from_ranks, with one relevant item).
            r = ranks.astype(np.float64)
            hit = ranks <= self.k
            with np.errstate(divide="ignore"):
                if self.metric_name in ("hit_rate", "recall"):
                    return hit.astype(np.float64)
                if self.metric_name == "ndcg":
                    return np.where(hit, 1.0 / np.log2(r + 1.0), 0.0)
                return np.where(hit, 1.0 / r, 0.0)
        out = np.empty((len(ranks), len(self.rows)))
        for g, row in enumerate(ranks):
            br = BlockRanks(self.truth.indptr.astype(np.int64), self.truth.indices.astype(np.int64), row, self.n_cand)
            out[g] = metrics_from_ranks(br, (self.k,), (self.metric_name,))[self.column]
        return out

    def mean(self, values: np.ndarray) -> np.ndarray:
        """Weighted mean over rows of ``values`` (last axis)."""
        return np.asarray(values) @ self.row_weights

    # ------------------------------------------------------------------ evaluation
    @staticmethod
    def _check(weights: Mapping[str, Any]) -> dict[str, Any]:
        return {n: (np.asarray(w, dtype=np.float32) if isinstance(w, np.ndarray) else float(w)) for n, w in weights.items()}

    def point(self, weights: Mapping[str, Any]) -> np.ndarray:
        """Per-row metric values of one weight vector (name -> number or per-item vector)."""
        weights = self._check(weights)
        key = tuple((n, hashlib.sha256(w.tobytes()).digest() if isinstance(w, np.ndarray) else w) for n, w in sorted(weights.items()))
        if key not in self._point_cache:
            first = next(n for n in self.names if np.any(np.asarray(weights[n]) > 0))
            w = weights[first]
            if isinstance(w, np.ndarray):
                # No item moves: the source's term is its per-item weights times its block.
                line = self.line(weights, first, 0.0, 0.0, band=np.zeros(self.n_items, dtype=bool))
                values = line.values([0.0])
            else:
                values = self.line(weights, first, w, w).values([w])
            self._point_cache[key] = values[0]
        return self._point_cache[key]

    def line(self, weights: Mapping[str, Any], name: str, t_lo: float, t_hi: float, *, band: np.ndarray | None = None) -> _Line:
        """The line through ``weights`` along source ``name``'s weight, for weights in ``[t_lo, t_hi]``.

        Parameters
        ----------
        weights
            Current weights (the other sources keep theirs).
        name
            The moving source.
        t_lo, t_hi
            Range of the moving weight (``0 <= t_lo <= t_hi``, finite); with ``band`` it
            replaces the source's weight on the items of ``band`` only.
        band
            Boolean item mask, or ``None`` (the source's scalar weight moves).

        Returns
        -------
        _Line
            ``values(ts)`` gives ``(len(ts), n_rows)`` metric values for weights in the range.
        """
        return _Line(self, self._check(weights), name, float(t_lo), float(t_hi), band)

    def _max_abs(self, name: str) -> np.ndarray:
        """Largest finite ``|score|`` per row of a source (bounds the rounding error of sums)."""
        if name not in self._maxabs:
            out = np.zeros(len(self.rows), dtype=np.float64)
            for lo in range(0, len(self.rows), self.step):
                hi = min(lo + self.step, len(self.rows))
                a = np.abs(self._rows_of(name, lo, hi))
                a[~np.isfinite(a)] = 0.0
                out[lo:hi] = a.max(axis=1) if a.shape[1] else 0.0
            self._maxabs[name] = out
        return self._maxabs[name]


class _Line:
    """One coordinate's line: the fixed parts of each chunk's sum, decided cells counted once."""

    def __init__(self, ev: LineEvaluator, weights: dict[str, Any], name: str, t_lo: float, t_hi: float, band: np.ndarray | None) -> None:
        self.ev, self.weights, self.name, self.band = ev, weights, name, band
        self.t_lo, self.t_hi = np.float32(t_lo), np.float32(t_hi)
        pos = ev.names.index(name)
        positive = [n for n in ev.names if n != name and np.any(np.asarray(weights[n]) > 0)]
        self.before = [n for n in positive if ev.names.index(n) < pos]
        self.after = [n for n in positive if ev.names.index(n) > pos]
        self.fixed_w = None
        self._still = None if band is None else ~band
        if band is not None:
            self.fixed_w = np.asarray(np.broadcast_to(np.asarray(weights[name], dtype=np.float32), (ev.n_items,)))
        # Per-row bound of the summed magnitudes, for the rounding margin.
        bound = sum(float(np.max(weights[n])) * ev._max_abs(n) for n in positive)
        top = float(t_hi) if band is None else max(float(t_hi), float(self.fixed_w.max(initial=0.0)))
        bound = bound + top * ev._max_abs(name)
        # Rounding error of a float32 sum of len(positive)+1 products (Higham 2002, ch. 3,
        # gamma_n; from memory), with an 8x safety factor for this test's own float32 arithmetic.
        rel = 8.0 * (len(positive) + 2) * 2.0**-24
        self.margin = (rel * 2.0 * bound + 1e-30).astype(np.float32)
        self.chunks = []
        self._kept: dict[int, tuple] = {}
        self._kept_bytes = 0
        with np.errstate(invalid="ignore", over="ignore"):
            for lo in range(0, len(ev.rows), ev.step):
                hi = min(lo + ev.step, len(ev.rows))
                parts = self._parts(lo, hi)
                self.chunks.append((lo, hi, self._classify(lo, hi, parts) if t_hi > t_lo else None))

    def _parts(self, lo: int, hi: int) -> tuple:
        ev, w = self.ev, self.weights
        prefix = None
        for s in self.before:
            term = np.multiply(ev._rows_of(s, lo, hi), np.asarray(w[s], dtype=np.float32))
            prefix = term if prefix is None else np.add(prefix, term, out=prefix)
        after = [np.multiply(ev._rows_of(s, lo, hi), np.asarray(w[s], dtype=np.float32)) for s in self.after]
        b = ev._rows_of(self.name, lo, hi)
        fixed = None if self.band is None else np.multiply(b, self.fixed_w)
        return prefix, after, b, fixed

    def _dense_parts(self, lo: int, hi: int) -> tuple:
        """A dense chunk's fixed parts, kept for the line's later calls while they fit the budget."""
        if lo in self._kept:
            return self._kept[lo]
        parts = self._parts(lo, hi)
        size = sum(a.nbytes for a in (parts[0], parts[3], *parts[1]) if a is not None)
        if self._kept_bytes + size <= _KEEP_BYTES:
            self._kept[lo] = parts
            self._kept_bytes += size
        return parts

    @staticmethod
    def _sum(t: np.float32, b: np.ndarray, fixed: np.ndarray | None, var: np.ndarray | None, prefix, after) -> np.ndarray:
        """The engine's float32 sum: prefix + moving term, then each later term in order."""
        acc = np.multiply(b, t)
        if fixed is not None:
            acc = np.where(var, acc, fixed)
        if prefix is not None:
            acc = np.add(prefix, acc, out=acc)
        for term in after:
            acc = np.add(acc, term, out=acc)
        return acc

    def values(self, ts: Sequence[float]) -> np.ndarray:
        """``(len(ts), n_rows)`` metric values; every ``t`` must lie in the line's range."""
        ev = self.ev
        ts = np.asarray([np.float32(t) for t in ts], dtype=np.float32)
        if len(ts) and (ts.min() < self.t_lo or ts.max() > self.t_hi):
            raise ValueError(f"weights {ts.min()}..{ts.max()} outside the line's range {self.t_lo}..{self.t_hi}")
        ranks = np.full((len(ts), len(ev.truth.indices)), UNRANKED, dtype=np.int64)
        with np.errstate(invalid="ignore", over="ignore"):
            for lo, hi, compact in self.chunks:
                self._rank_chunk(lo, hi, compact, ts, ranks)
        return ev._values(ranks)

    def _rank_chunk(self, lo: int, hi: int, compact: dict | None, ts: np.ndarray, ranks: np.ndarray) -> None:
        ev = self.ev
        tpos = ev.truth.indptr[lo:hi]
        dense_rows = np.flatnonzero(ev.reach[lo:hi]) if compact is None else np.zeros(0, dtype=np.int64)
        multi = np.flatnonzero(~ev.single[lo:hi])
        if len(dense_rows) or len(multi):
            prefix, after, b, fixed = self._dense_parts(lo, hi)
            var = None if self.band is None else np.broadcast_to(self.band, b.shape)
            tgt = ev.target[lo:hi][dense_rows]
            if len(multi):
                m_seen, m_truth = ev.seen[lo:hi][multi], ev.truth[lo:hi][multi]
                starts = ev.truth.indptr[lo:hi][multi]
            for g, t in enumerate(ts):
                acc = self._sum(t, b, fixed, var, prefix, after)
                if len(dense_rows):
                    targets = acc[dense_rows, tgt]
                    counts = count_at_least(acc, None if len(dense_rows) == hi - lo else dense_rows, targets)
                    ranks[g, tpos[dense_rows]] = np.where(np.isneginf(targets), UNRANKED, counts)
                if len(multi):
                    br = rank_heldout(acc[multi], m_seen, m_truth)
                    ranks[g, np.repeat(starts, np.diff(br.indptr)) + _within(br.indptr)] = br.ranks
        if compact is not None:
            c = compact
            rows_pos = tpos[c["rows"]]
            for g, t in enumerate(ts):
                tv = self._sum(t, c["tb"], c["tfixed"], c["tvar"], c["tprefix"], c["tafter"])
                count = c["base"].copy()
                if len(c["v_row"]):
                    acc = self._sum(t, c["v_b"], None, None, c["v_prefix"], c["v_after"])
                    count += np.bincount(c["v_row"], weights=acc >= tv[c["v_row"]], minlength=len(count)).astype(np.int64)
                if len(c["c_row"]):
                    count += np.bincount(c["c_row"], weights=c["c_acc"] >= tv[c["c_row"]], minlength=len(count)).astype(np.int64)
                ranks[g, rows_pos] = count

    def _classify(self, lo: int, hi: int, parts: tuple) -> dict | None:
        """Split the reachable single-target rows' cells into always above, never above and undecided.

        The held-out item's score minus a candidate's is ``A + t·B`` in exact arithmetic
        (``A`` from the fixed terms, ``B`` from the moving one), so its ends over the range
        bound it; beyond the rounding margin its sign is that of the float32 sums too.
        Returns ``None`` when the chunk is better summed densely.
        """
        ev = self.ev
        prefix, after, b, fixed = parts
        if len(ev.multi_rows(lo, hi)) == hi - lo:
            return None
        rows = np.flatnonzero(ev.reach[lo:hi])
        if len(rows) == 0:
            return None
        r_t = ev.target[lo:hi][rows]
        idx = np.arange(len(rows))
        every = len(rows) == hi - lo
        take = (lambda a: a) if every else (lambda a: a[rows])  # noqa: E731
        comps = ([prefix] if prefix is not None else []) + after
        alpha = None
        for c in comps:
            alpha = np.array(take(c)) if alpha is None else np.add(alpha, take(c), out=alpha)
        bb = take(b)
        if self.band is not None:
            var = np.broadcast_to(self.band, bb.shape)
            fx = take(fixed)
            if alpha is None:
                alpha = np.where(var, np.float32(0.0), fx)
            else:
                np.add(alpha, fx, out=alpha, where=np.broadcast_to(self._still, bb.shape))
            bb = np.where(var, bb, np.float32(0.0))
        elif alpha is None:
            alpha = np.zeros_like(bb)
        a_t = alpha[idx, r_t][:, None]
        b_t = bb[idx, r_t][:, None]
        if not (np.isfinite(a_t).all() and np.isfinite(b_t).all()):
            return None
        # The gap at both ends of the range, in place: alpha becomes A, db becomes the t_hi end.
        da = np.subtract(a_t, alpha, out=alpha)  # +inf at seen items: never above
        db = np.subtract(b_t, bb)
        if self.t_lo == 0:
            g1 = da
        else:
            g1 = np.multiply(db, self.t_lo)
            g1 += da
        g2 = np.multiply(db, self.t_hi, out=db)
        g2 += da
        margin = self.margin[lo:hi][rows][:, None]
        always = g1 < -margin
        always &= g2 < -margin
        near = g1 <= margin  # NaN (an unscored candidate) is never near: never above
        near |= g2 <= margin
        always[idx, r_t] = False
        near[idx, r_t] = False
        n_always = np.count_nonzero(always, axis=1)
        undecided = np.logical_and(near, ~always, out=near)
        undecided[n_always >= ev.k] = False
        if int(np.count_nonzero(undecided)) > _DENSE_SHARE * undecided.size:
            return None
        base = 1 + n_always.astype(np.int64)
        tb = b[rows, r_t]
        tfixed = None if fixed is None else fixed[rows, r_t]
        tvar = None if self.band is None else self.band[r_t]
        tprefix = None if prefix is None else prefix[rows, r_t]
        tafter = [a[rows, r_t] for a in after]
        ur, ui = np.nonzero(undecided)
        if self.band is None:
            moving = np.ones(len(ur), dtype=bool)
        else:
            moving = self.band[ui]
            # Cells whose candidate does not move: their sum is one number; against a held-out
            # item that does not move either, the comparison is decided here.
            still = ~moving
            sr, si = ur[still], ui[still]
            c_acc = self._sum(self.t_lo, b[rows[sr], si], fixed[rows[sr], si], np.zeros(len(sr), dtype=bool),
                              None if prefix is None else prefix[rows[sr], si], [a[rows[sr], si] for a in after])
            t_still = ~tvar[sr]
            if t_still.any():
                tv0 = self._sum(self.t_lo, tb, tfixed, tvar, tprefix, tafter)
                base += np.bincount(sr[t_still], weights=c_acc[t_still] >= tv0[sr[t_still]], minlength=len(rows)).astype(np.int64)
        vr, vi = ur[moving], ui[moving]
        gr = rows[vr]
        out = {
            "rows": rows,
            "base": base,
            "v_row": vr,
            "v_b": b[gr, vi],
            "v_prefix": None if prefix is None else prefix[gr, vi],
            "v_after": [a[gr, vi] for a in after],
            "tb": tb, "tfixed": tfixed, "tvar": tvar, "tprefix": tprefix, "tafter": tafter,
            "c_row": np.zeros(0, dtype=np.int64), "c_acc": np.zeros(0, dtype=np.float32),
        }
        if self.band is not None:
            keep = ~t_still
            out["c_row"], out["c_acc"] = sr[keep], c_acc[keep]
        return out


def _within(indptr: np.ndarray) -> np.ndarray:
    """Position of every entry within its row of a CSR-like ``indptr``."""
    counts = np.diff(indptr)
    return np.arange(int(indptr[-1])) - np.repeat(indptr[:-1], counts)
