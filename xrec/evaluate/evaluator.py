"""Offline evaluation of any scorer on a fold, in chunks of users."""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import scipy.sparse as sp
from tqdm.auto import tqdm

from xrec.errors import ConfigError, DataError
from xrec.evaluate._metrics import ALL_METRICS, LIST_METRICS, RANK_METRICS, metric_column, metrics_from_ranks, popularity_of_lists
from xrec.evaluate._ranking import canonical_rows, check_users, rank_heldout, top_k_items
from xrec.evaluate.protocols import SAMPLED_WARNING, FullRanking, SampledNegatives
from xrec.evaluate.scorecard import Scorecard
from xrec.fold import Fold

ScoreFn = Callable[[np.ndarray], np.ndarray]
DEFAULT_METRICS = ("hit_rate", "ndcg", "recall", "mrr", "coverage", "popularity")


def as_score_fn(scorer: Any, n_users: int | None = None, n_items: int | None = None) -> ScoreFn:
    """Turn a dense array, an object with ``.score(users)`` or a callable into ``f(users) -> block``.

    Parameters
    ----------
    scorer
        A 2-D ``(users × items)`` score array, an object with a ``score(users)`` method, or a
        callable ``f(users) -> block``.
    n_users, n_items
        The fold's shape; when both are given, an array scorer must have exactly this shape.
    """
    if isinstance(scorer, np.ndarray):
        if scorer.ndim != 2:
            raise DataError(f"score array must be 2-D (users × items), got shape {scorer.shape}")
        if n_users is not None and n_items is not None and scorer.shape != (n_users, n_items):
            raise DataError(f"score array has shape {scorer.shape}, the fold has {(n_users, n_items)} (users × items)")

        def rows_of(users: np.ndarray) -> np.ndarray:
            users = np.asarray(users)
            # A run of consecutive users is a view, not a copy of the rows.
            if users.ndim == 1 and users.size and users.dtype.kind in "iu" and np.all(np.diff(users) == 1):
                return scorer[int(users[0]) : int(users[-1]) + 1]
            return scorer[users]

        return rows_of
    score = getattr(scorer, "score", None)
    if callable(score):
        return score
    if callable(scorer):
        return scorer
    raise ConfigError(
        f"scorer must be a 2-D array, an object with .score(users), or a callable f(users); got {type(scorer).__name__}"
    )


def _row_run(m: sp.csr_matrix, start: int, stop: int) -> sp.csr_matrix:
    """Rows ``start:stop`` of a canonical CSR as views (scipy's slicing copies and re-checks)."""
    lo, hi = m.indptr[start], m.indptr[stop]
    out = sp.csr_matrix(
        (m.data[lo:hi], m.indices[lo:hi], m.indptr[start : stop + 1] - lo), shape=(stop - start, m.shape[1]), copy=False
    )
    out.has_canonical_format = True
    return out


def _check_ks(ks: Sequence[int] | int) -> tuple[int, ...]:
    if isinstance(ks, (int, np.integer)):
        ks = (ks,)
    ks = tuple(ks)
    bad = [k for k in ks if not isinstance(k, (int, np.integer)) or isinstance(k, bool) or k <= 0]
    if not ks or bad:
        raise ConfigError(f"ks must be positive integers, got bad value(s) {bad or list(ks)}")
    return tuple(sorted({int(k) for k in ks}))


def check_cutoffs(ks: Sequence[int] | int, n_items: int, field: str = "ks") -> tuple[int, ...]:
    """``ks`` checked as positive integers no larger than the catalog, sorted and unique.

    A top-K list cannot be longer than the catalog, so a cut-off above ``n_items`` is
    refused (not clamped) with a :class:`ConfigError` naming ``field``; checked before any
    ``(users, K)`` array is made.
    """
    try:
        ks = _check_ks(ks)
    except ConfigError as exc:
        raise ConfigError(f"{field}: {exc}") from None
    too_big = [k for k in ks if k > n_items]
    if too_big:
        raise ConfigError(
            f"{field}: cut-off(s) {too_big} exceed the catalog's {n_items} items; a top-K list cannot be longer than the catalog"
        )
    return ks


