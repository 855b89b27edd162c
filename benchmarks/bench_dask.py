"""Sharded evaluation of any scorer on a Dask LocalCluster against one process, on a generated problem.

This measures the general path (a :class:`~xrec.blend.Blend` as the scorer of
:func:`~xrec.evaluate.evaluate_blocks`); the fast path for blends of fitted sources,
``evaluate_blend_chunked`` against ``evaluate_blend_sharded``, is measured by the
``dask-1`` / ``dask-2`` engines of ``benchmarks/bench_scale.py``.

The problem comes from the seeded scale generator (``xrec.evaluate._synthetic_scale``):
users × items with ~144 training items per user on the ML-20M shape, four already
fitted sources (ALS-like factors, two item-vector sources, popularity) blended with
z-score normalizers and the generator's default weights. Measured, in this process:

* ``one process``: :func:`xrec.evaluate.evaluate_blocks` over every user;
* ``dask N``: :func:`xrec.evaluate.evaluate_blocks_sharded` on a LocalCluster of N
  single-thread worker processes (cluster start-up reported apart, not in the time).

For the Dask rows the engine's overhead is ``wall - (sum of the shard tasks' compute
time) / N``: what sending the scorer and masks, scheduling and collecting cost beyond
perfectly shared work. Every run's per-user values are checked equal to one process's.

Run: ``python benchmarks/bench_dask.py [--shape ml-20m] [--users N] [--workers 1,2]``.
Absolute times depend on the machine and its load (printed with the results); the
ratios against the one-process time are what to look at.
"""

from __future__ import annotations

import argparse
import os
import time
from types import SimpleNamespace

import numpy as np

from xrec.blend import Blend
from xrec.cluster import open_client
from xrec.evaluate import as_score_fn, evaluate_blocks, evaluate_blocks_sharded
from xrec.evaluate._synthetic_scale import SHAPES, scale_problem

METRICS = ("hit_rate", "ndcg", "recall", "mrr")


def blend_of(problem) -> Blend:
    """The generator's four fitted sources blended with z-score normalizers and default weights."""
    # The sources are fitted already; the blend only needs the seen rows and the catalog size,
    # so a stand-in holding the generated rows replaces a Fold (whose row frames cost memory).
    rows = SimpleNamespace(train_matrix=problem.train, n_items=problem.n_items, settings=dict(problem.settings))
    return Blend(problem.sources, problem.weights, normalizers="zscore").fit(rows)


def task_compute_seconds(stream: list[dict]) -> float:
    """Sum of the compute phases of the tasks in a ``get_task_stream`` record."""
    return sum(s["stop"] - s["start"] for task in stream for s in task.get("startstops", ()) if s["action"] == "compute")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shape", default="ml-20m", choices=sorted(SHAPES))
    parser.add_argument("--users", type=int, default=None, help="fewer users than the shape (a quick run)")
    parser.add_argument("--workers", default="1,2", help="comma-separated worker counts (default: %(default)s)")
    parser.add_argument("--chunk-size", type=int, default=1024)
    parser.add_argument("--blas-threads", default="same",
                        help="workers' BLAS threads while scoring: 'same' as this process (identical values) or a number")
    args = parser.parse_args()
    from distributed import get_task_stream

    t0 = time.perf_counter()
    problem = scale_problem(args.shape, n_users=args.users, seed=0)
    blend = blend_of(problem)
    made = time.perf_counter() - t0
    cells = problem.n_users * problem.n_items
    print(f"{args.shape}: {problem.n_users:,} users × {problem.n_items:,} items, {problem.train.nnz:,} training rows "
          f"(generated in {made:.1f} s); load average at start {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    kw = dict(ks=(10,), metrics=METRICS, chunk_size=args.chunk_size)
    blas = args.blas_threads if args.blas_threads == "same" else int(args.blas_threads)

    t0 = time.perf_counter()
    reference = evaluate_blocks(as_score_fn(blend), problem.train, problem.heldout, name="blend", **kw)
    single = time.perf_counter() - t0
    rows = [("one process", single, None, None, None)]
    for n in (int(w) for w in args.workers.split(",")):
        t0 = time.perf_counter()
        with open_client(workers=n) as client:
            started = time.perf_counter() - t0
            t0 = time.perf_counter()
            with get_task_stream(client) as stream:
                card = evaluate_blocks_sharded(
                    blend, problem.train, problem.heldout, name="blend", client=client, blas_threads=blas, **kw
                )
            wall = time.perf_counter() - t0
            compute = task_compute_seconds(stream.data)
        differing = [
            col for col in reference.per_user.columns
            if not np.array_equal(card.per_user[col].to_numpy(), reference.per_user[col].to_numpy(), equal_nan=True)
        ]
        if differing and blas == "same":
            raise SystemExit(f"dask {n}: per-user {differing} differ from one process")
        if differing:
            print(f"dask {n}: per-user {differing} differ in some users (BLAS threads {blas} instead of this process's)")
        rows.append((f"dask {n} worker{'s' if n > 1 else ''}", wall, started, compute, wall - compute / n))

    print(f"load average at end {os.getloadavg()[0]:.1f}")
    print(f"{'run':<16}{'wall s':>9}{'× one process':>15}{'Mcells/s':>10}{'cluster start s':>17}{'task compute s':>16}{'overhead s':>12}")
    for name, wall, started, compute, overhead in rows:
        extra = "" if started is None else f"{started:>17.1f}{compute:>16.1f}{overhead:>12.1f}"
        print(f"{name:<16}{wall:>9.1f}{wall / single:>15.2f}{cells / wall / 1e6:>10.0f}{extra}")
    print(f"workers' BLAS threads: {blas}; per-user values were compared with one process's")


if __name__ == "__main__":
    main()
