"""Segment labels per user and per-segment summaries of per-user tables (no evaluation here).

A segment labelling is a :class:`pandas.Series` indexed by user index (the fold's evaluated
users), one label per user; :func:`segment_labels` builds it from a fold: by the held-out
item's segment (new / tail / head), by the user's training-history length, or by any catalog
column of the held-out item. :func:`segment_summary` gives per-segment means of a scorecard's
per-user table with their own intervals (:mod:`xrec.evaluate._stats`); paired comparisons per
segment are :func:`xrec.evaluate.compare` with ``by=``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from xrec._validation import check_int
from xrec.errors import ConfigError, DataError
from xrec.evaluate._stats import bootstrap_means, percentile_interval

__all__ = [
    "HEAD_SHARE",
    "HISTORY_EDGES",
    "MIN_SEGMENT_USERS",
    "SEGMENT_SUMMARY_COLUMNS",
    "bucket_labels",
    "check_labels",
    "label_list",
    "item_segments",
    "segment_labels",
    "segment_order",
    "segment_summary",
]

SEGMENT_SUMMARY_COLUMNS = ["by", "segment", "metric", "n_users", "mean", "ci_low", "ci_high", "small"]

#: Head items: the most-trained items that together hold this share of all training interactions.
HEAD_SHARE = 0.5
#: Training-history lengths that start each user segment after the first: 0, 1-4, 5-19, 20-49, 50+.
HISTORY_EDGES = (1, 5, 20, 50)
#: Segments with fewer evaluated users are flagged ``small``: no interval, no test (their means are shown).
MIN_SEGMENT_USERS = 20
MIXED = "mixed"
MISSING = "(missing)"


def bucket_labels(edges: Sequence[int]) -> list[str]:
    """Labels of count buckets that start at 0 and at each of ``edges``: ``"0 (cold)"``, ``"1-19"``, ``"20+"``."""
    labels = []
    bounds = [0, *edges]
    for i, lo in enumerate(bounds):
        hi = bounds[i + 1] if i + 1 < len(bounds) else None
        if hi is None:
            labels.append(f"{lo}+")
        elif hi - lo == 1:
            labels.append("0 (cold)" if lo == 0 else f"{lo}")
        else:
            labels.append(f"{lo}-{hi - 1}")
    return labels


def item_segments(fold: Any, head_share: float = HEAD_SHARE) -> np.ndarray:
    """Segment of every catalog item by its training interactions: ``"new"``, ``"tail"`` or ``"head"``.

    * ``new``: no training interaction (the item was never seen in training);
    * ``head``: the most-trained items that together hold the first ``head_share`` of all
      training interactions (items tied with the last one in that set are head too, so the
      rule depends only on an item's count: head = count >= the count that reaches the share);
    * ``tail``: every other item with at least one training interaction.

    Parameters
    ----------
    fold
        The fold whose training rows count.
    head_share
        Share of training interactions the head holds, in (0, 1].

    Returns
    -------
    np.ndarray
        One label (object dtype) per catalog item.
    """
    if not 0 < float(head_share) <= 1:
        raise ConfigError(f"head_share must be in (0, 1], got {head_share!r}")
    counts = np.asarray(fold.item_train_counts, dtype=np.int64)
    labels = np.where(counts > 0, "tail", "new").astype(object)
    total = counts.sum()
    if total > 0:
        ordered = np.sort(counts)[::-1]
        reach = int(np.searchsorted(np.cumsum(ordered), head_share * total - 1e-9 * total))
        cut = ordered[min(reach, len(ordered) - 1)]
        labels[(counts >= max(cut, 1))] = "head"
    return labels


def _per_user_label(fold: Any, users: np.ndarray, item_label: np.ndarray) -> np.ndarray:
    """The held-out items' label per user; ``"mixed"`` when a user's held-out items differ."""
    truth = fold.heldout_matrix
    out = np.empty(len(users), dtype=object)
    for pos, u in enumerate(users):
        values = {item_label[j] for j in truth.indices[truth.indptr[u] : truth.indptr[u + 1]]}
        out[pos] = values.pop() if len(values) == 1 else MIXED
    return out


def _attribute_values(fold: Any, column: str) -> np.ndarray:
    items = fold.catalog.items
    if column not in items.columns:
        raise ConfigError(
            f"by: {column!r} is neither 'item_segment', 'user_segment' nor a catalog column; "
            f"catalog columns: {sorted(map(str, items.columns))}"
        )

    def label(value: Any) -> str:
        if isinstance(value, (list, tuple, set, np.ndarray)):
            return "|".join(sorted(str(v) for v in value)) or MISSING
        return MISSING if pd.isna(value) else str(value)

    return np.array([label(v) for v in items[column].tolist()], dtype=object)


def _history_labels(fold: Any, users: np.ndarray, edges: Sequence[int]) -> np.ndarray:
    edges = [int(e) for e in edges]
    if any(e < 1 for e in edges) or any(b <= a for a, b in zip(edges, edges[1:])):
        raise ConfigError(f"history_edges must be increasing positive integers, got {edges}")
    lengths = np.bincount(fold.train["user_idx"].to_numpy(), minlength=fold.n_users)[users]
    names = [n.replace(" (cold)", " (no history)") for n in bucket_labels(edges)]
    return np.array(names, dtype=object)[np.searchsorted(np.asarray(edges), lengths, side="right")]


def segment_labels(
    fold: Any,
    by: str,
    *,
    users: np.ndarray | None = None,
    head_share: float = HEAD_SHARE,
    history_edges: Sequence[int] = HISTORY_EDGES,
) -> pd.Series:
    """One segment label per evaluated user, for breaking results down by segment.

    Parameters
    ----------
    fold
        The fold the scorecards were evaluated on.
    by
        ``"item_segment"``: the held-out item's segment (:func:`item_segments`: new / tail /
        head); ``"user_segment"``: the user's number of training interactions, bucketed by
        ``history_edges`` (``"0 (no history)"``, ``"1-4"``, ``"5-19"``, ``"20-49"``,
        ``"50+"``); any other name: that catalog column's value for the held-out item
        (multi-label values joined with ``|``, missing values ``"(missing)"``).
        A user whose held-out items fall in different segments is labelled ``"mixed"``.
    users
        Users to label; default ``fold.eval_users``.
    head_share, history_edges
        Thresholds of the item and user segments (see above).

    Returns
    -------
    Series
        Named ``by``, indexed by user index, object labels.
    """
    if not isinstance(by, str) or not by:
        raise ConfigError(f"by must be a non-empty string, got {by!r}")
    users = fold.eval_users if users is None else np.asarray(users, dtype=np.int64)
    if by == "user_segment":
        values = _history_labels(fold, users, history_edges)
    elif by == "item_segment":
        values = _per_user_label(fold, users, item_segments(fold, head_share))
    else:
        values = _per_user_label(fold, users, _attribute_values(fold, by))
    return pd.Series(values, index=pd.Index(users, name="user"), name=by, dtype=object)


_ORDER = {name: i for i, name in enumerate(["new", "tail", "head"])}


def segment_order(labels: Any) -> list[str]:
    """Segments in reading order: new, tail, head; history buckets by length; others sorted; mixed and missing last."""

    def key(label: str) -> tuple:
        if label in _ORDER:
            return (0, _ORDER[label], "")
        head = label.split("-")[0].split("+")[0].split(" ")[0]
        if head.isdigit():
            return (1, int(head), "")
        return (3 if label in (MIXED, MISSING) else 2, 0, label)

    return sorted({str(v) for v in labels}, key=key)


def check_labels(labels: Any, users: np.ndarray, where: str = "by") -> pd.Series:
    """``labels`` (a Series indexed by user index) aligned to ``users``; every user must have a label."""
    if not isinstance(labels, pd.Series):
        raise ConfigError(f"{where}: expected a pandas Series of segment labels indexed by user (see segment_labels), "
                          f"got {type(labels).__name__}")
    if labels.index.has_duplicates:
        raise ConfigError(f"{where}: segment labels name some users twice")
    missing = np.setdiff1d(users, labels.index.to_numpy())
    if len(missing):
        raise DataError(f"{where}: {len(missing)} evaluated user(s) have no segment label (first {missing[:5].tolist()})")
    return labels.loc[users].astype(str)


def segment_summary(
    per_user: pd.DataFrame,
    labels: pd.Series,
    *,
    metrics: Sequence[str] | None = None,
    confidence: float = 0.95,
    seed: int = 0,
    n_resamples: int = 2000,
    min_users: int = MIN_SEGMENT_USERS,
) -> pd.DataFrame:
    """Mean of every per-user metric within each segment, with a bootstrap interval per segment.

    The means are the group means of ``per_user`` grouped by ``labels``; intervals are
    bootstrap percentile intervals over the segment's users (seeded). Segments with fewer than
    ``min_users`` users are flagged ``small`` and get no interval (their mean is still shown).

    Returns
    -------
    DataFrame
        Columns ``by, segment, metric, n_users, mean, ci_low, ci_high, small``.
    """
    check_int(min_users, "min_users", low=1)
    users = per_user["user"].to_numpy()
    aligned = check_labels(labels, users)
    cols = [c for c in per_user.columns if c != "user"] if metrics is None else list(metrics)
    unknown = [c for c in cols if c not in per_user.columns]
    if unknown:
        raise ConfigError(f"metric(s) {unknown} are not in the scorecard; available: {[c for c in per_user.columns if c != 'user']}")
    values = per_user[cols].to_numpy(dtype=np.float64)
    seg = aligned.to_numpy()
    rows = []
    for name in segment_order(seg):
        v = values[seg == name]
        small = len(v) < min_users
        for j, col in enumerate(cols):
            x = v[:, j][~np.isnan(v[:, j])]
            lo = hi = np.nan
            if not small and len(x):
                lo, hi = percentile_interval(bootstrap_means(x, n_resamples, seed), confidence)
            rows.append((str(labels.name), name, col, len(v), float(x.mean()) if len(x) else np.nan, lo, hi, small))
    return pd.DataFrame(rows, columns=SEGMENT_SUMMARY_COLUMNS)


def label_list(by: Any, fold: Any = None) -> list[pd.Series]:
    """``by`` as a list of label Series: a Series, a breakdown name, or a sequence of either
    (names need the ``fold`` they are computed on, through :func:`segment_labels`)."""
    many = [by] if isinstance(by, (pd.Series, str)) else list(by)
    out = []
    for entry in many:
        if isinstance(entry, str):
            if fold is None:
                raise ConfigError(f"by: the breakdown name {entry!r} needs fold= (or pass segment_labels(fold, {entry!r}))")
            entry = segment_labels(fold, entry)
        out.append(entry)
    return out
