"""Bridges on the demo shop: held-out text → image recall@10 of ridge, CCA and the contrastive heads.

Input: the demo shop's image features (EfficientNet-Lite0) and description vectors
(MiniLM), read from the embedding cache (``XREC_CACHE_DIR``; encoded on first use).
For each bridge and seed, :func:`xrec.encoders.bridge.bridge_recall` holds out 30% of the
pairs (seeded), fits on the rest and ranks all held-out images for each held-out
description. Reported: lift over random (recall@10 / (10 / n_test)) per seed and its mean,
and the mean fit time per seed (the contrastive heads are trained, not read from their
cache: each run uses a fresh temporary cache folder). Wall-clock figures depend on the
machine and its load; compare bridges within one run.

With ``--inner`` the same bridges are measured where the contrastive defaults were chosen:
for each seed, only that seed's training pairs (the 70%) are used, split again 70/30 with
seed ``1000 + seed``; the held-out pairs of the default run are never touched. Written to
``bench_bridges_inner.json``.

Run: ``python benchmarks/bench_bridges.py [--seeds 5] [--threads 1] [--inner]``
"""

from __future__ import annotations

import argparse
import tempfile
import time

import numpy as np

from xrec.encoders.bridge import bridge_recall, make_bridge
from _results import save  # noqa: E402  (benchmarks/_results.py)

# variants measured beside the default (ridge start, text head trained, refit on all pairs)
BOTH_HEADS = {"train_heads": "both"}
RANDOM_START = {
    "init": "random",
    "train_heads": "both",
    "pca_components": 128,
    "dim": 256,
    "temperature": 0.07,
    "learning_rate": 3e-4,
    "weight_decay": 1.0,
}


def demo_pairs() -> tuple[np.ndarray, np.ndarray]:
    from xrec.data.demo import load_demo_shop
    from xrec.sources.content import image_features_and_probs, text_vectors

    catalog = load_demo_shop().catalog
    text, text_ok = text_vectors(catalog)
    features, _, image_ok = image_features_and_probs(catalog)
    ok = text_ok & image_ok
    return features[ok], text[ok]


def training_rows(n: int, seed: int, test_fraction: float = 0.3) -> np.ndarray:
    """The pairs ``bridge_recall(..., seed=seed)`` fits on (the complement of its held-out draw)."""
    order = np.random.default_rng(seed).permutation(n)
    return np.sort(order[max(1, int(round(test_fraction * n))) :])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--threads", type=int, default=1, help="torch threads")
    parser.add_argument("--inner", action="store_true", help="measure on a split of each seed's training pairs only")
    args = parser.parse_args()
    import torch

    torch.set_num_threads(args.threads)
    image, text = demo_pairs()
    where = "of each seed's training pairs " if args.inner else ""
    print(f"{len(image)} pairs; image {image.shape[1]}-d, text {text.shape[1]}-d; 70/30 split {where}per seed, seeds 0-{args.seeds - 1}")
    with tempfile.TemporaryDirectory() as cache:
        rows = [
            ("ridge", lambda: make_bridge("ridge")),
            ("cca", lambda: make_bridge("cca")),
            ("contrastive", lambda: make_bridge("contrastive", cache_dir=cache)),
            ("contrastive (both heads trained)", lambda: make_bridge("contrastive", cache_dir=cache, **BOTH_HEADS)),
            ("contrastive (random start)", lambda: make_bridge("contrastive", cache_dir=cache, **RANDOM_START)),
        ]
        print(f"{'bridge':34s} {'mean lift':>9s}  per seed{'':24s} fit s/seed")
        results = []
        for label, make in rows:
            lifts, seconds = [], []
            for seed in range(args.seeds):
                use, split_seed = (training_rows(len(image), seed), 1000 + seed) if args.inner else (slice(None), seed)
                start = time.perf_counter()
                lifts.append(bridge_recall(make(), image[use], text[use], k=10, test_fraction=0.3, seed=split_seed)["lift"])
                seconds.append(time.perf_counter() - start)
            per = " ".join(f"{v:5.1f}" for v in lifts)
            print(f"{label:34s} {np.mean(lifts):8.2f}x  {per:32s} {np.mean(seconds):6.1f}", flush=True)
            results.append({"bridge": label, "lift_per_seed": lifts, "fit_s_per_seed": seconds})
    name = "bench_bridges_inner" if args.inner else "bench_bridges"
    save(name, {"pairs": len(image), "inner": args.inner, "seeds": args.seeds, "k": 10, "test_fraction": 0.3, "bridges": results})


if __name__ == "__main__":
    main()
