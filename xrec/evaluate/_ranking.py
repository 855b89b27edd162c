"""Rank of every held-out item among a user's candidates, computed on a block of users.

Tie rule (ties never favour the scorer)
---------------------------------------
The rank of a held-out (relevant) item ``i`` is 1 + the number of candidates placed
above it, where a candidate ``c`` is placed above ``i`` when

* ``score[c] > score[i]``, or
* ``score[c] == score[i]`` and ``c`` is NOT relevant, or
* ``score[c] == score[i]``, ``c`` is relevant and ``c < i`` (item index).

So a scorer that gives every item the same score gets the worst possible rank for its
first relevant item, and relevant items tied with each other are ordered by item index
(they do not push each other down twice).

NaN scores are read as ``-inf``: the lowest possible score, tied with ``-inf`` itself.
A relevant item that the user already interacted with in training is never a candidate
(the seen mask removes it); its rank is :data:`UNRANKED` and it counts as a miss, while
it still counts in the user's number of relevant items.

The full-ranking path counts, for one target score per row, the candidates scoring at
least as high in one comparison pass over the block, done in row slices that fit in
cache; the few seen and relevant items are then corrected for sparsely. No row is sorted
unless it has more than ``_SLOT_LIMIT`` relevant items.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

#: Rank given to a held-out item that is not a candidate (it was seen in training).
UNRANKED: int = int(np.iinfo(np.int64).max)

# Rows with more relevant items than this are sorted once instead of scanned once per item.
_SLOT_LIMIT = 48
# Bytes of boolean scratch per comparison slice; small enough to stay in L2 cache.
_SCRATCH_BYTES = 1 << 19


@dataclass(frozen=True)
class BlockRanks:
    """Ranks of the held-out items of a block of users (CSR-like layout).

    Attributes
    ----------
    indptr
        ``(b + 1,)`` offsets: row ``r``'s held-out items are ``items[indptr[r]:indptr[r+1]]``.
    items
        Held-out item indices, ascending within each row.
    ranks
        1-based rank of each held-out item among the row's candidates, int64;
        :data:`UNRANKED` for items seen in training.
    n_candidates
        Number of candidates per row (unseen catalog items, or the sample + relevant items).
    """

    indptr: np.ndarray
    items: np.ndarray
    ranks: np.ndarray
    n_candidates: np.ndarray

    @property
    def n_rows(self) -> int:
        """Number of users (rows) in the block."""
        return len(self.indptr) - 1

    @property
    def n_relevant(self) -> np.ndarray:
        """Held-out items per row (including unreachable ones)."""
        return np.diff(self.indptr)

    @property
    def row_of(self) -> np.ndarray:
        """Row of every entry of ``items`` / ``ranks``."""
        return np.repeat(np.arange(self.n_rows), self.n_relevant)


def canonical_rows(m: sp.spmatrix | sp.sparray, n_rows: int, n_items: int, what: str) -> sp.csr_matrix:
    """``m`` as CSR with sorted, unique indices and the expected shape (no copy when already so)."""
    from xrec.errors import DataError

    if not sp.issparse(m):
        raise DataError(f"{what} must be a scipy sparse matrix, got {type(m).__name__}")
    if m.shape != (n_rows, n_items):
        raise DataError(f"{what} has shape {m.shape}, expected {(n_rows, n_items)}")
    if not isinstance(m, sp.csr_matrix):
        m = sp.csr_matrix(m)
    if not m.has_canonical_format:
        m = m.copy()
        m.sum_duplicates()
    return m


def check_users(users: np.ndarray | None, truth: sp.csr_matrix) -> np.ndarray:
    """Evaluated user indices as int64 (default: every user with a held-out item), checked.

    Raises :class:`~xrec.errors.DataError` for a non-1-D or non-integer array, no users,
    indices out of range, repeated users, or users without held-out items.
    """
    from xrec.errors import DataError

    n_users = truth.shape[0]
    n_rel = np.diff(truth.indptr)
    if users is None:
        users = np.flatnonzero(n_rel > 0)
    users = np.asarray(users)
    if users.ndim != 1 or (users.size and users.dtype.kind not in "iu"):
        raise DataError(f"users must be a 1-D array of user indices, got dtype {users.dtype} shape {users.shape}")
    users = users.astype(np.int64)
    if users.size == 0:
        raise DataError("no users to evaluate (none has a held-out item)")
    out_of_range = users[(users < 0) | (users >= n_users)]
    if out_of_range.size:
        raise DataError(f"user indices out of range [0, {n_users}): {out_of_range[:5].tolist()}")
    uniq, cnt = np.unique(users, return_counts=True)
    if (cnt > 1).any():
        raise DataError(f"users repeated: {uniq[cnt > 1][:5].tolist()}")
    empty = users[n_rel[users] == 0]
    if empty.size:
        raise DataError(f"{empty.size} users have no held-out items, first: {empty[:5].tolist()}")
    return users


def _no_nan(values: np.ndarray) -> np.ndarray:
    values = np.asarray(values)
    if values.dtype.kind == "f":
        nan = np.isnan(values)
        if nan.any():
            values = np.where(nan, -np.inf, values)
    return values


def count_at_least(
    block: np.ndarray,
    rows: np.ndarray | None,
    targets: np.ndarray,
    exclude: sp.csr_matrix | None = None,
) -> np.ndarray:
    """For each selected row, how many entries of ``block[row]`` are ``>= target``.

    NaN entries are never counted (they compare false), which matches reading NaN as
    ``-inf`` for every target above ``-inf``; callers handle ``-inf`` targets themselves.
    One comparison pass over the selected rows, in slices small enough for the cache.

    Parameters
    ----------
    block
        ``(b, n)`` scores.
    rows
        Rows of ``block`` to use, one per target; ``None`` means every row in order.
    targets
        One threshold per selected row.
    exclude
        Optional ``(b, n)`` CSR (canonical) aligned with ``block``; its stored entries are
        not counted (e.g. the seen items).
    """
    b_sel = block.shape[0] if rows is None else len(rows)
    n = block.shape[1]
    out = np.zeros(b_sel, dtype=np.int64)
    if b_sel == 0 or n == 0:
        return out
    if exclude is not None and rows is not None:
        exclude = exclude[rows]
    n_pad = -(-n // 8) * 8
    step = max(1, min(b_sel, _SCRATCH_BYTES // n_pad))
    scratch = np.zeros((step, n_pad), dtype=bool)
    n_words = n_pad // 8
    targets = np.asarray(targets, dtype=block.dtype)[:, None]
    for start in range(0, b_sel, step):
        stop = min(b_sel, start + step)
        m = stop - start
        part = block[start:stop] if rows is None else block[rows[start:stop]]
        np.greater_equal(part, targets[start:stop], out=scratch[:m, :n])
        # Sum the booleans eight at a time as bytes of a uint64; at most 255 words per
        # group so no byte lane overflows, then add up the eight lanes.
        words = scratch[:m].view(np.uint64)
        for g in range(0, n_words, 255):
            lanes = words[:, g : g + 255].sum(axis=1, dtype=np.uint64)
            out[start:stop] += lanes.view(np.uint8).reshape(m, 8).sum(axis=1, dtype=np.int64)
        if exclude is not None:
            # Read the excluded entries' comparisons while the slice is still in cache.
            lo, hi = exclude.indptr[start], exclude.indptr[stop]
            if hi > lo:
                ex_rows = np.repeat(np.arange(m), np.diff(exclude.indptr[start : stop + 1]))
                out[start:stop] -= np.bincount(ex_rows, weights=scratch[ex_rows, exclude.indices[lo:hi]], minlength=m).astype(
                    np.int64
                )
    return out


def _group_count_at_least(groups_a: np.ndarray, vals_a: np.ndarray, groups_q: np.ndarray, vals_q: np.ndarray) -> np.ndarray:
    """For each query ``q``: ``#{a : groups_a[a] == groups_q[q] and vals_a[a] >= vals_q[q]}`` (no NaN)."""
    if len(vals_q) == 0:
        return np.zeros(0, dtype=np.int64)
    if len(vals_a) == 0:
        return np.zeros(len(vals_q), dtype=np.int64)
    _, inv = np.unique(np.concatenate([vals_a, vals_q]), return_inverse=True)
    span = np.int64(inv.max()) + 2
    key_a = np.sort(groups_a.astype(np.int64) * span + inv[: len(vals_a)])
    base = groups_q.astype(np.int64) * span
    hi = np.searchsorted(key_a, base + span, side="left")
    lo = np.searchsorted(key_a, base + inv[len(vals_a) :], side="left")
    return (hi - lo).astype(np.int64)


