"""Cost of evaluating a 4-source blend as the problem grows: time, peak memory, cells per second.

Problems come from the seeded generator :mod:`xrec.evaluate._synthetic_scale` (ALS-like
factors, two item-vector sources scored as user profile × item vectors, popularity; one
held-out item per user). The blend is z-score normalized and weighted
(``als 1.0, text 0.5, image 0.3, popularity 0.2``).

Every (case, engine) pair runs in its own subprocess, so peak memory is that case's alone:

* ``wall_s``: evaluation time (the problem's generation is not counted, it is reported apart);
* ``peak_rss_gb``: the process's peak resident memory during the evaluation (sampled every
  20 ms with psutil) and ``max_rss_gb`` over the whole process (generation included);
* ``cells_per_s``: evaluated users × items / ``wall_s``.

Engines (pluggable: ``ENGINES[name] = fn(problem, users, case) -> dict``; another script can
import this module, add its own engines and call ``main()``; the per-case subprocesses re-run
that script, so its engines exist there too): ``evaluate-blend`` (the general path,
``evaluate(Blend(...), fold)``, as a baseline), ``chunked`` (full ranking, :func:`evaluate_blend_chunked`,
one worker thread per CPU), ``chunked-1`` (one thread), ``candidates-faiss`` and
``candidates-numpy`` (:func:`evaluate_candidates`, top-100 per source), ``screen``
(:func:`evaluate_screened`; its lists are built once per catalog, so only the rest is
extrapolated), ``screen-vs-full`` (in ONE process: full ranking on the sample, the
screen on every user, metrics compared on the sample, speed-up reported), ``dask-1`` and
``dask-2`` (:func:`evaluate_blend_sharded`: the chunked evaluation sharded by users over a
Dask LocalCluster of 1 or 2 single-thread worker processes; ``wall_s`` includes starting
the cluster, reported apart with the sharded evaluation's own time; the RSS columns are
the calling process's only, the workers' peak resident memory is reported apart).

Cases (``--cases``): ``ml-1m``, ``ml-20m``, the growth sweep ``grow-1`` … ``grow-5`` (users ×
items from 2·10^7 to 3.7·10^9 cells) and ``catalog-1m`` (10^6 items × 10^5 users). On the
10^6-item catalog both modes are run on the same sample of ``--sample`` users and their
times extrapolated linearly to all users (the work per user does not depend on the other
users); the report says so.

Run: ``python benchmarks/bench_scale.py [--cases ml-1m ml-20m ...] [--engines ...]``; results
go to ``benchmarks/results/bench_scale.json`` and ``.md``. Absolute times depend on the
machine and its load (the uptime load average is recorded with each row).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
RESULTS = ROOT / "benchmarks" / "results"
KS = (10,)

#: name -> (users, items, training items per user, users evaluated or None for all)
CASES: dict[str, tuple[int, int, int, int | None]] = {
    "ml-1m": (6_040, 3_706, 165, None),
    "grow-1": (10_000, 2_000, 40, None),
    "grow-2": (20_000, 5_000, 60, None),
    "grow-3": (40_000, 10_000, 80, None),
    "grow-4": (80_000, 15_000, 100, None),
    "ml-20m": (138_493, 26_744, 144, None),
    "catalog-1m": (100_000, 1_000_000, 50, 2_000),
}
GROWTH = ("grow-1", "grow-2", "grow-3", "grow-4", "ml-20m")
#: engines run per case when --engines is not given (others: ["chunked"])
DEFAULT_ENGINES = {
    "ml-1m": ["evaluate-blend", "chunked", "chunked-1"],
    "catalog-1m": ["chunked", "candidates-numpy", "screen", "screen-vs-full"],
    "ml-20m": ["chunked", "dask-1", "dask-2"],
}


def _chunked(threads: int | None) -> Callable:
    def run(problem, users, case):
        from xrec.evaluate import evaluate_blend_chunked

        card = evaluate_blend_chunked(
            problem.sources, problem.weights, problem.train, problem.heldout, users=users, ks=KS, threads=threads
        )
        return {"ndcg@10": float(card.per_user["ndcg@10"].mean()), "hit_rate@10": float(card.per_user["hit_rate@10"].mean())}

    return run


def _candidates(backend: str, top_n: int = 100) -> Callable:
    def run(problem, users, case):
        from xrec.evaluate import evaluate_candidates

        res = evaluate_candidates(
            problem.sources, problem.weights, problem.train, problem.heldout, users=users, ks=KS, top_n=top_n, backend=backend
        )
        summary = res.summary()
        return {
            "top_n": top_n,
            "certified_share": res.certified_share,
            "exact_share@10": res.exact_share(10),
            "ndcg@10 (exact users)": float(summary.loc["ndcg@10", "exact_mean"]),
            "ndcg@10 (certified users)": float(summary.loc["ndcg@10", "certified_mean"]),
        }

    return run


def _screen_summary(res, n_users: int, n_eval: int, wall: float) -> dict:
    lists_s = res.settings["lists_s"]
    return {
        "ranked_in_full_share": res.certified_share,
        "exact_share@10": res.exact_share(10),
        "ndcg@10": float(res.per_user["ndcg@10"].mean()),
        "lists_s": lists_s,
        "n_lists": res.settings["n_lists"],
        "probes": res.settings["probes"],
        # The lists are built once per catalog; only the rest grows with the users.
        "wall_all_users_s": lists_s + (wall - lists_s) * n_users / n_eval,
    }


def _screen(problem, users, case):
    """:func:`evaluate_screened` on the case's users (lists built once, then extrapolated)."""
    import time

    from xrec.evaluate import evaluate_screened

    t0 = time.perf_counter()
    res = evaluate_screened(problem.sources, problem.weights, problem.train, problem.heldout, users=users, ks=KS)
    wall = time.perf_counter() - t0
    n_eval = problem.n_users if users is None else len(users)
    return _screen_summary(res, problem.n_users, n_eval, wall)


