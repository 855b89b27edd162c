"""Screened candidate mode: exact metrics at K with most users never fully ranked.

A metric at cut-off K needs a held-out item's exact rank only when that rank is at most K.
:func:`evaluate_screened` uses this. The blend of low-rank sources with ``"none"`` or
``"zscore"`` normalizers is one inner product ``q_u · x_j`` (see
:mod:`xrec.evaluate._factor_blend`; popularity is a rank-1 source, so it is one more
column of ``x_j``). The items are grouped once into lists by k-means (``faiss.Kmeans``,
seeded) on the blended item vectors. For each user, a few lists whose centroids score
highest are scanned with one matrix product per list for all users probing it, and the
unseen items scoring clearly above each held-out item are counted: the **witnesses**.
Users still short of witnesses get rounds of four times more lists (up to a quarter of
them) before they are ranked in full.

Why this is exact. A witness ``j`` scores above the held-out item ``t`` in the full
ranking too, whatever the rounding: every float32 dot product here (the scan's, the
held-out item's float64 one, the full ranking's) lies within
``δ_u = γ_D · ‖q_u‖ · max_j ‖x_j‖`` of the exact real value, with ``γ_D = D·u/(1 − D·u)``,
``u = 2^-24`` (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002,
§3.1), so a scanned score above ``s_t + 4δ_u`` is strictly above ``t`` in the full ranking
(and ties never arise). Hence ``rank(t) >= 1 + witnesses``: a count of real items, not a
bound computed from scores of unseen items. When every held-out item of a user has at
least ``max(ks)`` witnesses, all of that user's metrics at every K are exactly 0. Seen
items are no candidates: those lying in a scanned list and possibly counted are
subtracted (with the same margin, so the count stays a lower bound).

Every other user (some held-out item with fewer witnesses: in practice the users whose
held-out item really ranks near the top) is ranked in full, by the very product and
counting core of :func:`~xrec.evaluate.evaluate_blend_chunked`, so their ranks and metrics
equal it bit for bit (tested). Every user's metrics are therefore exact; ranks are exact
(``certified``) for the fully ranked users and lower bounds above ``max(ks)`` for the
others. No Threshold Algorithm bound is used here: certification comes from the witness
count, and the lists only decide how cheaply witnesses are found (better clusters mean
fewer users ranked in full, never a different answer).
"""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_limits

from xrec._validation import check_int
from xrec.evaluate._chunked import DEFAULT_BLOCK_BYTES, check_problem, check_run_settings, rows_of, run_chunks
from xrec.evaluate._factor_blend import FactorBlend, blend_product
from xrec.evaluate._metrics import RANK_METRICS, metrics_from_ranks
from xrec.evaluate._ranking import UNRANKED, BlockRanks, rank_heldout

_UNIT = 2.0**-24  # float32 unit roundoff
# Item rows per step when assigning items to lists.
_ASSIGN_STEP = 1 << 16
# Training points per list for k-means (faiss subsamples to this many).
_POINTS_PER_LIST = 64
# (entry, seen item) pairs scored together in the seen-item correction.
_PAIR_STEP = 1 << 16
# Users sampled to set the typical per-source slope used to shape the clustering space.
_SLOPE_SAMPLE = 2000


