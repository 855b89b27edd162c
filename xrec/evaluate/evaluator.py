"""Offline evaluation of any scorer on a fold, in chunks of users."""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import scipy.sparse as sp

from xrec.errors import ConfigError, DataError
from xrec.evaluate._partial import check_inputs, evaluate_rows, fold_arguments, merge_partials
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
        Cut-offs, each > 0.
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
        Bad ``ks``, metric names, chunk size or protocol.
    DataError
        Shape mismatches, users out of range, repeated, or without held-out items.
    """
    inputs = check_inputs(
        seen, truth, users, ks=ks, metrics=metrics, protocol=protocol, chunk_size=chunk_size, item_counts=item_counts
    )
    if isinstance(inputs.options.protocol, SampledNegatives):
        warnings.warn(SAMPLED_WARNING, UserWarning, stacklevel=3)
    part = evaluate_rows(
        score_fn, inputs.options, inputs.users, inputs.seen, inputs.truth, progress=progress, desc=name or "evaluate"
    )
    return merge_partials([part], inputs, name=name or "scorer", settings=settings)


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
        Cut-offs, each > 0.
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
    arguments = fold_arguments(scorer, fold, users, name)
    score_fn = as_score_fn(scorer, fold.n_users, fold.n_items)
    return evaluate_blocks(
        score_fn, ks=ks, metrics=metrics, protocol=protocol, chunk_size=chunk_size, progress=progress, **arguments
    )
