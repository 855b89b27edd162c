"""Evaluation sharded by users on a Dask cluster; per-user results identical to one process.

The users to evaluate are cut into shards of whole chunks (``shard_size`` is a multiple
of ``chunk_size``). The scorer and the checked masks are sent once to every worker
(``broadcast``); each task then gets only the bounds of its shard, scores those users
chunk by chunk with the same evaluator core as :func:`~xrec.evaluate.evaluate_blocks`
and returns their per-user metric values. The caller joins the shards in user order.
Since every user is scored in the same block of users as in one process and a user's
values depend only on its own row, the joined per-user arrays equal the single-process
ones exactly. :func:`evaluate_blend_sharded` does the same for the chunked blend evaluation
of already fitted sources (:func:`~xrec.evaluate.evaluate_blend_chunked`).

When a worker dies, Dask runs its unfinished shards again on another worker (up to the
scheduler's ``distributed.scheduler.allowed-failures``, 3 by default); when no surviving
worker holds the scorer and masks, they are sent again with the waiting shards
(:func:`xrec.cluster.run_shards`). Results are joined by shard number, so no user is lost
or counted twice — the join checks it.
"""

from __future__ import annotations

import contextlib
import warnings
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_limits

from xrec._validation import check_int
from xrec.cluster import check_shard_size, open_client, resolve_blas_threads, run_shards, worker_count
from xrec.evaluate._chunked import DEFAULT_BLOCK_BYTES, check_problem, check_run_settings, evaluate_blend_chunked
from xrec.evaluate._partial import EvalInputs, EvalOptions, PartialResult, check_inputs, evaluate_rows, fold_arguments, merge_partials
from xrec.evaluate._metrics import RANK_METRICS
from xrec.evaluate.evaluator import DEFAULT_METRICS, as_score_fn
from xrec.evaluate.protocols import SAMPLED_WARNING, FullRanking, SampledNegatives
from xrec.evaluate.scorecard import Scorecard
from xrec.fold import Fold

if TYPE_CHECKING:
    from distributed import Client

#: Shards per worker when ``shard_size`` is not given: enough to balance the load and
#: move a progress bar, few enough that task overhead stays small.
SHARDS_PER_WORKER = 4


