"""Results broken down by segment: of the held-out item (new / tail / head, or any catalog
attribute) and of the user (training-history length); and hit rates by item popularity.

A segment labelling is a :class:`pandas.Series` indexed by user index (the fold's evaluated
users), one label per user; :func:`segment_labels` builds it from a fold. Per-segment means
are plain group means of a scorecard's per-user table, each with its own bootstrap interval
(:mod:`xrec.evaluate._stats`); paired comparisons per segment live in
:func:`xrec.evaluate.compare` (its ``by=`` argument).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from xrec._validation import check_int
from xrec.errors import ConfigError
from xrec.evaluate._stats import wilson_interval
from xrec.evaluate.breakdown import (
    HEAD_SHARE,
    HISTORY_EDGES,
    MIN_SEGMENT_USERS,
    SEGMENT_SUMMARY_COLUMNS,
    bucket_labels,
    item_segments,
    segment_labels,
    segment_order,
    segment_summary,
)

__all__ = [
    "HEAD_SHARE",
    "HISTORY_EDGES",
    "MIN_SEGMENT_USERS",
    "SEGMENT_COLUMNS",
    "SEGMENT_SUMMARY_COLUMNS",
    "item_segments",
    "segment_hit_rates",
    "segment_labels",
    "segment_order",
    "segment_summary",
]

SEGMENT_COLUMNS = ["scorer", "segment", "hits", "n", "hit_rate", "ci_low", "ci_high"]


def segment_hit_rates(
    scorers: Mapping[str, Any],
    fold: Any,
    *,
    k: int = 10,
    edges: Sequence[int] = (1,),
    users: np.ndarray | None = None,
    confidence: float = 0.95,
    chunk_size: int = 1024,
) -> pd.DataFrame:
    """Hit rate at ``k`` of held-out items, split by the items' training popularity.

    Every held-out (user, item) pair is ranked among the user's candidates with the
    evaluator's ranking (same tie rule); a pair is a hit when its rank is at most ``k``.
    Pairs are grouped by the item's number of training interactions: with ``edges=(1,)``
    into *cold* (0) and ``1+``; with ``edges=(1, 20)`` into 0, 1-19 and 20+.

    Parameters
    ----------
    scorers
        Name -> anything :func:`xrec.evaluate.evaluate` accepts (source, blend, array, callable).
    fold
        The fold whose held-out items are ranked.
    k
        Cut-off.
    edges
        Increasing positive training counts that start each segment after the first.
    users
        Users to include; default ``fold.eval_users``.
    confidence
        Level of the Wilson score interval of each hit rate.
    chunk_size
        Users scored per block.

    Returns
    -------
    DataFrame
        Columns ``scorer, segment, hits, n, hit_rate, ci_low, ci_high``; segments (labelled
        by training count: ``"0 (cold)"``, ``"1-19"``, ``"20+"``) in popularity order (a segment without held-out pairs has ``n = 0`` and NaN rates).
    """
    from xrec.evaluate._ranking import rank_heldout
    from xrec.evaluate.evaluator import as_score_fn

    check_int(k, "k", low=1)
    edges = [int(e) for e in edges]
    if any(e < 1 for e in edges) or any(b <= a for a, b in zip(edges, edges[1:])):
        raise ConfigError(f"edges must be increasing positive integers, got {edges}")
    if not isinstance(scorers, Mapping) or not scorers:
        raise ConfigError("scorers must be a non-empty mapping of name -> scorer")
    labels = bucket_labels(edges)
    segment_of_item = np.searchsorted(np.asarray(edges), fold.item_train_counts, side="right")
    users = fold.eval_users if users is None else np.asarray(users, dtype=np.int64)
    seen_all = fold.train_matrix
    truth_all = fold.heldout_matrix
    rows = []
    for name, scorer in scorers.items():
        score = as_score_fn(scorer, fold.n_users, fold.n_items)
        hits = np.zeros(len(labels), dtype=np.int64)
        total = np.zeros(len(labels), dtype=np.int64)
        for start in range(0, len(users), chunk_size):
            chunk = users[start : start + chunk_size]
            seen, truth = seen_all[chunk], truth_all[chunk]
            ranks = rank_heldout(np.asarray(score(chunk)), seen, truth)
            seg = segment_of_item[ranks.items]
            total += np.bincount(seg, minlength=len(labels))
            hits += np.bincount(seg, weights=(ranks.ranks <= k), minlength=len(labels)).astype(np.int64)
        lo, hi = wilson_interval(hits, total, confidence)
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = hits / np.where(total > 0, total, np.nan)
        for j, label in enumerate(labels):
            rows.append((str(name), label, int(hits[j]), int(total[j]), float(rate[j]), float(lo[j]), float(hi[j])))
    return pd.DataFrame(rows, columns=SEGMENT_COLUMNS)