def _within_group_position(rows: np.ndarray, items: np.ndarray, vals: np.ndarray) -> np.ndarray:
    """Position of each entry in its row when sorted by (score desc, item index asc)."""
    if len(rows) == 0 or (len(rows) < 2 or np.all(rows[1:] != rows[:-1])):
        return np.zeros(len(rows), dtype=np.int64)
    order = np.lexsort((items, -vals.astype(np.float64), rows))
    pos = np.empty(len(rows), dtype=np.int64)
    sorted_rows = rows[order]
    starts = np.r_[0, np.flatnonzero(np.diff(sorted_rows)) + 1]
    run_start = np.repeat(starts, np.diff(np.r_[starts, len(rows)]))
    pos[order] = np.arange(len(rows)) - run_start
    return pos


def seen_flags(seen: sp.csr_matrix, rows: np.ndarray, items: np.ndarray, n_items: int) -> np.ndarray:
    """True where item ``items[k]`` is in row ``rows[k]`` of ``seen``."""
    if seen.nnz == 0 or len(rows) == 0:
        return np.zeros(len(rows), dtype=bool)
    seen_rows = np.repeat(np.arange(seen.shape[0], dtype=np.int64), np.diff(seen.indptr))
    keys = seen_rows * n_items + seen.indices  # ascending: canonical CSR
    query = rows.astype(np.int64) * n_items + items
    pos = np.minimum(np.searchsorted(keys, query), len(keys) - 1)
    return keys[pos] == query


