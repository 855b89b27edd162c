"""Sharded evaluation on a Dask LocalCluster against one process, on a generated problem.

The problem comes from the seeded scale generator (``xrec.evaluate._synthetic_scale``):
users × items with ~144 training items per user on the ML-20M shape, four already
fitted sources (ALS-like factors, two item-vector sources, popularity) blended with
z-score normalizers and the generator's default weights. Two paths (``--path``):

* ``chunked`` (default): :func:`~xrec.evaluate.evaluate_blend_chunked` (one thread per
  core) against :func:`~xrec.evaluate.evaluate_blend_sharded`;
* ``general``: :func:`~xrec.evaluate.evaluate_blocks` with a :class:`~xrec.blend.Blend`
  as the scorer against :func:`~xrec.evaluate.evaluate_blocks_sharded`.

The problem is generated once; for each worker count a LocalCluster of single-thread
worker processes is started (start-up reported apart, not in the times) and the
one-process run and the sharded run alternate ``--repeats`` times, so both see the same
machine load; the ratio of each pair is reported. The engine's overhead is
``wall - (sum of the shard tasks' compute time) / N``: what sending the inputs,
scheduling and collecting cost beyond perfectly shared work. Every sharded run's
per-user values are checked equal to the one-process values.

Run: ``PYTHONPATH=$PWD python benchmarks/bench_dask.py [--shape ml-20m] [--users N]
[--workers 1,2] [--repeats 2] [--path chunked|general]``. Absolute times depend on the
machine and its load (printed with the results); the paired ratios are what to look at.
"""

from __future__ import annotations

import argparse
import os
import statistics
import time
from types import SimpleNamespace

import numpy as np

from xrec.blend import Blend
from xrec.cluster import open_client
from xrec.evaluate import (
    as_score_fn,
    evaluate_blend_chunked,
    evaluate_blend_sharded,
    evaluate_blocks,
    evaluate_blocks_sharded,
)
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


def runners(problem, path: str, blas: str | int):
    """``(one_process(), sharded(client))`` for the chosen path."""
    kw = dict(ks=(10,), metrics=METRICS)
    if path == "general":
        blend = blend_of(problem)
        return (
            lambda: evaluate_blocks(as_score_fn(blend), problem.train, problem.heldout, name="blend", **kw),
            lambda client: evaluate_blocks_sharded(
                blend, problem.train, problem.heldout, name="blend", client=client, blas_threads=blas, **kw
            ),
        )
    args = (problem.sources, problem.weights, problem.train, problem.heldout)
    return (
        lambda: evaluate_blend_chunked(*args, **kw),
        lambda client: evaluate_blend_sharded(*args, client=client, **kw),
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shape", default="ml-20m", choices=sorted(SHAPES))
    parser.add_argument("--users", type=int, default=None, help="fewer users than the shape (a quick run)")
    parser.add_argument("--workers", default="1,2", help="comma-separated worker counts (default: %(default)s)")
    parser.add_argument("--repeats", type=int, default=2, help="one-process / sharded pairs per worker count")
    parser.add_argument("--path", default="chunked", choices=("chunked", "general"))
    parser.add_argument("--blas-threads", default="same",
                        help="general path: workers' BLAS threads, 'same' as this process (identical values) or a number")
    args = parser.parse_args()
    from distributed import get_task_stream

    t0 = time.perf_counter()
    problem = scale_problem(args.shape, n_users=args.users, seed=0)
    made = time.perf_counter() - t0
    cells = problem.n_users * problem.n_items
    print(f"{args.shape}: {problem.n_users:,} users × {problem.n_items:,} items, {problem.train.nnz:,} training rows "
          f"(generated in {made:.1f} s); {args.path} path; load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    blas = args.blas_threads if args.blas_threads == "same" else int(args.blas_threads)
    one_process, sharded = runners(problem, args.path, blas)

    print(f"{'workers':>7}{'pair':>5}{'one process s':>15}{'sharded s':>11}{'ratio':>7}{'task compute s':>16}"
          f"{'overhead s':>12}{'cluster start s':>17}{'load':>6}")
    ratios: dict[int, list[float]] = {}
    for n in (int(w) for w in args.workers.split(",")):
        t0 = time.perf_counter()
        with open_client(workers=n) as client:
            started = time.perf_counter() - t0
            for pair in range(args.repeats):
                t0 = time.perf_counter()
                reference = one_process()
                single = time.perf_counter() - t0
                t0 = time.perf_counter()
                with get_task_stream(client) as stream:
                    card = sharded(client)
                wall = time.perf_counter() - t0
                compute = task_compute_seconds(stream.data)
                for col in reference.per_user.columns:
                    if not np.array_equal(card.per_user[col].to_numpy(), reference.per_user[col].to_numpy(), equal_nan=True):
                        raise SystemExit(f"{n} workers: per-user {col} differs from one process")
                ratios.setdefault(n, []).append(wall / single)
                print(f"{n:>7}{pair + 1:>5}{single:>15.1f}{wall:>11.1f}{wall / single:>7.2f}{compute:>16.1f}"
                      f"{wall - compute / n:>12.1f}{started:>17.1f}{os.getloadavg()[0]:>6.1f}", flush=True)
    for n, values in ratios.items():
        print(f"{n} worker(s): sharded / one process, median of {len(values)} pairs: {statistics.median(values):.2f}× "
              f"({cells / 1e9:.2f}·10^9 cells)")
    print("per-user values of every sharded run equal the one-process values")


if __name__ == "__main__":
    main()
