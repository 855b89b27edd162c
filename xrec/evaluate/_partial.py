"""The evaluator's core, in three steps that a single process and a cluster share.

1. :func:`check_inputs` validates the options, masks and users once (on the caller's side);
2. :func:`evaluate_rows` scores one run of users chunk by chunk and returns a
   :class:`PartialResult` (per-user metric values and, for coverage, the set of listed items);
3. :func:`merge_partials` joins partial results in order into a :class:`Scorecard`.

One process runs step 2 once over every user; :mod:`xrec.evaluate.sharded` runs it on
Dask workers, one shard of users per task. A user's values depend only on that user's
row of scores, seen items and held-out items, so the merged per-user values are the same
whichever way the users are split (and shards are cut on chunk boundaries, so each user
is even scored in the same block as in one process).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp
from tqdm.auto import tqdm

from xrec._validation import check_int
from xrec.errors import ConfigError, DataError
from xrec.evaluate._metrics import (
    LIST_METRICS,
    RANK_METRICS,
    check_ks,
    check_metrics,
    metric_column,
    metrics_from_ranks,
    popularity_of_lists,
)
from xrec.evaluate._ranking import canonical_rows, check_users, rank_heldout, top_k_items
from xrec.evaluate.protocols import FullRanking, SampledNegatives
from xrec.evaluate.scorecard import Scorecard
from xrec.fold import Fold

ScoreFn = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class EvalOptions:
    """Checked settings of one evaluation (what every shard task needs besides the data)."""

    ks: tuple[int, ...]
    metrics: tuple[str, ...]
    protocol: FullRanking | SampledNegatives
    chunk_size: int
    n_items: int
    item_counts: np.ndarray | None = None


@dataclass(frozen=True)
class EvalInputs:
    """Checked evaluation inputs (see :func:`check_inputs`): the masks, the users and the options."""

    seen: sp.csr_matrix
    truth: sp.csr_matrix
    users: np.ndarray
    options: EvalOptions


@dataclass
class PartialResult:
    """Per-user values of one run of users, and the items their top-K lists named.

    Attributes
    ----------
    users
        The users, in order.
    per_user
        ``"metric@K"`` -> float64 array aligned with ``users``.
    listed
        ``K`` -> bool ``(n_items,)``: items in at least one of these users' top-K lists
        (only when coverage is asked for).
    """

    users: np.ndarray
    per_user: dict[str, np.ndarray]
    listed: dict[int, np.ndarray]


def check_inputs(
    seen: sp.spmatrix,
    truth: sp.spmatrix,
    users: np.ndarray | None,
    *,
    ks: Sequence[int] | int,
    metrics: Sequence[str],
    protocol: FullRanking | SampledNegatives | None,
    chunk_size: int,
    item_counts: np.ndarray | None,
) -> EvalInputs:
    """Validate everything :func:`evaluate_rows` needs; errors as :func:`~xrec.evaluate.evaluate_blocks` documents."""
    ks = check_ks(ks)
    metrics = check_metrics(metrics)
    chunk_size = check_int(chunk_size, "chunk_size", low=1, expected="a positive int")
    protocol = FullRanking() if protocol is None else protocol
    if not isinstance(protocol, (FullRanking, SampledNegatives)):
        raise ConfigError(f"protocol must be FullRanking() or SampledNegatives(...), got {type(protocol).__name__}")
    if not sp.issparse(seen) or not sp.issparse(truth):
        raise DataError("seen and truth must be scipy sparse matrices (users × items)")
    if seen.shape != truth.shape:
        raise DataError(f"seen mask has shape {seen.shape} but held-out matrix has {truth.shape}")
    n_users, n_items = truth.shape
    seen = canonical_rows(seen, n_users, n_items, "seen mask")
    truth = canonical_rows(truth, n_users, n_items, "held-out matrix")
    users = check_users(users, truth)
    if "popularity" in metrics:
        if item_counts is None:
            item_counts = np.bincount(seen.indices, minlength=n_items)
        item_counts = np.asarray(item_counts)
        if item_counts.shape != (n_items,):
            raise DataError(f"item_counts has shape {item_counts.shape}, expected ({n_items},)")
    else:
        item_counts = None
    return EvalInputs(seen, truth, users, EvalOptions(ks, metrics, protocol, int(chunk_size), n_items, item_counts))


def fold_arguments(scorer: object, fold: Fold, users: np.ndarray | None, name: str | None) -> dict:
    """What ``evaluate_blocks`` takes from a fold: masks, users (default ``fold.eval_users``), counts, settings, label."""
    if not isinstance(fold, Fold):
        raise ConfigError(f"fold must be an xrec Fold, got {type(fold).__name__}")
    if name is None:
        name = "scores" if isinstance(scorer, np.ndarray) else getattr(scorer, "__name__", type(scorer).__name__)
    return {
        "seen": fold.train_matrix,
        "truth": fold.heldout_matrix,
        "users": fold.eval_users if users is None else users,
        "item_counts": fold.item_train_counts,
        "settings": fold.settings,
        "name": name,
    }


def _row_run(m: sp.csr_matrix, start: int, stop: int) -> sp.csr_matrix:
    """Rows ``start:stop`` of a canonical CSR as views (scipy's slicing copies and re-checks)."""
    lo, hi = m.indptr[start], m.indptr[stop]
    out = sp.csr_matrix(
        (m.data[lo:hi], m.indices[lo:hi], m.indptr[start : stop + 1] - lo), shape=(stop - start, m.shape[1]), copy=False
    )
    out.has_canonical_format = True
    return out


def evaluate_rows(
    score_fn: ScoreFn,
    options: EvalOptions,
    users: np.ndarray,
    seen: sp.csr_matrix,
    truth: sp.csr_matrix,
    *,
    progress: bool = False,
    desc: str = "evaluate",
) -> PartialResult:
    """Score ``users`` in chunks of ``options.chunk_size`` and compute their metric values.

    Parameters
    ----------
    score_fn
        ``f(users) -> (len(users), n_items)`` scores (global user indices).
    options
        Checked settings.
    users
        User indices to score, in order (a run of :attr:`EvalInputs.users`).
    seen, truth
        The checked (canonical CSR) seen mask and held-out matrix of every user.
    progress, desc
        Progress bar over chunks and its label.
    """
    n_items = options.n_items
    list_wanted = [m for m in options.metrics if m in LIST_METRICS]
    rank_wanted = [m for m in options.metrics if m in RANK_METRICS]
    ks = options.ks
    per_user: dict[str, list[np.ndarray]] = {}
    listed = {k: np.zeros(n_items, dtype=bool) for k in ks} if "coverage" in list_wanted else {}
    size = options.chunk_size
    for start in tqdm(range(0, len(users), size), desc=desc, unit="chunk", disable=not progress):
        chunk = users[start : start + size]
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
            ranks = rank_heldout(block, seen_rows, truth_rows, protocol=options.protocol, users=chunk)
            for col, values in metrics_from_ranks(ranks, ks, rank_wanted).items():
                per_user.setdefault(col, []).append(values)
        if list_wanted:
            top = top_k_items(block, seen_rows, max(ks))
            for k in ks:
                if "coverage" in list_wanted:
                    items = top[:, :k].ravel()
                    listed[k][items[items >= 0]] = True
                if "popularity" in list_wanted:
                    values = popularity_of_lists(top, options.item_counts, k)
                    per_user.setdefault(metric_column("popularity", k), []).append(values)
    columns = {col: np.concatenate(parts) for col, parts in per_user.items()}
    return PartialResult(np.asarray(users, dtype=np.int64), columns, listed)


def merge_partials(
    parts: Sequence[PartialResult],
    inputs: EvalInputs,
    *,
    name: str,
    settings: dict | None = None,
) -> Scorecard:
    """One :class:`Scorecard` from partial results given in user order.

    Raises
    ------
    DataError
        When the parts' users, joined in order, are not exactly ``inputs.users`` (a shard
        lost or counted twice).
    """
    users = np.concatenate([p.users for p in parts]) if parts else np.zeros(0, np.int64)
    if not np.array_equal(users, inputs.users):
        raise DataError(
            f"merged results cover {len(users)} users ({len(np.unique(users))} distinct), "
            f"expected the {len(inputs.users)} evaluated users in order"
        )
    options = inputs.options
    columns: dict[str, np.ndarray] = {"user": inputs.users}
    for col in (metric_column(m, k) for m in options.metrics if m != "coverage" for k in options.ks):
        columns[col] = np.concatenate([p.per_user[col] for p in parts])
    list_metrics: dict[str, float] = {}
    for k in options.ks:
        if "coverage" in options.metrics:
            listed = np.logical_or.reduce([p.listed[k] for p in parts])
            list_metrics[metric_column("coverage", k)] = float(listed.mean())
        if "popularity" in options.metrics:
            list_metrics[metric_column("popularity", k)] = float(np.nanmean(columns[metric_column("popularity", k)]))
    return Scorecard(
        name=name,
        per_user=pd.DataFrame(columns),
        list_metrics=list_metrics,
        ks=options.ks,
        protocol=options.protocol.describe(),
        fold_settings=dict(settings or {}),
        n_items=options.n_items,
    )
