"""Full-ranking evaluation of a normalized, weighted blend with memory bounded by the chunk.

:func:`evaluate_blend_chunked` scores every item for every evaluated user, a chunk of users
at a time, and ranks the held-out items with the evaluator's counting core
(:func:`xrec.evaluate.rank_heldout`). Low-rank sources with ``"none"`` or ``"zscore"``
normalizers are multiplied out together as one product (see
:mod:`xrec.evaluate._factor_blend`), with exact z-score statistics from the factors; other
sources (min-max or rank normalizers, sources that are not low-rank) are scored and
normalized as blocks per chunk with :func:`xrec.blend.normalize.normalize`. Peak memory is
about ``threads × chunk_size × n_items × 4`` bytes beyond the inputs.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp
from threadpoolctl import threadpool_limits
from tqdm.auto import tqdm

from xrec.blend.normalize import normalize
from xrec.errors import ConfigError, DataError
from xrec.evaluate._factor_blend import FactorBlend, blend_product
from xrec.evaluate._metrics import RANK_METRICS, check_cutoffs, metric_column, metrics_from_ranks
from xrec.evaluate._ranking import canonical_rows, check_users, rank_heldout
from xrec.evaluate.protocols import FullRanking
from xrec.evaluate.scorecard import Scorecard

#: Score-block budget per worker thread when ``chunk_size`` is not given.
DEFAULT_BLOCK_BYTES = 64 << 20


def check_problem(
    seen: sp.spmatrix, truth: sp.spmatrix, users: np.ndarray | None, n_items: int | None
) -> tuple[sp.csr_matrix, sp.csr_matrix, np.ndarray]:
    """Canonical seen / truth CSR and the evaluated users (default: every user with a held-out item)."""
    if not sp.issparse(seen) or not sp.issparse(truth):
        raise DataError("seen and truth must be scipy sparse matrices (users × items)")
    if seen.shape != truth.shape:
        raise DataError(f"seen mask has shape {seen.shape} but held-out matrix has {truth.shape}")
    n_users, n = truth.shape
    if n_items is not None and n != n_items:
        raise DataError(f"the sources score {n_items} items, the held-out matrix has {n} columns")
    seen = canonical_rows(seen, n_users, n, "seen mask")
    truth = canonical_rows(truth, n_users, n, "held-out matrix")
    users = check_users(users, truth)
    return seen, truth, users


def check_run_settings(ks: Sequence[int] | int, metrics: Sequence[str], threads: int | None) -> tuple[tuple[int, ...], tuple[str, ...], int]:
    """Checked cut-offs, rank metrics and worker-thread count (``None``: one per CPU)."""
    if isinstance(ks, (int, np.integer)):
        ks = (ks,)
    ks = tuple(ks)
    if not ks or any(isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k <= 0 for k in ks):
        raise ConfigError(f"ks must be positive integers, got {list(ks)}")
    metrics = (metrics,) if isinstance(metrics, str) else tuple(metrics)
    bad = [m for m in metrics if m not in RANK_METRICS]
    if not metrics or bad:
        raise ConfigError(f"metrics: choose among the rank metrics {list(RANK_METRICS)}, got {list(metrics)}")
    if threads is None:
        threads = os.cpu_count() or 1
    if isinstance(threads, bool) or not isinstance(threads, (int, np.integer)) or threads < 1:
        raise ConfigError(f"threads must be a positive integer or None, got {threads!r}")
    return tuple(sorted({int(k) for k in ks})), tuple(dict.fromkeys(metrics)), int(threads)


def rows_of(m: sp.csr_matrix, users: np.ndarray) -> sp.csr_matrix:
    """Rows ``users`` of a canonical CSR, still canonical."""
    out = m[users]
    out.has_canonical_format = True
    return out


def run_chunks(work, n_users: int, chunk_size: int, threads: int, desc: str, progress: bool) -> list:
    """``work(lo, hi)`` over user chunks, on ``threads`` threads; results in chunk order.

    BLAS and OpenMP (faiss) are limited to one thread each while it runs: the workers are
    the parallelism, and BLAS threads that wait for each other on a busy machine can make
    a small product a hundred times slower.
    """
    bounds = [(lo, min(lo + chunk_size, n_users)) for lo in range(0, n_users, chunk_size)]
    results: list = [None] * len(bounds)
    bar = tqdm(total=len(bounds), desc=desc, unit="chunk", disable=not progress)
    lock = threading.Lock()
    errors: list[BaseException] = []

    def loop(worker: int) -> None:
        try:
            for i in range(worker, len(bounds), threads):
                if errors:
                    return
                results[i] = work(*bounds[i])
                with lock:
                    bar.update(1)
        except BaseException as exc:  # re-raised in the calling thread
            errors.append(exc)

    try:
        with threadpool_limits(1):
            if threads == 1:
                loop(0)
            else:
                pool = [threading.Thread(target=loop, args=(w,)) for w in range(threads)]
                for t in pool:
                    t.start()
                for t in pool:
                    t.join()
    finally:
        bar.close()
    if errors:
        raise errors[0]
    return results


def evaluate_blend_chunked(
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
    threads: int | None = None,
    name: str = "blend",
    settings: dict | None = None,
    progress: bool = False,
) -> Scorecard:
    """Full-ranking metrics of ``Σ_s w_s · normalize_s(source_s)`` for every user, chunk by chunk.

    The blend is the one :class:`~xrec.blend.Blend` computes (normalizer statistics over
    each user's candidates, the items not seen in training); its ranks are those of the
    evaluator's tie rule (ties never favour the scorer). Z-score statistics of low-rank
    sources come exactly from their factors, so blended values can differ from
    ``evaluate(Blend(...), fold)`` in the last float32 bits (and ranks only where two items
    tie to within that rounding).

    Parameters
    ----------
    sources
        Name -> fitted source (e.g. fitted on a fold's training rows).
    weights
        Name -> weight >= 0, one per source, at least one positive.
    seen
        ``(n_users, n_items)`` sparse training matrix (``fold.train_matrix``): never candidates.
    truth
        ``(n_users, n_items)`` sparse held-out matrix (``fold.heldout_matrix``).
    normalizers
        One of ``"none"``, ``"minmax"``, ``"zscore"``, ``"rank"``, or one per source.
    users
        User indices to evaluate; default every user with a held-out item.
    ks, metrics
        Cut-offs and rank metrics (``hit_rate``, ``ndcg``, ``recall``, ``mrr``).
    chunk_size
        Users per chunk; default keeps each score block near 64 MiB.
    threads
        Worker threads, each taking every ``threads``-th chunk with BLAS limited to one
        thread (numpy releases the GIL); ``None`` = one per CPU.
    name, settings
        Label and fold settings copied into the scorecard.
    progress
        Show a progress bar over chunks.

    Returns
    -------
    Scorecard
        Per-user rank metrics (no list metrics), protocol full ranking.
    """
    ks, metrics, threads = check_run_settings(ks, metrics, threads)
    with threadpool_limits(1):
        blend = FactorBlend(sources, weights, normalizers)
    n_items = blend.item_side.shape[0] if blend.item_side is not None else None
    seen, truth, users = check_problem(seen, truth, users, n_items)
    n_items = truth.shape[1]
    check_cutoffs(ks, n_items)  # a K beyond the catalog is refused, as everywhere in xrec
    if chunk_size is None:
        chunk_size = max(1, min(4096, DEFAULT_BLOCK_BYTES // (4 * n_items)))
    if isinstance(chunk_size, bool) or not isinstance(chunk_size, (int, np.integer)) or chunk_size < 1:
        raise ConfigError(f"chunk_size must be a positive int or None, got {chunk_size!r}")
    local = threading.local()

    def work(lo: int, hi: int) -> dict[str, np.ndarray]:
        chunk = users[lo:hi]
        seen_rows, truth_rows = rows_of(seen, chunk), rows_of(truth, chunk)
        buf = getattr(local, "buf", None)
        if buf is None or buf.shape[0] < len(chunk):
            buf = local.buf = np.empty((chunk_size, n_items), dtype=np.float32)
        block = buf[: len(chunk)]
        if blend.linear:
            blend_product(blend.user_side(chunk, blend.slopes(chunk, seen_rows)), blend.item_side, out=block)
        else:
            block[:] = 0.0
        for src in blend.blocks:
            raw = np.asarray(blend.sources[src].score(chunk))
            if raw.shape != block.shape:
                raise DataError(f"source {src!r} returned scores of shape {raw.shape}, expected {block.shape}")
            part = normalize(raw, blend.normalizers[src], seen_rows)
            part *= np.float32(blend.weights[src])
            block += part
        ranks = rank_heldout(block, seen_rows, truth_rows)
        return metrics_from_ranks(ranks, ks, metrics)

    parts = run_chunks(work, len(users), int(chunk_size), threads, name, progress)
    columns: dict[str, np.ndarray] = {"user": users}
    for m in metrics:
        for k in ks:
            col = metric_column(m, k)
            columns[col] = np.concatenate([p[col] for p in parts])
    return Scorecard(
        name=name,
        per_user=pd.DataFrame(columns),
        list_metrics={},
        ks=ks,
        protocol=FullRanking().describe(),
        fold_settings=dict(settings or {}),
        n_items=n_items,
    )
