"""Certified candidate mode: rank a blend on the union of each source's top-N items.

For very large catalogs the full-ranking evaluator scores every item for every user.
:func:`evaluate_candidates` instead asks each source for its exact top-N items per user
(an exhaustive inner-product search with ``faiss-cpu``, or chunked products and
``argpartition``), ranks the blend on the union of those lists (plus the held-out items),
and uses the bound of the Threshold Algorithm (Fagin, Lotem & Naor, "Optimal aggregation
algorithms for middleware", J. Comput. Syst. Sci. 66(4), 2003) to tell per held-out item
whether that rank is exact.

Why the bound holds. The blend is ``S(u, j) = Σ_s w_s · norm_s(raw_s(u, j))`` with
non-negative weights and normalizers that are increasing in the raw score (``"none"``,
``"zscore"``), so it is monotone in every source. An item outside the union is outside
every source's list, so ``raw_s(u, j) <= τ_s(u)``, the N-th best raw score of source ``s``;
hence ``S(u, j) <= T(u) = Σ_s w_s · norm_s(τ_s(u))``. When a held-out item scores above
``T(u)``, no item outside the union can be placed above it (nor tie with it), so its rank
among the union's candidates is its rank among all candidates: **certified**. Otherwise
the union rank is only a lower bound of the true rank.

The comparison is made with a margin for float32 rounding: the standard bound on a
computed dot product, ``|fl(x·y) − x·y| <= γ_d Σ|x_k y_k|`` with ``γ_d = d·u/(1 − d·u)``
and ``u = 2^-24`` (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed.,
2002, §3.1), bounded above by ``‖x‖·max_j‖y_j‖``, for the sources' searches and for the
blend's product.

The union's blended scores come from the same float32 product as the full ranking's
(:func:`xrec.evaluate._factor_blend.blend_product`, on a slice of the items), so a certified
rank equals the full-ranking rank bit for bit as long as the BLAS kernel sums each dot
product in the same order for both shapes, as OpenBLAS does here (tested on both backends).

Normalizer statistics stay exact: z-score moments come from the factors over all
candidates (see :mod:`xrec.evaluate._factor_blend`), never from the lists. Min-max and
rank normalizers need every item's score, so they are refused in this mode.

Metrics at a cut-off K are exact for a user when each held-out item is certified or its
lower bound already exceeds K (a true rank can only be larger, and neither counts); those
users are flagged ``exact@K``. Means are reported over certified (or exact) users only,
next to their share: a bound is never presented as a measurement.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp

from xrec.errors import ConfigError
from xrec.evaluate._chunked import check_problem, check_run_settings, rows_of, run_chunks
from xrec.evaluate._factor_blend import FactorBlend, blend_product
from xrec.evaluate._metrics import RANK_METRICS, metric_column, metrics_from_ranks
from xrec.evaluate._ranking import UNRANKED, BlockRanks, rank_heldout

BACKENDS = ("faiss", "numpy")
_UNIT = 2.0**-24  # float32 unit roundoff
# Users per step of the union scoring (bounds the users × union-items scratch).
_UNION_ROWS = 64
# Score-block budget of the numpy search.
_SEARCH_BYTES = 64 << 20


def _gamma(d: int) -> float:
    return d * _UNIT / (1.0 - d * _UNIT)


def top_n_items(
    user_rows: np.ndarray,
    item_factors: np.ndarray,
    n: int,
    backend: str = "faiss",
    *,
    seen: sp.csr_matrix | None = None,
    item_order: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Exact top-``n`` items by inner product ``user_rows @ item_factors.T`` per row.

    Every item is scored (an exhaustive search).

    Parameters
    ----------
    user_rows
        ``(b, d)`` float32 queries.
    item_factors
        ``(n_items, d)`` float32.
    n
        List length, ``1 <= n <= n_items``.
    backend
        ``"faiss"`` (``faiss.knn`` with the inner-product metric, over every item) or
        ``"numpy"`` (products in row steps, then :func:`xrec.evaluate.top_k_items`, which
        leaves out the ``seen`` items). Rank-1 factors (``d == 1``, e.g. popularity) take
        neither: the items sorted once give every user's list (seen items included).
    seen
        ``(b, n_items)`` CSR of items to leave out (numpy backend only); ``None``: none.
    item_order
        For rank-1 factors, ``argsort`` of the item factor (computed when not given).

    Returns
    -------
    ids, scores
        ``(b, n)`` int64 item indices and their float32 scores; ``-1`` ids (score ``-inf``)
        pad a row that has fewer than ``n`` items left.
    """
    from xrec.evaluate._ranking import top_k_items

    user_rows = np.ascontiguousarray(user_rows, dtype=np.float32)
    item_factors = np.ascontiguousarray(item_factors, dtype=np.float32)
    b, d = user_rows.shape
    if d == 1:
        v = item_factors[:, 0]
        order = np.argsort(v, kind="stable") if item_order is None else item_order
        up, down = order[::-1][:n], order[:n]
        ids = np.where(user_rows >= 0, up[None, :], down[None, :]).astype(np.int64)
        return ids, (user_rows * v[ids]).astype(np.float32)
    if backend == "faiss":
        import faiss

        scores, ids = faiss.knn(user_rows, item_factors, n, metric=faiss.METRIC_INNER_PRODUCT)
        return ids.astype(np.int64), scores.astype(np.float32)
    if seen is None:
        seen = sp.csr_matrix((b, len(item_factors)), dtype=np.float32)
    step = max(1, _SEARCH_BYTES // (4 * len(item_factors)))
    ids = np.empty((b, n), dtype=np.int64)
    scores = np.empty((b, n), dtype=np.float32)
    for lo in range(0, b, step):
        block = user_rows[lo : lo + step] @ item_factors.T
        part = top_k_items(block, seen[lo : lo + step], n)
        ids[lo : lo + step] = part
        scores[lo : lo + step] = np.where(part >= 0, np.take_along_axis(block, np.maximum(part, 0), axis=1), -np.inf)
    return ids, scores


@dataclass
class CandidateEvaluation:
    """Result of :func:`evaluate_candidates`.

    Attributes
    ----------
    per_user
        One row per evaluated user: ``user``, ``certified`` (every held-out rank exact),
        ``exact@K`` per cut-off (metrics at K exact), and ``metric@K`` columns computed
        from the union ranks — exact where flagged, **upper bounds** elsewhere.
    ranks
        One row per held-out item: ``user``, ``item``, ``rank`` (exact when ``certified``,
        else a lower bound; :data:`~xrec.evaluate.UNRANKED` for items seen in training),
        ``certified``, ``union_size`` (candidates ranked for that user).
    ks, top_n, n_items, backend, name
        Settings of the run (``backend`` ``"screen"`` and ``top_n`` 0 for
        :func:`~xrec.evaluate.evaluate_screened`, whose ``union_size`` counts the items
        scored for the user).
    settings
        Further counts of the run (the screen's lists, probes and users ranked in full).
    """

    per_user: pd.DataFrame
    ranks: pd.DataFrame
    ks: tuple[int, ...]
    top_n: int
    n_items: int
    backend: str
    name: str = "blend"
    settings: dict = field(default_factory=dict)

    @property
    def certified_share(self) -> float:
        """Share of evaluated users whose every held-out rank is certified exact."""
        return float(self.per_user["certified"].mean())

    def exact_share(self, k: int) -> float:
        """Share of users whose metrics at cut-off ``k`` are exact."""
        return float(self.per_user[f"exact@{k}"].mean())

    def summary(self) -> pd.DataFrame:
        """Per metric column: means over certified users and over users exact at its K, with shares.

        Columns ``certified_mean``, ``certified_share``, ``exact_mean``, ``exact_share``;
        when ``exact_share`` is 1 the ``exact_mean`` equals the full-ranking mean.
        """
        cert = self.per_user["certified"].to_numpy()
        rows = {}
        for col in self.per_user.columns:
            if "@" not in col or col.startswith("exact@"):
                continue
            k = int(col.rpartition("@")[2])
            exact = self.per_user[f"exact@{k}"].to_numpy()
            values = self.per_user[col].to_numpy()
            rows[col] = {
                "certified_mean": float(values[cert].mean()) if cert.any() else float("nan"),
                "certified_share": float(cert.mean()),
                "exact_mean": float(values[exact].mean()) if exact.any() else float("nan"),
                "exact_share": float(exact.mean()),
            }
        return pd.DataFrame.from_dict(rows, orient="index")


def _max_row_norm(rows: np.ndarray) -> float:
    """Largest Euclidean row norm, in steps of rows (no float64 copy of a large factor matrix)."""
    best = 0.0
    for lo in range(0, len(rows), 1 << 16):
        part = np.asarray(rows[lo : lo + (1 << 16)], dtype=np.float64)
        best = max(best, float(np.sqrt(np.einsum("ij,ij->i", part, part).max(initial=0.0))))
    return best


def _check_top_n(top_n: object, n_items: int) -> int:
    if isinstance(top_n, bool) or not isinstance(top_n, (int, np.integer)) or top_n < 1:
        raise ConfigError(f"top_n must be a positive int, got {top_n!r}")
    return int(min(top_n, n_items))


def _membership(keys_sorted: np.ndarray, query: np.ndarray) -> np.ndarray:
    if len(keys_sorted) == 0:
        return np.zeros(len(query), dtype=bool)
    pos = np.minimum(np.searchsorted(keys_sorted, query), len(keys_sorted) - 1)
    return keys_sorted[pos] == query


def _unique(a: np.ndarray) -> np.ndarray:
    """Sorted unique values (by sorting: numpy's hash-based ``unique`` is slow on these keys)."""
    a = np.sort(a)
    return a[np.r_[True, a[1:] != a[:-1]]] if len(a) else a


def _union_ranks(
    blend: FactorBlend, chunk: np.ndarray, slopes: dict, lists: list[np.ndarray], seen: sp.csr_matrix, truth: sp.csr_matrix
) -> tuple[BlockRanks, np.ndarray, np.ndarray]:
    """Ranks of the held-out items among the union's candidates, their blended scores and union sizes."""
    b, n = truth.shape
    rows = [np.repeat(np.arange(b, dtype=np.int64), lst.shape[1]) for lst in lists]
    t_rows = np.repeat(np.arange(b, dtype=np.int64), np.diff(truth.indptr))
    listed = [r * n + lst.ravel() for r, lst in zip(rows, lists)]
    keys = _unique(np.concatenate([k[lst.ravel() >= 0] for k, lst in zip(listed, lists)] + [t_rows * n + truth.indices]))
    u_rows, u_items = keys // n, keys % n
    counts = np.bincount(u_rows, minlength=b)
    starts = np.r_[0, np.cumsum(counts)]
    width = int(counts.max())
    pos = np.arange(len(keys)) - starts[u_rows]
    # Blended scores of the union items, through the same product as the full ranking.
    values = np.empty(len(keys), dtype=np.float32)
    user_side = blend.user_side(chunk, slopes)
    for lo in range(0, b, _UNION_ROWS):
        hi = min(b, lo + _UNION_ROWS)
        sel = slice(starts[lo], starts[hi])
        cols = _unique(u_items[sel])
        inv = np.searchsorted(cols, u_items[sel])
        sub = blend_product(user_side[lo:hi], blend.item_side[cols])
        values[sel] = sub[u_rows[sel] - lo, inv]
    block = np.full((b, width), -np.inf, dtype=np.float32)
    block[u_rows, pos] = values
    seen_keys = np.repeat(np.arange(b, dtype=np.int64), np.diff(seen.indptr)) * n + seen.indices
    is_seen = _membership(seen_keys, keys)
    pad = np.ones((b, width), dtype=bool)
    pad[u_rows, pos] = False
    pad[u_rows[is_seen], pos[is_seen]] = True
    seen_c = sp.csr_matrix(pad.astype(np.float32))
    seen_c.sum_duplicates()
    t_pos = np.searchsorted(keys, t_rows * n + truth.indices) - starts[t_rows]
    truth_c = sp.csr_matrix((np.ones(len(t_pos), dtype=np.float32), t_pos, truth.indptr.copy()), shape=(b, width))
    ranks = rank_heldout(block, seen_c, truth_c)
    return ranks, block[t_rows, t_pos], counts


def evaluate_candidates(
    sources: Mapping[str, Any],
    weights: Mapping[str, float],
    seen: sp.spmatrix,
    truth: sp.spmatrix,
    *,
    normalizers: str | Mapping[str, str] = "zscore",
    top_n: int = 100,
    backend: str = "faiss",
    users: np.ndarray | None = None,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = RANK_METRICS,
    chunk_size: int = 2048,
    threads: int | None = None,
    name: str = "blend",
    progress: bool = False,
) -> CandidateEvaluation:
    """Evaluate a blend on the union of its sources' top-N lists, certifying exact ranks per user.

    See the module notes for the Threshold Algorithm bound. The same blend evaluated by
    :func:`evaluate_blend_chunked` gives the same rank (and metrics) for every certified
    held-out item, since both score items through one product.

    Parameters
    ----------
    sources
        Name -> fitted low-rank source (``user_factors_``, ``item_factors_``).
    weights
        Name -> weight >= 0, one per source, at least one positive.
    seen, truth
        Sparse training and held-out matrices, users × items.
    normalizers
        ``"zscore"`` (default) or ``"none"``, for all or per source; ``"minmax"`` and
        ``"rank"`` raise :class:`~xrec.errors.ConfigError` (their statistics need every score).
    top_n
        List length per source and user (capped at the number of items).
    backend
        ``"faiss"`` or ``"numpy"`` for the exhaustive top-N search (see :func:`top_n_items`).
    users, ks, metrics, threads, name, progress
        As in :func:`evaluate_blend_chunked` (faiss and BLAS run at one thread per worker).
    chunk_size
        Users searched together.

    Returns
    -------
    CandidateEvaluation
    """
    ks, metrics, threads = check_run_settings(ks, metrics, threads)
    if backend not in BACKENDS:
        raise ConfigError(f"backend must be one of {list(BACKENDS)}, got {backend!r}")
    if backend == "faiss":
        try:
            import faiss  # noqa: F401
        except ImportError as exc:  # pragma: no cover - faiss-cpu is a dependency
            raise ConfigError("backend 'faiss' needs the faiss-cpu package (pip install faiss-cpu); or use 'numpy'") from exc
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        blend = FactorBlend(sources, weights, normalizers, allow_blocks=False)
    seen, truth, users = check_problem(seen, truth, users, blend.item_side.shape[0])
    n_items = truth.shape[1]
    top_n = _check_top_n(top_n, n_items)
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        raise ConfigError(f"chunk_size must be a positive int, got {chunk_size!r}")
    max_norm = {n: _max_row_norm(blend.factors(n)[1]) for n in blend.linear}
    dims = {n: blend.factors(n)[1].shape[1] for n in blend.linear}
    total_dim = blend.item_side.shape[1]
    orders = {n: np.argsort(blend.factors(n)[1][:, 0], kind="stable") for n in blend.linear if dims[n] == 1}

    def work(lo: int, hi: int) -> dict[str, np.ndarray]:
        chunk = users[lo:hi]
        seen_rows, truth_rows = rows_of(seen, chunk), rows_of(truth, chunk)
        slopes = blend.slopes(chunk, seen_rows)
        norms = blend.user_norms(chunk)
        lists, threshold, margin = [], np.zeros(len(chunk)), np.zeros(len(chunk))
        for name_s in blend.linear:
            u_s, v_s = blend.factors(name_s)
            ids, scores = top_n_items(u_s[chunk], v_s, top_n, backend, seen=seen_rows, item_order=orders.get(name_s))
            lists.append(ids)
            if top_n == n_items:  # every item is listed: nothing lies outside the union
                threshold[:] = -np.inf
                continue
            # A padded row lists every unseen item: nothing unseen lies outside (bound -inf).
            tau = scores.min(axis=1).astype(np.float64)
            threshold += np.multiply(slopes[name_s], tau, out=np.zeros(len(chunk)), where=slopes[name_s] > 0)
            margin += slopes[name_s] * norms[name_s] * max_norm[name_s] * (_gamma(dims[name_s]) + _gamma(total_dim) + 2 * _UNIT)
        ranks, target, union_size = _union_ranks(blend, chunk, slopes, lists, seen_rows, truth_rows)
        row_of = ranks.row_of
        certified = (ranks.ranks == UNRANKED) | (target.astype(np.float64) > threshold[row_of] + 2.0 * margin[row_of])
        out = metrics_from_ranks(ranks, ks, metrics)
        out["certified"] = np.bincount(row_of, weights=~certified, minlength=len(chunk)) == 0
        for k in ks:
            out[f"exact@{k}"] = np.bincount(row_of, weights=~(certified | (ranks.ranks > k)), minlength=len(chunk)) == 0
        out["_user"], out["_item"], out["_rank"], out["_cert"] = chunk[row_of], truth_rows.indices, ranks.ranks, certified
        out["_size"] = union_size[row_of]
        return out

    parts = run_chunks(work, len(users), int(chunk_size), threads, name, progress)
    per_user, ranks = collect_parts(parts, users, ks, metrics)
    return CandidateEvaluation(per_user, ranks, ks, top_n, n_items, backend, name)


def collect_parts(parts: list[dict], users: np.ndarray, ks: tuple[int, ...], metrics: tuple[str, ...]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Per-user and per-held-out-item frames of a candidate run from its chunks' outputs."""
    columns: dict[str, np.ndarray] = {"user": users, "certified": np.concatenate([p["certified"] for p in parts])}
    for k in ks:
        columns[f"exact@{k}"] = np.concatenate([p[f"exact@{k}"] for p in parts])
    for m in metrics:
        for k in ks:
            col = metric_column(m, k)
            columns[col] = np.concatenate([p[col] for p in parts])
    ranks = pd.DataFrame(
        {
            "user": np.concatenate([p["_user"] for p in parts]),
            "item": np.concatenate([p["_item"] for p in parts]),
            "rank": np.concatenate([p["_rank"] for p in parts]),
            "certified": np.concatenate([p["_cert"] for p in parts]),
            "union_size": np.concatenate([p["_size"] for p in parts]),
        }
    )
    return pd.DataFrame(columns), ranks