def shard_bounds(n_users: int, chunk_size: int, shard_size: int | None, n_workers: int) -> list[tuple[int, int]]:
    """``(start, stop)`` positions of each shard in the user list, cut on chunk boundaries.

    Parameters
    ----------
    n_users
        Users to evaluate.
    chunk_size
        Users scored per block.
    shard_size
        Users per shard, rounded up to a multiple of ``chunk_size``; default: about
        :data:`SHARDS_PER_WORKER` shards per worker.
    n_workers
        Workers of the cluster (for the default).
    """
    n_chunks = -(-n_users // chunk_size)
    if shard_size is None:
        chunks_per_shard = max(1, -(-n_chunks // (SHARDS_PER_WORKER * max(1, n_workers))))
    else:
        chunks_per_shard = max(1, -(-shard_size // chunk_size))
    step = chunks_per_shard * chunk_size
    return [(start, min(n_users, start + step)) for start in range(0, n_users, step)]


def _evaluate_shard(scorer: Any, inputs: EvalInputs, blas_threads: int | None, start: int, stop: int) -> PartialResult:
    """One shard task, run on a worker: users ``inputs.users[start:stop]``."""
    score_fn = as_score_fn(scorer, *inputs.truth.shape)
    with contextlib.nullcontext() if blas_threads is None else threadpool_limits(blas_threads, "blas"):
        return evaluate_rows(score_fn, inputs.options, inputs.users[start:stop], inputs.seen, inputs.truth)


def evaluate_blocks_sharded(
    scorer: Any,
    seen: sp.spmatrix,
    truth: sp.spmatrix,
    users: np.ndarray | None = None,
    *,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = DEFAULT_METRICS,
    protocol: FullRanking | SampledNegatives | None = None,
    chunk_size: int = 1024,
    shard_size: int | None = None,
    item_counts: np.ndarray | None = None,
    name: str | None = None,
    settings: dict | None = None,
    progress: bool = False,
    scheduler: str | None = None,
    workers: int | None = None,
    client: Client | None = None,
    blas_threads: int | str | None = "same",
) -> Scorecard:
    """:func:`~xrec.evaluate.evaluate_blocks` with the users sharded over a Dask cluster.

    Parameters
    ----------
    scorer
        What :func:`~xrec.evaluate.as_score_fn` accepts (a score array, an object with
        ``.score(users)``, a callable); it is serialized (cloudpickle) and sent once to
        every worker, so it must be picklable and its ``score`` must not depend on
        state of the calling process.
    seen, truth, users, ks, metrics, protocol, chunk_size, item_counts, settings
        As in :func:`~xrec.evaluate.evaluate_blocks`.
    shard_size
        Users per task, rounded up to a multiple of ``chunk_size``; default about four
        shards per worker.
    name
        Scorecard label and progress-bar title.
    progress
        Progress bar over shards as they finish.
    scheduler, workers, client
        Which cluster (see :func:`xrec.cluster.open_client`): a scheduler address, the
        number of processes of a local cluster (default one per core), or an open client.
    blas_threads
        Threads of the workers' BLAS while they score: ``"same"`` (default) as this
        process uses, an int, or ``None`` to leave the workers' own setting (one thread
        on a local cluster). Matrix products round differently in the last bit with
        another thread count, which can reorder items whose scores tie exactly (e.g.
        items with the same attribute vector); with ``"same"`` on this machine the
        values are identical to one process. ``1`` avoids running more BLAS threads
        than cores when the workers fill the machine.

    Returns
    -------
    Scorecard
        Equal to the single-process scorecard: the same users in the same order with
        exactly the same per-user values, the same coverage and popularity (given the
        same BLAS thread count and CPU, see ``blas_threads``).
    """
    inputs = check_inputs(
        seen, truth, users, ks=ks, metrics=metrics, protocol=protocol, chunk_size=chunk_size, item_counts=item_counts
    )
    check_shard_size(shard_size)
    as_score_fn(scorer, *inputs.truth.shape)  # refuse a wrong scorer here, not on a worker
    threads = resolve_blas_threads(blas_threads)
    if isinstance(inputs.options.protocol, SampledNegatives):
        warnings.warn(SAMPLED_WARNING, UserWarning, stacklevel=2)
    label = name or "evaluate"
    with open_client(scheduler, workers, client=client) as active:
        bounds = shard_bounds(len(inputs.users), inputs.options.chunk_size, shard_size, worker_count(active))
        parts = run_shards(active, _evaluate_shard, (scorer, inputs, threads), bounds, desc=label, progress=progress)
    return merge_partials(parts, inputs, name=name or "scorer", settings=settings)


def evaluate_sharded(
    scorer: Any,
    fold: Fold,
    *,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = DEFAULT_METRICS,
    protocol: FullRanking | SampledNegatives | None = None,
    users: np.ndarray | None = None,
    chunk_size: int = 1024,
    shard_size: int | None = None,
    name: str | None = None,
    progress: bool = False,
    scheduler: str | None = None,
    workers: int | None = None,
    client: Client | None = None,
    blas_threads: int | str | None = "same",
) -> Scorecard:
    """:func:`~xrec.evaluate.evaluate` on a Dask cluster, sharded by users.

    Same arguments and result as :func:`~xrec.evaluate.evaluate`, plus the cluster
    (``scheduler`` address, local ``workers`` count, or an open ``client``; default a
    local cluster with one worker process per core), ``shard_size`` (users per task) and
    ``blas_threads``. See :func:`evaluate_blocks_sharded`.

    Examples
    --------
    >>> card = evaluate_sharded(blend, fold, ks=(10,), workers=2)                # doctest: +SKIP
    >>> card = evaluate_sharded(blend, fold, scheduler="tcp://scheduler-host:8786")   # doctest: +SKIP
    """
    return evaluate_blocks_sharded(
        scorer,
        ks=ks,
        metrics=metrics,
        protocol=protocol,
        chunk_size=chunk_size,
        shard_size=shard_size,
        progress=progress,
        scheduler=scheduler,
        workers=workers,
        client=client,
        blas_threads=blas_threads,
        **fold_arguments(scorer, fold, users, name),
    )


def _blend_shard(sources: Any, weights: Any, normalizers: Any, seen: sp.csr_matrix, truth: sp.csr_matrix,
                 options: dict, users: np.ndarray) -> PartialResult:
    """One shard task of :func:`evaluate_blend_sharded`, run on a worker with one thread."""
    card = evaluate_blend_chunked(sources, weights, seen, truth, normalizers=normalizers, users=users, threads=1, **options)
    columns = {c: card.per_user[c].to_numpy() for c in card.metric_columns}
    return PartialResult(users, columns, {})


def evaluate_blend_sharded(
    sources: Mapping[str, Any],
    weights: Mapping[str, float],
    seen: sp.spmatrix,
    truth: sp.spmatrix,
    *,
    normalizers: str | Mapping[str, str] = "zscore",
    users: np.ndarray | None = None,
    ks: Sequence[int] | int = (10,),
    metrics: Sequence[str] = RANK_METRICS,
    chunk_size: int | None = None,
    shard_size: int | None = None,
    name: str = "blend",
    settings: dict | None = None,
    progress: bool = False,
    scheduler: str | None = None,
    workers: int | None = None,
    client: Client | None = None,
) -> Scorecard:
    """:func:`~xrec.evaluate.evaluate_blend_chunked` with the users sharded over a Dask cluster.

    The sources, weights and masks are sent once to every worker; each task evaluates one
    shard of users (whole chunks) with ``evaluate_blend_chunked(..., threads=1)``, whose
    BLAS runs on one thread as it does in one process, so the per-user values are
    identical to ``evaluate_blend_chunked`` in one process. Arguments as there, plus
    ``shard_size`` (users per task, rounded up to whole chunks; default about four shards
    per worker) and the cluster (``scheduler``, ``workers``, ``client``: see
    :func:`xrec.cluster.open_client`).

    Returns
    -------
    Scorecard
        Per-user rank metrics (no list metrics), as ``evaluate_blend_chunked`` returns.
    """
    ks, metrics, _ = check_run_settings(ks, metrics, 1)
    check_shard_size(shard_size)
    seen, truth, users = check_problem(seen, truth, users, None)
    n_items = truth.shape[1]
    if chunk_size is None:
        chunk_size = max(1, min(4096, DEFAULT_BLOCK_BYTES // (4 * n_items)))
    chunk_size = check_int(chunk_size, "chunk_size", low=1, expected="a positive int or None")
    options = {"ks": ks, "metrics": metrics, "chunk_size": int(chunk_size)}
    with open_client(scheduler, workers, client=client) as active:
        bounds = shard_bounds(len(users), int(chunk_size), shard_size, worker_count(active))
        shards = [(users[start:stop],) for start, stop in bounds]
        shared = (dict(sources), dict(weights), normalizers, seen, truth, options)
        parts = run_shards(active, _blend_shard, shared, shards, desc=name, progress=progress)
    inputs = EvalInputs(seen, truth, users, EvalOptions(ks, metrics, FullRanking(), int(chunk_size), n_items))
    return merge_partials(parts, inputs, name=name, settings=settings)
