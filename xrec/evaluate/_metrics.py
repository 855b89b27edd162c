"""Per-user ranking metrics from held-out ranks, and top-K list metrics."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from xrec._validation import is_int
from xrec.errors import ConfigError
from xrec.evaluate._ranking import BlockRanks

#: Metrics computed from held-out ranks (one value per user).
RANK_METRICS = ("hit_rate", "ndcg", "recall", "mrr")
#: Metrics computed from each user's top-K list.
LIST_METRICS = ("coverage", "popularity")
ALL_METRICS = RANK_METRICS + LIST_METRICS


def check_ks(ks: Sequence[int] | int) -> tuple[int, ...]:
    """Cut-offs as a sorted tuple of distinct positive ints; ``ConfigError`` otherwise."""
    if isinstance(ks, (int, np.integer)):
        ks = (ks,)
    ks = tuple(ks)
    bad = [k for k in ks if not is_int(k) or k <= 0]
    if not ks or bad:
        raise ConfigError(f"ks must be positive integers, got bad value(s) {bad or list(ks)}")
    return tuple(sorted({int(k) for k in ks}))


def check_cutoffs(ks: Sequence[int] | int, n_items: int, field: str = "ks") -> tuple[int, ...]:
    """``ks`` checked by :func:`check_ks` and bounded by the catalog: sorted, distinct, ``<= n_items``.

    A top-K list cannot be longer than the catalog, so a cut-off above ``n_items`` is
    refused (never clamped) with a :class:`ConfigError` naming ``field``; callers check
    before any ``(users, K)`` array is made.
    """
    try:
        ks = check_ks(ks)
    except ConfigError as exc:
        raise ConfigError(f"{field}: {exc}") from None
    too_big = [k for k in ks if k > n_items]
    if too_big:
        raise ConfigError(
            f"{field}: cut-off(s) {too_big} exceed the catalog's {n_items} items; a top-K list cannot be longer than the catalog"
        )
    return ks


def check_metrics(metrics: Sequence[str] | str) -> tuple[str, ...]:
    """Known metric names, deduplicated in order; ``ConfigError`` for unknown names or none."""
    if isinstance(metrics, str):
        metrics = (metrics,)
    unknown = [m for m in metrics if m not in ALL_METRICS]
    if unknown:
        raise ConfigError(f"unknown metric name(s) {unknown}; known: {list(ALL_METRICS)}")
    if not metrics:
        raise ConfigError("metrics is empty; pick from " + str(list(ALL_METRICS)))
    return tuple(dict.fromkeys(metrics))


def metric_column(metric: str, k: int) -> str:
    return f"{metric}@{k}"


def metrics_from_ranks(ranks: BlockRanks, ks: Sequence[int], metrics: Sequence[str] = RANK_METRICS) -> dict[str, np.ndarray]:
    """Per-row hit rate, NDCG, recall and MRR at every K.

    Definitions (binary relevance, ``rel`` = the row's held-out items, ``rank`` 1-based):

    * ``hit_rate@K`` = 1 if any relevant item has rank <= K else 0;
    * ``ndcg@K`` = sum over relevant items with rank <= K of ``1/log2(rank+1)``, divided by
      the same sum for the ideal list, ``sum_{j=1}^{min(|rel|, K)} 1/log2(j+1)``;
    * ``recall@K`` = (relevant items with rank <= K) / |rel| (no ``min(K, |rel|)`` cap);
    * ``mrr@K`` = 1 / rank of the best relevant item if that rank <= K, else 0.

    Rows without relevant items get NaN.

    Returns
    -------
    dict
        ``"metric@K"`` -> float64 array of length ``ranks.n_rows``.
    """
    b = ranks.n_rows
    n_rel = ranks.n_relevant
    row_of = ranks.row_of
    r = ranks.ranks
    has = n_rel > 0
    out: dict[str, np.ndarray] = {}
    kmax = max(ks) if len(ks) else 0
    ideal = np.r_[0.0, np.cumsum(1.0 / np.log2(np.arange(2, kmax + 2)))]
    best = np.full(b, np.iinfo(np.int64).max, dtype=np.int64)
    if len(r):
        np.minimum.at(best, row_of, r)
    rf = r.astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        for k in ks:
            hit = r <= k
            n_hit = np.bincount(row_of, weights=hit, minlength=b)
            for m in metrics:
                if m == "hit_rate":
                    v = (n_hit > 0).astype(np.float64)
                elif m == "recall":
                    v = n_hit / n_rel
                elif m == "ndcg":
                    gain = np.zeros(len(r))
                    gain[hit] = 1.0 / np.log2(rf[hit] + 1.0)
                    v = np.bincount(row_of, weights=gain, minlength=b) / ideal[np.minimum(n_rel, k)]
                elif m == "mrr":
                    v = np.where(best <= k, 1.0 / best.astype(np.float64), 0.0)
                else:
                    continue
                out[metric_column(m, k)] = np.where(has, v, np.nan)
    return out


def popularity_of_lists(top: np.ndarray, item_counts: np.ndarray, k: int) -> np.ndarray:
    """Mean training count of the first ``k`` listed items per row (NaN for empty lists)."""
    lists = top[:, :k]
    valid = lists >= 0
    counts = np.where(valid, item_counts[np.where(valid, lists, 0)], 0).astype(np.float64)
    n = valid.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(n > 0, counts.sum(axis=1) / n, np.nan)