def rank_heldout(
    block: np.ndarray,
    seen: sp.csr_matrix,
    truth: sp.csr_matrix,
    *,
    protocol=None,
    users: np.ndarray | None = None,
) -> BlockRanks:
    """Rank every held-out item of a block of users among that user's candidates.

    Tie rule (ties never favour the scorer): a relevant item ranks below every candidate
    with a strictly higher score and below every NON-relevant candidate with an equal
    score; relevant items tied with each other are ordered by item index. NaN scores
    read as ``-inf``. Held-out items seen in training get :data:`UNRANKED`. The block
    is never modified, so it may be a view of the caller's array.

    Parameters
    ----------
    block
        ``(b, n_items)`` real scores for ``b`` users, higher is better.
    seen
        ``(b, n_items)`` CSR; stored entries are the items each user interacted with in
        training, excluded from the candidates.
    truth
        ``(b, n_items)`` CSR; stored entries are the held-out (relevant) items.
    protocol
        :class:`~xrec.evaluate.FullRanking` (default, every unseen item is a candidate) or
        :class:`~xrec.evaluate.SampledNegatives`.
    users
        Global user index of each row; seeds the per-user negative sample so results do
        not depend on how users are chunked. Defaults to ``arange(b)``.

    Returns
    -------
    BlockRanks
    """
    from xrec.evaluate.protocols import FullRanking, SampledNegatives

    block = np.asarray(block)
    if block.ndim != 2:
        from xrec.errors import DataError

        raise DataError(f"score block must be 2-D (users × items), got shape {block.shape}")
    b, n = block.shape
    seen = canonical_rows(seen, b, n, "seen mask")
    truth = canonical_rows(truth, b, n, "held-out matrix")
    protocol = FullRanking() if protocol is None else protocol

    counts = np.diff(truth.indptr)
    rel_rows = np.repeat(np.arange(b, dtype=np.int64), counts)
    rel_items = truth.indices.astype(np.int64)
    rel_vals = _no_nan(block[rel_rows, rel_items])
    reach = ~seen_flags(seen, rel_rows, rel_items, n)
    ranks = np.full(len(rel_items), UNRANKED, dtype=np.int64)

    # Relevant items placed above each reachable relevant item (score desc, index asc).
    r_rows, r_items, r_vals = rel_rows[reach], rel_items[reach], rel_vals[reach]
    above_rel = _within_group_position(r_rows, r_items, r_vals)

    if isinstance(protocol, SampledNegatives):
        users = np.arange(b) if users is None else np.asarray(users)
        neg_rows, neg_items = protocol.sample(users, seen, truth, n)
        neg_vals = _no_nan(block[neg_rows, neg_items])
        above_neg = _group_count_at_least(neg_rows, neg_vals, r_rows, r_vals)
        ranks[reach] = 1 + above_neg + above_rel
        n_cand = np.bincount(neg_rows, minlength=b) + np.bincount(r_rows, minlength=b)
        return BlockRanks(truth.indptr.astype(np.int64), rel_items, ranks, n_cand.astype(np.int64))
    if not isinstance(protocol, FullRanking):
        from xrec.errors import ConfigError

        raise ConfigError(f"protocol must be FullRanking or SampledNegatives, got {type(protocol).__name__}")

    n_seen = np.diff(seen.indptr)
    n_cand = (n - n_seen).astype(np.int64)

    # For every reachable relevant item: candidates (unseen items) scoring >= it
    # (ge_cand) and reachable relevant items scoring >= it, itself included (ge_rel).
    # Then rank = 1 + (non-relevant candidates >= it) + (relevant items placed above it).
    ge_cand = np.zeros(len(r_rows), dtype=np.int64)
    ge_rel = np.zeros(len(r_rows), dtype=np.int64)
    r_counts = np.bincount(r_rows, minlength=b)
    heavy = r_counts > _SLOT_LIMIT
    slot = np.arange(len(r_rows)) - np.searchsorted(r_rows, r_rows, side="left")
    light = ~heavy[r_rows]
    floor = np.isneginf(r_vals)
    # Everything is >= -inf (NaN included, read as -inf).
    ge_cand[floor] = n_cand[r_rows[floor]]
    max_slot = int(slot[light].max()) + 1 if light.any() else 0
    threshold = np.empty(b, dtype=np.float64)
    for j in range(max_slot):
        sel = np.flatnonzero(light & (slot == j))
        if len(sel) == 0:
            continue
        rows = r_rows[sel]
        if max_slot > 1:
            # NaN threshold: rows without a slot-j item compare false everywhere.
            threshold[:] = np.nan
            threshold[rows] = r_vals[sel]
            hit = r_vals >= threshold[r_rows]
            ge_rel[sel] = np.bincount(r_rows, weights=hit, minlength=b)[rows].astype(np.int64)
        else:
            ge_rel[sel] = 1  # the only reachable relevant item of its row
        scan = sel[~floor[sel]]
        if len(scan):
            scan_rows = r_rows[scan]
            whole = len(scan_rows) == b  # ascending and unique, so this is 0..b-1
            ge_cand[scan] = count_at_least(block, None if whole else scan_rows, r_vals[scan], exclude=seen)
    for row in np.flatnonzero(heavy):
        sel = np.flatnonzero(r_rows == row)
        targets = r_vals[sel]
        keep = np.ones(n, dtype=bool)
        keep[seen.indices[seen.indptr[row] : seen.indptr[row + 1]]] = False
        sorted_cand = np.sort(_no_nan(block[row, keep]))
        sorted_rel = np.sort(targets)
        ge_cand[sel] = len(sorted_cand) - np.searchsorted(sorted_cand, targets, side="left")
        ge_rel[sel] = len(sorted_rel) - np.searchsorted(sorted_rel, targets, side="left")

    ranks[reach] = 1 + ge_cand - ge_rel + above_rel
    return BlockRanks(truth.indptr.astype(np.int64), rel_items, ranks, n_cand)