def _check_metrics(metrics: Sequence[str] | str) -> tuple[str, ...]:
    if isinstance(metrics, str):
        metrics = (metrics,)
    unknown = [m for m in metrics if m not in ALL_METRICS]
    if unknown:
        raise ConfigError(f"unknown metric name(s) {unknown}; known: {list(ALL_METRICS)}")
    if not metrics:
        raise ConfigError("metrics is empty; pick from " + str(list(ALL_METRICS)))
    return tuple(dict.fromkeys(metrics))


def evaluate_blocks(
    score_fn: ScoreFn,
    seen: sp.spmatrix,
    truth: sp.spmatrix,
    users: np.ndarray | None = None,
    *,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = DEFAULT_METRICS,
    protocol: FullRanking | SampledNegatives | None = None,
    chunk_size: int = 1024,
    item_counts: np.ndarray | None = None,
    name: str | None = None,
    settings: dict | None = None,
    progress: bool = False,
) -> Scorecard:
    """Evaluate ``score_fn`` block by block against a seen mask and held-out truth.

    Parameters
    ----------
    score_fn
        ``f(users) -> (len(users), n_items)`` real scores, higher is better.
    seen
        ``(n_users, n_items)`` sparse; stored entries are training interactions (never candidates).
    truth
        ``(n_users, n_items)`` sparse; stored entries are held-out items.
    users
        User indices to evaluate (unique); default: every user with a held-out item.
    ks
        Cut-offs, each > 0 and at most the number of items (larger ones are refused).
    metrics
        Any of ``hit_rate, ndcg, recall, mrr`` (per user) and ``coverage, popularity``
        (from top-K lists; computed only when asked).
    protocol
        :class:`FullRanking` (default) or :class:`SampledNegatives` (warns).
    chunk_size
        Users scored per block; peak memory is about ``chunk_size × n_items`` scores.
    item_counts
        Training count per item, for ``popularity``; default: users per item in ``seen``.
    name
        Label of the scorecard.
    settings
        How the data was split, copied into the scorecard.
    progress
        Show a progress bar over chunks.

    Returns
    -------
    Scorecard

    Raises
    ------
    ConfigError
        Bad ``ks`` (or one larger than the catalog), metric names, chunk size or protocol.
    DataError
        Shape mismatches, users out of range, repeated, or without held-out items.
    """
    ks = _check_ks(ks)
    metrics = _check_metrics(metrics)
    if not isinstance(chunk_size, (int, np.integer)) or chunk_size <= 0:
        raise ConfigError(f"chunk_size must be a positive int, got {chunk_size!r}")
    protocol = FullRanking() if protocol is None else protocol
    if not isinstance(protocol, (FullRanking, SampledNegatives)):
        raise ConfigError(f"protocol must be FullRanking() or SampledNegatives(...), got {type(protocol).__name__}")
    if not sp.issparse(seen) or not sp.issparse(truth):
        raise DataError("seen and truth must be scipy sparse matrices (users × items)")
    if seen.shape != truth.shape:
        raise DataError(f"seen mask has shape {seen.shape} but held-out matrix has {truth.shape}")
    n_users, n_items = truth.shape
    check_cutoffs(ks, n_items)
    seen = canonical_rows(seen, n_users, n_items, "seen mask")
    truth = canonical_rows(truth, n_users, n_items, "held-out matrix")
    users = check_users(users, truth)
    if isinstance(protocol, SampledNegatives):
        warnings.warn(SAMPLED_WARNING, UserWarning, stacklevel=3)

    list_wanted = [m for m in metrics if m in LIST_METRICS]
    rank_wanted = [m for m in metrics if m in RANK_METRICS]
    if "popularity" in list_wanted:
        if item_counts is None:
            item_counts = np.bincount(seen.indices, minlength=n_items)
        item_counts = np.asarray(item_counts)
        if item_counts.shape != (n_items,):
            raise DataError(f"item_counts has shape {item_counts.shape}, expected ({n_items},)")

    per_user: dict[str, list[np.ndarray]] = {}
    listed = {k: np.zeros(n_items, dtype=bool) for k in ks} if "coverage" in list_wanted else {}
    starts = range(0, len(users), int(chunk_size))
    for start in tqdm(starts, desc=name or "evaluate", unit="chunk", disable=not progress):
        chunk = users[start : start + int(chunk_size)]
        block = np.asarray(score_fn(chunk))
        if block.shape != (len(chunk), n_items):
            raise DataError(f"scorer returned shape {block.shape} for {len(chunk)} users; expected {(len(chunk), n_items)}")
        if block.dtype.kind not in "fiu":
            raise DataError(f"scorer returned dtype {block.dtype}; scores must be real numbers")
        if np.all(np.diff(chunk) == 1):  # a run of consecutive users: slice, don't gather
            seen_rows, truth_rows = _row_run(seen, chunk[0], chunk[-1] + 1), _row_run(truth, chunk[0], chunk[-1] + 1)
        else:
            seen_rows, truth_rows = seen[chunk], truth[chunk]
        if rank_wanted:
            ranks = rank_heldout(block, seen_rows, truth_rows, protocol=protocol, users=chunk)
            for col, values in metrics_from_ranks(ranks, ks, rank_wanted).items():
                per_user.setdefault(col, []).append(values)
        if list_wanted:
            top = top_k_items(block, seen_rows, max(ks))
            for k in ks:
                if "coverage" in list_wanted:
                    items = top[:, :k].ravel()
                    listed[k][items[items >= 0]] = True
                if "popularity" in list_wanted:
                    per_user.setdefault(metric_column("popularity", k), []).append(popularity_of_lists(top, item_counts, k))

    columns = {"user": users}
    order = [metric_column(m, k) for m in metrics if m != "coverage" for k in ks]
    for col in order:
        columns[col] = np.concatenate(per_user[col])
    list_metrics: dict[str, float] = {}
    for k in ks:
        if "coverage" in list_wanted:
            list_metrics[metric_column("coverage", k)] = float(listed[k].mean())
        if "popularity" in list_wanted:
            list_metrics[metric_column("popularity", k)] = float(np.nanmean(columns[metric_column("popularity", k)]))
    import pandas as pd

    return Scorecard(
        name=name or "scorer",
        per_user=pd.DataFrame(columns),
        list_metrics=list_metrics,
        ks=ks,
        protocol=protocol.describe(),
        fold_settings=dict(settings or {}),
        n_items=n_items,
    )


