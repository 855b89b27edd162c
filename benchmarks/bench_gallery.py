"""Cost of a gallery redraw after a slider move, on the demo shop (in-process, no browser).

The demo shop is split leave-last-out; popularity, ALS, attributes, text and image
similarity (through the embedding cache) are fitted on the validation fold's training rows.
A :class:`xrec.notebook.WeightMixer` is built on the validation fold with a
:class:`xrec.notebook.Gallery` following it, and one slider is moved programmatically many
times (``slider.value = x``, then ``mixer.wait()``: the mixer redraws its chart and then
calls the gallery on its update thread).

Measured in alternating rounds, in the same process:

* ``mixer alone``: a slider move with no gallery following (the chart redraw only);
* ``mixer + gallery``: the same move with the gallery following (chart, then gallery);
* ``gallery redraw``: the gallery's own share (``Gallery.last_seconds_`` of each move);
* ``score every user``: what a gallery that re-scored the whole fold per move would pay,
  ``Blend.score`` over all evaluation users (the gallery scores only the shown one).

Run: ``python benchmarks/bench_gallery.py [--repeats 15]``. Writes
``benchmarks/results/bench_gallery.json``. Wall-clock numbers depend on the load; compare ratios.
"""

from __future__ import annotations

import argparse
import os
import statistics
import time

import numpy as np
from _results import save  # noqa: E402  (benchmarks/_results.py)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=15)
    args = parser.parse_args()

    from xrec.blend import Blend
    from xrec.data.demo import load_demo_shop
    from xrec.notebook import Gallery, WeightMixer
    from xrec.sources import ALSSource, AttributeSource, ImageSource, PopularitySource, TextSource
    from xrec.split import split_dataset

    cache = os.environ.get("XREC_CACHE_DIR")
    dataset = load_demo_shop()
    fold = split_dataset(dataset, "leave_last", seed=0).validation
    sources = {
        "popularity": PopularitySource(),
        "als": ALSSource(factors=48, iterations=15, num_threads=1, random_state=0),
        "attributes": AttributeSource(),
        "text": TextSource(columns=["name", "description"], center=True, cache_dir=cache),
        "image": ImageSource(center=True, cache_dir=cache),
    }
    sources = {n: s.fit(fold) for n, s in sources.items()}
    alone = WeightMixer(sources, fold, baseline="als", dataset=dataset)
    followed = WeightMixer(sources, fold, baseline="als", dataset=dataset)
    gallery = Gallery(sources, fold, dataset=dataset, seed=0).follow(followed)
    values = np.linspace(0.2, 0.8, args.repeats)

    def moves(mixer, gallery_times=None):
        out = []
        for v in values:
            t = time.perf_counter()
            mixer.sliders["text"].value = float(round(v, 2))
            mixer.wait()  # the mixer redraws (and calls the gallery) on its update thread
            out.append(time.perf_counter() - t)
            if gallery_times is not None:
                gallery_times.append(gallery.last_seconds_)
        mixer.sliders["text"].value = 0.5
        mixer.wait()
        return out

    moves(alone), moves(followed)  # warm-up: engines, thumbnails
    t_alone, t_both, t_gallery = [], [], []
    for _ in range(2):  # alternate, so both see the same load
        t_alone += moves(alone)
        t_both += moves(followed, t_gallery)
    blend = Blend(sources, gallery.weights, "zscore").fit(fold)
    t_all = []
    for _ in range(3):
        t = time.perf_counter()
        blend.score(fold.eval_users)
        t_all.append(time.perf_counter() - t)

    med = {k: statistics.median(v) * 1000 for k, v in
           {"mixer alone": t_alone, "mixer + gallery": t_both, "gallery redraw": t_gallery, "score every user": t_all}.items()}
    print(f"{'case':<18} {'median ms':>10} {'vs mixer alone':>15}")
    for name, ms in med.items():
        print(f"{name:<18} {ms:10.1f} {ms / med['mixer alone']:15.2f}")
    html_bytes = len(gallery.html().encode())
    print(f"gallery HTML per redraw: {html_bytes / 1024:.0f} KiB; users in the fold: {len(fold.eval_users)}")
    save("bench_gallery", {
        "moves": len(t_both), "median_ms": med, "max_ms": {"gallery redraw": max(t_gallery) * 1000, "mixer + gallery": max(t_both) * 1000},
        "gallery_html_bytes": html_bytes, "eval_users": int(len(fold.eval_users)), "items": int(fold.n_items),
    })  # fmt: skip


if __name__ == "__main__":
    main()