def _exact_top(values: np.ndarray, seen_cols: np.ndarray, k: int) -> np.ndarray:
    """Top ``k`` of one row by (score desc, index asc), seen items removed, NaN as -inf."""
    keep = np.ones(len(values), dtype=bool)
    keep[seen_cols] = False
    cand = np.flatnonzero(keep)
    vals = _no_nan(values[cand]).astype(np.float64)
    return cand[np.lexsort((cand, -vals))][:k]


def _select_top(
    x: np.ndarray,
    s_rows: np.ndarray,
    s_cols: np.ndarray,
    k: int,
    group: int,
    members: np.ndarray,
    valid: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Top ``k`` per row of ``x`` by strided-group thresholding (see :func:`top_k_items`).

    Returns the lists and a flag per row where the result is not proven exact (fewer than
    ``k`` unseen items reached the threshold, e.g. because seen items set group maxima).
    """
    m, n = x.shape
    n_groups = members.shape[0]
    width = n_groups * group
    out = np.full((m, k), -1, dtype=np.int64)
    # fmax skips NaN, so a group's maximum is NaN only when all of it is NaN.
    gmax = np.fmax.reduce(x[:, :width].reshape(m, group, n_groups), axis=1)
    if width < n:
        np.fmax(gmax[:, : n - width], x[:, width:], out=gmax[:, : n - width])
    if gmax.dtype.kind != "f":
        gmax = gmax.astype(np.float64)
    gmax[np.isnan(gmax)] = -np.inf
    v = np.partition(gmax, n_groups - k, axis=1)[:, n_groups - k]
    redo = np.isneginf(v)  # too few finite scores: NaN/-inf items may belong in the list
    g_rows, g_ids = np.nonzero((gmax >= v[:, None]) & ~redo[:, None])
    member_ok = valid[g_ids].ravel()
    cols = members[g_ids].ravel()[member_ok]
    rows = np.repeat(g_rows, members.shape[1])[member_ok]
    vals = x[rows, cols]
    ok = vals >= v[rows]
    rows, cols, vals = rows[ok], cols[ok], vals[ok]
    if len(s_cols):
        seen_keys = s_rows.astype(np.int64) * n + s_cols  # ascending: canonical CSR rows
        keys = rows.astype(np.int64) * n + cols
        at = np.minimum(np.searchsorted(seen_keys, keys), len(seen_keys) - 1)
        unseen = seen_keys[at] != keys
        rows, cols, vals = rows[unseen], cols[unseen], vals[unseen]
    # Exact only when k unseen items reach v: then no better item can be elsewhere.
    redo |= np.bincount(rows, minlength=m) < k
    order = np.lexsort((cols, -vals.astype(np.float64), rows))
    rows, cols = rows[order], cols[order]
    first = np.searchsorted(rows, np.arange(m), side="left")
    pos = np.arange(len(rows)) - first[rows]
    keep = (pos < k) & ~redo[rows]
    out[rows[keep], pos[keep]] = cols[keep]
    return out, redo


def top_k_items(block: np.ndarray, seen: sp.csr_matrix, k: int) -> np.ndarray:
    """The ``k`` best candidates per row, best first; ``-1`` pads rows with fewer candidates.

    Order is score descending, then item index ascending (deterministic); NaN reads as
    ``-inf``; seen items are never listed. The block is never modified.

    Rather than partitioning every row, items are split into ``G >= k`` strided groups
    (item ``j`` in group ``j mod G``); the k-th largest group maximum ``v`` bounds the
    list from below: when at least ``k`` unseen items score ``>= v``, the top ``k`` all
    lie among the items scoring ``>= v`` in the groups whose maximum reaches ``v``, and
    only those are sorted. Rows where seen items set the group maxima are redone on a
    copy with seen items at ``-inf``; rows with fewer than ``k`` finite scores are
    sorted whole. Exact under ties (every item tied at ``v`` is a candidate).
    """
    block = np.asarray(block)
    b, n = block.shape
    seen = canonical_rows(seen, b, n, "seen mask")
    out = np.full((b, k), -1, dtype=np.int64)
    if b == 0 or k == 0 or n == 0:
        return out
    group = max(1, min(16, n // (4 * k)))
    n_groups = n // group
    # Items past the last full group join groups 0.. as one extra member.
    tail = n - n_groups * group
    if tail > n_groups:
        group, n_groups, tail = 1, n, 0
    members = np.arange(n_groups)[:, None] + n_groups * np.arange(group + (tail > 0))
    valid = members < n
    members = np.minimum(members, n - 1)
    step = max(1, min(b, (_SCRATCH_BYTES * 4) // (n * block.dtype.itemsize)))
    float_dtype = block.dtype if block.dtype.kind == "f" else np.float64
    for start in range(0, b, step):
        stop = min(b, start + step)
        m = stop - start
        lo, hi = seen.indptr[start], seen.indptr[stop]
        s_rows = np.repeat(np.arange(m), np.diff(seen.indptr[start : stop + 1]))
        s_cols = seen.indices[lo:hi]
        if k >= n_groups:
            exact = np.ones(m, dtype=bool)
        else:
            out[start:stop], redo = _select_top(block[start:stop], s_rows, s_cols, k, group, members, valid)
            exact = np.zeros(m, dtype=bool)
            redo_rows = np.flatnonzero(redo)
            if len(redo_rows):
                x = np.array(block[start + redo_rows], dtype=float_dtype)
                sub = np.isin(s_rows, redo_rows)
                r_rows = np.searchsorted(redo_rows, s_rows[sub])
                x[r_rows, s_cols[sub]] = -np.inf
                lists, still = _select_top(x, np.zeros(0, np.int64), np.zeros(0, np.int64), k, group, members, valid)
                out[start + redo_rows] = lists
                exact[redo_rows[still]] = True
        for r in np.flatnonzero(exact):
            out[start + r] = -1
            best = _exact_top(block[start + r], s_cols[s_rows == r], k)
            out[start + r, : len(best)] = best
    return out