def evaluate(
    scorer: Any,
    fold: Fold,
    *,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = DEFAULT_METRICS,
    protocol: FullRanking | SampledNegatives | None = None,
    users: np.ndarray | None = None,
    chunk_size: int = 1024,
    name: str | None = None,
    progress: bool = False,
) -> Scorecard:
    """Evaluate a scorer on a fold: rank held-out items among unseen items, per user.

    Parameters
    ----------
    scorer
        A dense ``(n_users, n_items)`` array, anything with ``.score(users) -> block``
        (sources, blends), or a callable ``f(users) -> block``. Blocks are
        ``(len(users), n_items)`` real scores, higher is better; they are requested
        ``chunk_size`` users at a time, so the full matrix never has to exist.
    fold
        Training interactions (the seen mask) and held-out interactions (the truth).
    ks
        Cut-offs, each > 0 and at most the number of catalog items (larger ones are refused).
    metrics
        Names among ``hit_rate, ndcg, recall, mrr, coverage, popularity``.
    protocol
        :class:`FullRanking` (default) or :class:`SampledNegatives` (warns).
    users
        User indices to evaluate; default ``fold.eval_users``.
    chunk_size
        Users per requested block.
    name
        Scorecard label; default the scorer's class name.
    progress
        Show a progress bar over chunks.

    Returns
    -------
    Scorecard
        Per-user metrics (paired across scorers evaluated on the same fold), coverage
        and popularity, the protocol and the fold's settings.

    Examples
    --------
    >>> card = evaluate(source, fold, ks=(10, 20))     # doctest: +SKIP
    >>> card.summary()                                 # doctest: +SKIP
    """
    if not isinstance(fold, Fold):
        raise ConfigError(f"fold must be an xrec Fold, got {type(fold).__name__}")
    score_fn = as_score_fn(scorer, fold.n_users, fold.n_items)
    if name is None:
        name = "scores" if isinstance(scorer, np.ndarray) else getattr(scorer, "__name__", type(scorer).__name__)
    return evaluate_blocks(
        score_fn,
        fold.train_matrix,
        fold.heldout_matrix,
        fold.eval_users if users is None else users,
        ks=ks,
        metrics=metrics,
        protocol=protocol,
        chunk_size=chunk_size,
        item_counts=fold.item_train_counts,
        name=name,
        settings=fold.settings,
        progress=progress,
    )