class ItemLists:
    """Items of a blend grouped into lists by seeded k-means, for screening.

    The clustering uses all ``D`` dimensions: on the generated catalogs, clustering the
    leading 32 or 64 principal components instead left seven times more users to be ranked
    in full (the directions that decide a user's top items are not the high-variance ones).
    The lists only steer the screen; they never change a result.

    Parameters
    ----------
    item_side
        ``(n_items, D)`` float32 blended item vectors.
    n_lists
        Number of lists (capped at the number of items).
    scale
        ``(D,)`` positive column weights: clustering runs on ``item_side * scale`` (the
        geometry of a typical user's query); centroids are mapped back to ``item_side``.
    seed
        Seed of the k-means initialisation and subsample.

    Attributes
    ----------
    centroids
        ``(n_lists, D)`` float32, in the ``item_side`` space.
    order, starts
        Item indices sorted by list, and each list's offset into ``order``.
    assign
        ``(n_items,)`` list of each item.
    """

    def __init__(self, item_side: np.ndarray, n_lists: int, scale: np.ndarray, seed: int = 0) -> None:
        import faiss

        n, d = item_side.shape
        n_lists = min(n_lists, n)
        scale = scale.astype(np.float32)
        rng = np.random.default_rng(seed)
        sample = np.sort(rng.choice(n, size=min(n, n_lists * _POINTS_PER_LIST), replace=False))
        kmeans = faiss.Kmeans(d, n_lists, niter=10, seed=int(seed), max_points_per_centroid=_POINTS_PER_LIST, verbose=False)
        kmeans.train(np.ascontiguousarray(item_side[sample] * scale))
        assign = np.empty(n, dtype=np.int64)
        for lo in range(0, n, _ASSIGN_STEP):
            part = np.ascontiguousarray(item_side[lo : lo + _ASSIGN_STEP] * scale)
            assign[lo : lo + _ASSIGN_STEP] = kmeans.index.search(part, 1)[1][:, 0]
        self.assign = assign
        self.order = np.argsort(assign, kind="stable")
        self.starts = np.searchsorted(assign[self.order], np.arange(n_lists + 1))
        self.centroids = np.ascontiguousarray(kmeans.centroids / scale, dtype=np.float32)

    @property
    def n_lists(self) -> int:
        """Number of lists."""
        return len(self.centroids)

    def items(self, lst: int) -> np.ndarray:
        """Item indices of list ``lst``."""
        return self.order[self.starts[lst] : self.starts[lst + 1]]


def _clustering_scale(blend: FactorBlend, seen: sp.csr_matrix, users: np.ndarray, seed: int) -> np.ndarray:
    """Per-column weight: each source's median slope ``w_s · a_us`` over a seeded user sample."""
    rng = np.random.default_rng(seed)
    sample = np.sort(rng.choice(users, size=min(len(users), _SLOPE_SAMPLE), replace=False))
    slopes = blend.slopes(sample, rows_of(seen, sample))
    parts = []
    for name in blend.linear:
        s = float(np.median(slopes[name]))
        parts.append(np.full(blend.factors(name)[1].shape[1], s if s > 0 else 1.0))
    return np.concatenate(parts)


