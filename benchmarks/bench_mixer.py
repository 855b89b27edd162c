"""Latency of one slider move in the weight mixer, on the demo shop.

The demo shop (``demo_shop/``) is split leave-last-out; popularity, ALS, attributes and,
with ``--content``, text and image similarity (through the embedding cache) are fitted on
the validation fold's training rows. A :class:`xrec.notebook.WeightMixer` is built on the
validation fold and one slider is moved programmatically (``slider.value = x``) many
times; the time measured runs from the assignment until the mixer's chart data and
output are updated (the assignment returns at once and the mixer's update thread redraws,
so the clock stops when ``mixer.wait()`` returns; ``updates_`` is checked to have moved).
A drag is imitated too: 50 values assigned back to back, timed until the last one is
drawn, with the number of redraws they caused (coalescing keeps it far below 50).

Compared in the same process with the plain path a notebook would otherwise take for the
same move: ``evaluate(Blend(...), fold, users=mixer.users_)`` followed by building the
altair chart from scratch (``metric_bars`` + ``difference_bars``, ``to_dict``).

Cases: a stratified user sample (``--sample``, 500) and every evaluation user (the mixer's
default on the demo shop, whose 1,200 users are fewer than its default sample of 2,000).
Goal: a slider move under 150 ms.

Run: ``python benchmarks/bench_mixer.py [--repeats 20] [--content] [--sample 500]``.
Wall-clock numbers depend on the machine and its load; compare the ratios.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
from _results import save  # noqa: E402  (benchmarks/_results.py)


def _fit_sources(fold, content: bool) -> dict:
    from xrec.sources import ALSSource, AttributeSource, ImageSource, PopularitySource, TextSource

    sources = {
        "popularity": PopularitySource(),
        "als": ALSSource(factors=32, iterations=10, num_threads=1),
        "attributes": AttributeSource(),
    }
    if content:
        sources["text"] = TextSource()
        sources["image"] = ImageSource()
    out = {}
    for name, src in sources.items():
        t = time.perf_counter()
        out[name] = src.fit(fold)
        print(f"  fit {name:<11} {time.perf_counter() - t:7.2f} s")
    return out


def _plain_move(sources, fold, weights, users, baseline_card, k: int) -> None:
    import altair as alt
    import pandas as pd

    from xrec.blend import Blend
    from xrec.evaluate import evaluate
    from xrec.notebook.charts import difference_bars, metric_bars
    from xrec.notebook.mixer import interval_frame

    card = evaluate(Blend(sources, weights, "zscore").fit(fold), fold, users=users, ks=(k,), metrics=("hit_rate", "ndcg"), name="blend")
    cols = [f"hit_rate@{k}", f"ndcg@{k}"]
    summary = interval_frame({"baseline": baseline_card.per_user, "blend": card.per_user}, cols)
    diff = card.per_user[cols].to_numpy() - baseline_card.per_user.set_index("user").loc[card.per_user["user"], cols].to_numpy()
    diffs = pd.DataFrame({"candidate": "blend", "metric": cols, "difference": diff.mean(0), "ci_low": diff.mean(0), "ci_high": diff.mean(0)})
    alt.vconcat(metric_bars(summary, cols, baseline="baseline"), difference_bars(diffs)).to_dict()


def _time_mixer(mixer, name: str, values: list[float]) -> list[float]:
    times = []
    for v in values:
        before = mixer.updates_
        t = time.perf_counter()
        mixer.sliders[name].value = v
        mixer.wait()
        elapsed = time.perf_counter() - t
        assert mixer.updates_ == before + 1, "the slider move did not redraw"
        times.append(elapsed)
    return times


def _time_drag(mixer, name: str, values: list[float]) -> tuple[float, int]:
    """Seconds from the first of ``values`` to the last one drawn, and the redraws in between."""
    before = mixer.updates_
    t = time.perf_counter()
    for v in values:
        mixer.sliders[name].value = v
    mixer.wait()
    elapsed = time.perf_counter() - t
    assert mixer.weights[name] == values[-1]
    return elapsed, mixer.updates_ - before


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=20)
    parser.add_argument("--plain-repeats", type=int, default=3)
    parser.add_argument("--sample", type=int, default=500)
    parser.add_argument("--content", action="store_true", help="also text and image sources (encodes through the cache)")
    args = parser.parse_args()

    from xrec.data.demo import load_demo_shop
    from xrec.evaluate import evaluate
    from xrec.notebook import WeightMixer
    from xrec.split import split_dataset

    dataset = load_demo_shop()
    fold = split_dataset(dataset, "leave_last").validation
    print(f"demo shop: {fold.n_users} users ({len(fold.eval_users)} with a held-out item), {fold.n_items} items")
    sources = _fit_sources(fold, args.content)
    rng = np.random.default_rng(0)
    values = [round(float(v), 2) for v in rng.uniform(0.05, 1.0, size=args.repeats)]
    rows = []
    for label, sample in [(f"sample {args.sample}", args.sample), ("all users", len(fold.eval_users))]:
        t = time.perf_counter()
        mixer = WeightMixer(sources, fold, baseline="popularity", ks=(10,), sample_size=sample)
        build = time.perf_counter() - t
        moves = _time_mixer(mixer, "als", values)
        drag_s, drag_redraws = _time_drag(mixer, "als", [round(0.05 + 0.018 * i, 3) for i in range(50)])
        baseline_card = evaluate(sources["popularity"], fold, users=mixer.users_, ks=(10,), metrics=("hit_rate", "ndcg"), name="baseline")
        plain = []
        for v in values[: args.plain_repeats]:
            w = dict(mixer.weights)
            w["als"] = v
            t = time.perf_counter()
            _plain_move(sources, fold, w, mixer.users_, baseline_card, 10)
            plain.append(time.perf_counter() - t)
        med, best, worst = statistics.median(moves), min(moves), max(moves)
        plain_med = statistics.median(plain)
        print(
            f"{label:<12} users {len(mixer.users_):>5}  build {build:6.2f} s  slider move median {med * 1e3:7.1f} ms "
            f"(best {best * 1e3:.1f}, worst {worst * 1e3:.1f})  plain path median {plain_med * 1e3:8.1f} ms  "
            f"speed-up x{plain_med / med:.1f}  goal <150 ms: {'met' if med < 0.150 else 'MISSED'}  "
            f"drag of 50 values: {drag_s * 1e3:.0f} ms to the last one drawn, {drag_redraws} redraws"
        )
        rows.append({"users": label, "n_users": len(mixer.users_), "build_s": build, "move_median_s": med, "move_best_s": best,
                     "move_worst_s": worst, "plain_median_s": plain_med, "drag50_s": drag_s, "drag50_redraws": drag_redraws})
    save("bench_mixer", {"content": args.content, "rows": rows})


if __name__ == "__main__":
    main()