def _screen_vs_full(problem, users, case):
    """Full ranking on the sample and the screen on EVERY user, in one process.

    The screen's time for all users is measured, not extrapolated; the full ranking's is
    extrapolated from the sample (all users would take half an hour); the per-user metrics
    of the sample must be equal (checked here).
    """
    import time

    from xrec.evaluate import evaluate_blend_chunked, evaluate_screened

    sample = np.arange(problem.n_users) if users is None else users
    t0 = time.perf_counter()
    card = evaluate_blend_chunked(problem.sources, problem.weights, problem.train, problem.heldout, users=sample, ks=KS)
    full_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    res = evaluate_screened(problem.sources, problem.weights, problem.train, problem.heldout, ks=KS)
    screen_s = time.perf_counter() - t0
    cols = [c for c in card.per_user.columns if c != "user"]
    mine = res.per_user.set_index("user").loc[sample, cols].to_numpy()
    full_all = full_s * problem.n_users / len(sample)
    return {
        "wall_all_users_s": None,  # two engines in this row: see the fields below
        "full_sample_users": len(sample),
        "full_sample_s": full_s,
        "full_all_users_s": full_all,
        "screen_all_users_s": screen_s,
        "speedup": full_all / screen_s,
        "equal_on_sample": bool(np.array_equal(mine, card.per_user[cols].to_numpy())),
        "ranked_in_full_share": res.certified_share,
        "exact_share@10": res.exact_share(10),
        "lists_s": res.settings["lists_s"],
        "ndcg@10": float(res.per_user["ndcg@10"].mean()),
    }


def _evaluate_blend(problem, users, case):
    """The general path, as a baseline: ``evaluate(Blend(...), fold)``."""
    from xrec.blend import Blend
    from xrec.evaluate import evaluate

    fold = problem.fold
    card = evaluate(Blend(problem.sources, problem.weights).fit(fold), fold, ks=KS, metrics=("hit_rate", "ndcg"), users=users)
    return {"ndcg@10": float(card.per_user["ndcg@10"].mean()), "hit_rate@10": float(card.per_user["hit_rate@10"].mean())}