def _ragged_ranges(starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Concatenation of ``arange(starts[i], starts[i] + counts[i])``."""
    total = int(counts.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    offsets = np.repeat(starts - np.r_[0, np.cumsum(counts)[:-1]], counts)
    return np.arange(total, dtype=np.int64) + offsets


def witness_counts(
    queries: np.ndarray,
    item_side: np.ndarray,
    lists: ItemLists,
    probes: np.ndarray,
    entry_row: np.ndarray,
    threshold: np.ndarray,
) -> np.ndarray:
    """Per held-out entry, items in its user's probed lists scoring above ``threshold``.

    Parameters
    ----------
    queries
        ``(b, D)`` float32 user side of the block.
    item_side
        ``(n_items, D)`` float32.
    lists
        The item lists.
    probes
        ``(b, p)`` lists scanned per user.
    entry_row
        Row of each entry (held-out item) in ``queries``.
    threshold
        Per entry: scores strictly above it are counted.

    Returns
    -------
    np.ndarray
        int64 counts (seen items not yet removed).
    """
    p = probes.shape[1]
    flat_list = probes[entry_row].ravel()
    flat_entry = np.repeat(np.arange(len(entry_row)), p)
    by_list = np.argsort(flat_list, kind="stable")
    flat_list, flat_entry = flat_list[by_list], flat_entry[by_list]
    bounds = np.searchsorted(flat_list, np.arange(lists.n_lists + 1))
    counts = np.zeros(len(entry_row), dtype=np.int64)
    # float32 thresholds rounded up, so a float32 score above one is above ``threshold`` too.
    thr32 = np.asarray(threshold).astype(np.float32)
    thr32 = np.where(thr32 < threshold, np.nextafter(thr32, np.float32(np.inf)), thr32)
    for lst in np.flatnonzero(np.diff(bounds)):
        ents = flat_entry[bounds[lst] : bounds[lst + 1]]
        items = item_side[lists.items(lst)]
        scores = blend_product(queries[entry_row[ents]], items)
        counts[ents] += np.count_nonzero(scores > thr32[ents, None], axis=1)
    return counts


def _probe_rounds(probes: int, n_lists: int) -> list[int]:
    """Probes per round: ``probes``, then four times more while at most a quarter of the lists."""
    out = [probes]
    while out[-1] * 4 <= n_lists // 4:
        out.append(out[-1] * 4)
    return out


def _top_lists(cent: np.ndarray, p: int) -> np.ndarray:
    """``(b, p)`` lists with the highest centroid scores per row."""
    if p >= cent.shape[1]:
        return np.tile(np.arange(cent.shape[1]), (len(cent), 1))
    return np.argpartition(-cent, p - 1, axis=1)[:, :p]


def _witnesses(
    queries: np.ndarray,
    item_side: np.ndarray,
    lists: ItemLists,
    top: np.ndarray,
    entry_row: np.ndarray,
    held: np.ndarray,
    delta: np.ndarray,
    seen: sp.csr_matrix,
) -> np.ndarray:
    """Witnesses of each entry: unseen items in its row's ``top`` lists scoring above ``held + 4δ``.

    Seen items are no candidates: any that may have been counted (scored above ``held + 2δ``
    in float64) is removed, so the count stays a lower bound.
    """
    count = witness_counts(queries, item_side, lists, top, entry_row, held + 4.0 * delta)
    n_seen = np.diff(seen.indptr)
    pair_e = np.repeat(np.arange(len(entry_row)), n_seen[entry_row])
    s_item = seen.indices[_ragged_ranges(seen.indptr[entry_row], n_seen[entry_row])].astype(np.int64)
    probed = np.zeros((len(top), lists.n_lists), dtype=bool)
    probed[np.arange(len(top))[:, None], top] = True
    scanned = probed[entry_row[pair_e], lists.assign[s_item]]
    pair_e, s_item = pair_e[scanned], s_item[scanned]
    s_score = np.empty(len(pair_e))
    for lo in range(0, len(pair_e), _PAIR_STEP):  # bounded scratch: a step of pairs × D
        sel = slice(lo, lo + _PAIR_STEP)
        s_score[sel] = np.einsum("ed,ed->e", queries[entry_row[pair_e[sel]]], item_side[s_item[sel]], dtype=np.float64)
    drop = s_score > held[pair_e] + 2.0 * delta[pair_e]
    return count - np.bincount(pair_e[drop], minlength=len(entry_row))


def evaluate_screened(
    sources: Mapping[str, Any],
    weights: Mapping[str, float],
    seen: sp.spmatrix,
    truth: sp.spmatrix,
    *,
    normalizers: str | Mapping[str, str] = "zscore",
    n_lists: int | None = None,
    probes: int = 4,
    users: np.ndarray | None = None,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = RANK_METRICS,
    chunk_size: int = 16384,
    threads: int | None = None,
    seed: int = 0,
    name: str = "blend",
    progress: bool = False,
):
    """Exact metrics at K of a blend, ranking in full only the users a screen cannot settle.

    See the module notes: witnesses found in a few k-means lists prove a held-out rank
    above ``max(ks)``; the users left are ranked in full exactly as
    :func:`~xrec.evaluate.evaluate_blend_chunked` does.

    Parameters
    ----------
    sources, weights, seen, truth, normalizers
        As in :func:`~xrec.evaluate.evaluate_candidates` (low-rank sources, ``"none"`` or
        ``"zscore"``; others raise :class:`~xrec.errors.ConfigError`).
    n_lists
        Item lists of the screen; default ``round(sqrt(n_items) / 2)`` (500 lists of about
        2,000 items for 10^6 items: building them costs one product of the items with
        the centroids).
    probes
        Lists scanned per user in the first round (the highest-scoring centroids); users
        still short of witnesses get rounds of four times more probes, up to a quarter of
        the lists, before they are ranked in full.
    users, ks, metrics, threads, name, progress
        As in :func:`~xrec.evaluate.evaluate_blend_chunked`.
    chunk_size
        Users screened together: more users per list product is faster BLAS, and the
        screen's scratch is small (users × list size); users ranked in full go through
        blocks of about 64 MiB.
    seed
        Seed of the k-means lists and of the user sample that shapes them.

    Returns
    -------
    CandidateEvaluation
        ``certified`` marks users whose ranks are exact (ranked in full); ``exact@K`` is
        true for every user (the metrics are exact); ``union_size`` is the number of items
        scored for that user. ``settings`` holds the screen's counts and ``lists_s``, the seconds spent building
        the lists (a cost per catalog, not per user).
    """
    from xrec.evaluate._candidates import CandidateEvaluation, collect_parts

    ks, metrics, threads = check_run_settings(ks, metrics, threads)
    with threadpool_limits(1):
        blend = FactorBlend(sources, weights, normalizers, allow_blocks=False)
    seen, truth, users = check_problem(seen, truth, users, blend.item_side.shape[0])
    n_items, dim = blend.item_side.shape
    n_lists = check_int(n_lists if n_lists is not None else max(1, round(np.sqrt(n_items) / 2)), "n_lists", low=1)
    probes = min(check_int(probes, "probes", low=1), n_lists, n_items)
    chunk_size = check_int(chunk_size, "chunk_size", low=1)
    item_side = blend.item_side
    started = time.perf_counter()
    with threadpool_limits(1):
        lists = ItemLists(item_side, n_lists, _clustering_scale(blend, seen, users, seed), seed)
    probes = min(probes, lists.n_lists)
    lists_s = time.perf_counter() - started
    max_norm = float(np.sqrt(np.max(np.einsum("ij,ij->i", item_side, item_side, dtype=np.float64), initial=0.0)))
    gamma = dim * _UNIT / (1.0 - dim * _UNIT)
    need = max(ks)
    full_rows = max(1, DEFAULT_BLOCK_BYTES // (4 * n_items))

    def work(lo: int, hi: int) -> dict[str, np.ndarray]:
        chunk = users[lo:hi]
        seen_rows, truth_rows = rows_of(seen, chunk), rows_of(truth, chunk)
        queries = blend.user_side(chunk, blend.slopes(chunk, seen_rows))
        delta = gamma * np.linalg.norm(queries.astype(np.float64), axis=1) * max_norm
        e_row = np.repeat(np.arange(len(chunk)), np.diff(truth_rows.indptr))
        e_item = truth_rows.indices.astype(np.int64)
        held = np.einsum("ed,ed->e", queries[e_row], item_side[e_item], dtype=np.float64)
        is_seen = np.asarray(seen_rows[e_row, e_item]).ravel() != 0
        cent = blend_product(queries, lists.centroids)
        count = np.zeros(len(e_row), dtype=np.int64)
        scanned_items = np.zeros(len(chunk), dtype=np.int64)
        # Rounds of more probes for the entries still short of witnesses.
        todo = np.flatnonzero(~is_seen)
        for p in _probe_rounds(probes, lists.n_lists):
            if not len(todo):
                break
            rows = np.unique(e_row[todo])
            top = _top_lists(cent[rows], p)
            slot = np.searchsorted(rows, e_row[todo])
            count[todo] = _witnesses(queries[rows], item_side, lists, top, slot, held[todo], delta[e_row[todo]], seen_rows[rows])
            scanned_items[rows] = lists.starts[top + 1].sum(axis=1) - lists.starts[top].sum(axis=1)
            todo = todo[count[todo] < need]
        settled_e = is_seen | (count >= need)
        ranks = np.where(is_seen, UNRANKED, count + 1).astype(np.int64)
        exact = is_seen.copy()
        settled = np.bincount(e_row, weights=~settled_e, minlength=len(chunk)) == 0
        open_rows = np.flatnonzero(~settled)
        for a in range(0, len(open_rows), full_rows):
            rows = open_rows[a : a + full_rows]
            block = blend_product(queries[rows], item_side)
            part = rank_heldout(block, seen_rows[rows], truth_rows[rows])
            ents = _ragged_ranges(truth_rows.indptr[rows], np.diff(truth_rows.indptr)[rows])
            ranks[ents] = part.ranks
            exact[ents] = True
        block_ranks = BlockRanks(truth_rows.indptr.astype(np.int64), e_item, ranks, (n_items - np.diff(seen_rows.indptr)).astype(np.int64))
        out = metrics_from_ranks(block_ranks, ks, metrics)
        out["certified"] = np.bincount(e_row, weights=~exact, minlength=len(chunk)) == 0
        for k in ks:
            out[f"exact@{k}"] = np.ones(len(chunk), dtype=bool)
        out["_user"], out["_item"], out["_rank"], out["_cert"] = chunk[e_row], e_item, ranks, exact
        scored = np.where(settled, scanned_items, n_items)
        out["_size"] = scored[e_row]
        return out

    parts = run_chunks(work, len(users), chunk_size, threads, name, progress)
    per_user, ranks = collect_parts(parts, users, ks, metrics)
    ranked = int(per_user["certified"].sum())
    settings = {"n_lists": lists.n_lists, "probes": probes, "settled_by_witnesses": len(users) - ranked, "ranked_in_full": ranked, "lists_s": lists_s}
    return CandidateEvaluation(per_user, ranks, ks, 0, n_items, "screen", name, settings)