def _dask(workers: int) -> Callable:
    def run(problem, users, case):
        from xrec.cluster import open_client
        from xrec.evaluate import evaluate_blend_sharded

        t0 = time.perf_counter()
        with open_client(workers=workers) as client:
            started = time.perf_counter() - t0
            t1 = time.perf_counter()
            card = evaluate_blend_sharded(
                problem.sources, problem.weights, problem.train, problem.heldout, users=users, ks=KS, client=client
            )
            sharded = time.perf_counter() - t1
            # ru_maxrss: each worker process's peak resident memory (KiB on Linux)
            rss = sum(client.run(lambda: __import__("resource").getrusage(0).ru_maxrss * 1024).values())
        return {
            "ndcg@10": float(card.per_user["ndcg@10"].mean()),
            "hit_rate@10": float(card.per_user["hit_rate@10"].mean()),
            "cluster_start_s": started,
            "sharded_eval_s": sharded,
            "workers_rss_gb": rss / 1e9,
        }

    return run


#: engine name -> fn(problem, users, case) -> dict of extra columns
ENGINES: dict[str, Callable] = {
    "evaluate-blend": _evaluate_blend,
    "chunked": _chunked(None),
    "chunked-1": _chunked(1),
    "candidates-faiss": _candidates("faiss"),
    "candidates-numpy": _candidates("numpy"),
    "screen": _screen,
    "screen-vs-full": _screen_vs_full,
    "dask-1": _dask(1),
    "dask-2": _dask(2),
}


class _PeakSampler:
    """Largest resident set size of this process while running (psutil, every 20 ms)."""

    def __init__(self) -> None:
        import psutil

        self._proc = psutil.Process()
        self.peak = self._proc.memory_info().rss
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def _loop(self) -> None:
        while not self._stop.wait(0.02):
            self.peak = max(self.peak, self._proc.memory_info().rss)

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self._proc.memory_info().rss)


def run_case(case: str, engine: str) -> dict:
    """Generate ``case``'s problem and evaluate it with ``engine``, in this process."""
    import resource

    from xrec.evaluate._synthetic_scale import make_scale_problem

    n_users, n_items, per_user, sample = CASES[case]
    t0 = time.perf_counter()
    problem = make_scale_problem(n_users, n_items, per_user, seed=0)
    gen_s = time.perf_counter() - t0
    users = None if sample is None else np.sort(np.random.default_rng(1).choice(n_users, sample, replace=False))
    n_eval = n_users if users is None else len(users)
    load = os.getloadavg()[0]
    with _PeakSampler() as mem:
        t0 = time.perf_counter()
        extra = ENGINES[engine](problem, users, {"name": case})
        wall = time.perf_counter() - t0
    row = {
        "case": case,
        "engine": engine,
        "users": n_users,
        "items": n_items,
        "train_rows": int(problem.train.nnz),
        "evaluated_users": n_eval,
        "wall_s": wall,
        "cells_per_s": n_eval * n_items / wall,
        "peak_rss_gb": mem.peak / 1e9,
        "max_rss_gb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9,
        "generate_s": gen_s,
        "load_1min": load,
    }
    if sample is not None:
        row["wall_all_users_s"] = wall * n_users / n_eval  # extrapolated, linear in users
    row.update(extra)
    return row


def _subprocess(case: str, engine: str, extra_args: list[str]) -> dict:
    # Re-run the script that was started (it may be another module that added engines).
    script = getattr(sys.modules["__main__"], "__file__", None) or __file__
    cmd = [sys.executable, str(script), "--one", case, engine, *extra_args]
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env, cwd=ROOT)
    return json.loads(out.stdout.strip().splitlines()[-1])


def growth_exponent(rows: list[dict], engine: str) -> float | None:
    """Least-squares slope of log(time) against log(users × items) over the growth cases."""
    pts = [(r["evaluated_users"] * r["items"], r["wall_s"]) for r in rows if r["engine"] == engine and r["case"] in GROWTH]
    if len(pts) < 4:
        return None
    x, y = np.log([p[0] for p in pts]), np.log([p[1] for p in pts])
    return float(np.polyfit(x, y, 1)[0])


def to_markdown(rows: list[dict], exponents: dict[str, float | None]) -> str:
    lines = [
        "| case | engine | users × items | evaluated users | wall s | cells/s | peak RSS GB (eval) | max RSS GB (process) | notes |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        notes = [f"load {r['load_1min']:.1f}"]
        if r.get("wall_all_users_s") is not None:
            notes.append(f"all {r['users']:,} users ≈ {r['wall_all_users_s']:,.0f} s (extrapolated)")
        if "speedup" in r:
            notes.append(
                f"one process: full ranking of {r['full_sample_users']:,} users {r['full_sample_s']:.1f} s → all users ≈ "
                f"{r['full_all_users_s']:,.0f} s (extrapolated); screen of ALL users {r['screen_all_users_s']:.1f} s (measured, "
                f"lists {r['lists_s']:.1f} s): **{r['speedup']:.1f}× faster**; metrics equal on the sample: {r['equal_on_sample']}"
            )
        if "ranked_in_full_share" in r:
            notes.append(f"screen: ranked in full {r['ranked_in_full_share']:.1%}, exact@10 {r['exact_share@10']:.1%}, lists {r['lists_s']:.1f} s")
        if "certified_share" in r:
            notes.append(f"top-{r['top_n']}: certified {r['certified_share']:.1%}, exact@10 {r['exact_share@10']:.1%}")
        if "cluster_start_s" in r:
            notes.append(
                f"cluster start {r['cluster_start_s']:.1f} s + sharded evaluation {r['sharded_eval_s']:.1f} s; "
                f"workers' peak RSS, added up, {r['workers_rss_gb']:.2f} GB"
            )
        if "ndcg@10" in r:
            notes.append(f"ndcg@10 {r['ndcg@10']:.4f}")
        elif "ndcg@10 (exact users)" in r:
            notes.append(f"ndcg@10 over exact users {r['ndcg@10 (exact users)']:.4f}")
        lines.append(
            f"| {r['case']} | {r['engine']} | {r['users']:,} × {r['items']:,} | {r['evaluated_users']:,} | {r['wall_s']:.2f} | "
            f"{r['cells_per_s']:.3g} | {r['peak_rss_gb']:.2f} | {r['max_rss_gb']:.2f} | {'; '.join(notes)} |"
        )
    single = {r["case"]: r["wall_s"] for r in rows if r["engine"] == "chunked"}
    for r in rows:
        if "sharded_eval_s" in r and r["case"] in single:
            lines.append(
                f"\n{r['case']}, {r['engine']} / chunked (one process): {r['wall_s'] / single[r['case']]:.2f}× with the "
                f"cluster start, {r['sharded_eval_s'] / single[r['case']]:.2f}× without"
            )
    for engine, b in exponents.items():
        if b is not None:
            lines.append(f"\nGrowth exponent of time in users × items ({engine}, cases {', '.join(GROWTH)}): **{b:.2f}**")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", nargs="+", default=["ml-1m", *GROWTH[:-1], "ml-20m", "catalog-1m"], choices=sorted(CASES))
    parser.add_argument("--engines", nargs="+", default=None, help="default: DEFAULT_ENGINES per case, else chunked")
    parser.add_argument("--sample", type=int, default=None, help="users evaluated on catalog-1m (default 2000)")
    parser.add_argument("--out", default=str(RESULTS / "bench_scale"))
    parser.add_argument("--one", nargs=2, metavar=("CASE", "ENGINE"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.sample is not None:
        users, items, per_user, _ = CASES["catalog-1m"]
        CASES["catalog-1m"] = (users, items, per_user, args.sample)
    if args.one:
        print(json.dumps(run_case(*args.one)))
        return
    extra = [] if args.sample is None else ["--sample", str(args.sample)]
    rows = []
    for case in args.cases:
        engines = args.engines or DEFAULT_ENGINES.get(case, ["chunked"])
        for engine in engines:
            row = _subprocess(case, engine, extra)
            rows.append(row)
            print(f"{case:>11} {engine:>17}: {row['wall_s']:8.2f} s, {row['cells_per_s']:.3g} cells/s, peak {row['peak_rss_gb']:.2f} GB", flush=True)
    exponents = {e: growth_exponent(rows, e) for e in dict.fromkeys(r["engine"] for r in rows)}
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    from xrec._files import write_text_atomic

    write_text_atomic(out.with_suffix(".json"), json.dumps({"rows": rows, "growth_exponent": exponents}, indent=2))
    write_text_atomic(out.with_suffix(".md"), to_markdown(rows, exponents))
    print(to_markdown(rows, exponents))


if __name__ == "__main__":
    main()
