"""Encoder throughput with the on-disk embedding cache: cold vs warm, texts and images.

Inputs (benchmark input only, not a reference for any test):

* about 1,000 short product-like texts built from word lists with a seeded generator;
* about 200 distinct JPEG images cut from scikit-image's bundled photos (astronaut,
  chelsea, coffee, rocket, ...): random crops, sizes and flips, each encoded to bytes.

For each encoder, in one process:

* load time (model built and weights read; the first import of the libraries included);
* **direct**: ``encoder.encode`` on everything, no cache (the baseline);
* **cold**: ``EmbeddingCache(...).encode`` into an empty folder (encode + hash + write);
* **warm**: a fresh ``EmbeddingCache`` on the same folder (hash + read only), best of
  ``--repeats``.

Reported: items/s for each, cold/direct (the cost of writing) and warm/cold speed-up
(goal: at least 20x). A first line measures the cache alone (an encoder that costs
nothing, 384-d, ``--store`` items): microseconds per item to write and to read. Wall-clock figures depend on the machine and its load; the ratios
are what to compare.

Then, per path (see ``benchmarks/_encoder_paths.py``): images/s and texts/s for PyTorch
eager, ONNX Runtime and int8 text at batch sizes 1/8/32/64 and 1/2 threads, each as a
share of the machine's measured float32 FLOP rate; cold encoding of demo-shop items with
the old and new defaults; int8 text quality. All in one process, so the ratios hold even
when other work loads the machine (the absolute rates do not).

Run: ``python benchmarks/bench_encoders.py [--texts 1000] [--images 200] [--store 10000]
[--repeats 3] [--threads 2] [--path-images 32] [--path-texts 64] [--demo 128] [--quality 0]``
(``0`` skips a part).
"""

from __future__ import annotations

import argparse
import io
import tempfile
import time
from pathlib import Path

import numpy as np

from xrec.encoders.base import Encoder
from xrec.encoders.cache import EmbeddingCache

ADJECTIVES = (
    "red blue green black white grey navy olive beige golden silver wooden linen cotton woollen "
    "leather ceramic glass steel bamboo vintage modern rustic compact large small soft sturdy "
    "lightweight waterproof handmade striped floral matte glossy"
).split()
NOUNS = (
    "mug vase lamp chair table rug curtain pillow blanket jacket shirt dress scarf boots sneakers "
    "backpack handbag wallet watch bracelet necklace teapot bowl plate knife pan kettle shelf "
    "mirror clock candle basket bottle"
).split()
PLACES = "kitchen bedroom office garden hallway bathroom patio studio nursery cabin".split()
USES = "everyday use gifts travel the weekend parties work winter summer small spaces".split(" ")


def make_texts(n: int, seed: int = 0) -> list[str]:
    """``n`` distinct short descriptions from the word lists."""
    rng = np.random.default_rng(seed)
    texts: list[str] = []
    seen: set[str] = set()
    while len(texts) < n:
        a, b = rng.choice(ADJECTIVES, size=2, replace=False)
        noun, place = rng.choice(NOUNS), rng.choice(PLACES)
        text = f"{a.capitalize()} {b} {noun} for the {place}, size {int(rng.integers(1, 60))}."
        if text not in seen:
            seen.add(text)
            texts.append(text)
    return texts


def make_images(n: int, seed: int = 0) -> list[bytes]:
    """``n`` distinct JPEG files (as bytes) cut from scikit-image's sample photos."""
    import skimage.data as data
    from PIL import Image

    names = ["astronaut", "chelsea", "coffee", "rocket", "immunohistochemistry", "hubble_deep_field", "camera", "coins"]
    photos = []
    for name in names:
        arr = getattr(data, name)()
        img = Image.fromarray(arr)
        photos.append(img.convert("RGB"))
    rng = np.random.default_rng(seed)
    out: list[bytes] = []
    seen: set[bytes] = set()
    while len(out) < n:
        img = photos[len(out) % len(photos)]
        w, h = img.size
        cw, ch = int(w * rng.uniform(0.5, 1.0)), int(h * rng.uniform(0.5, 1.0))
        x, y = int(rng.integers(0, w - cw + 1)), int(rng.integers(0, h - ch + 1))
        side = int(rng.integers(160, 480))
        crop = img.crop((x, y, x + cw, y + ch)).resize((side, max(16, int(side * ch / cw))), Image.BICUBIC)
        if rng.random() < 0.5:
            crop = crop.transpose(Image.FLIP_LEFT_RIGHT)
        buf = io.BytesIO()
        crop.save(buf, format="JPEG", quality=int(rng.integers(80, 95)))
        blob = buf.getvalue()
        if blob not in seen:
            seen.add(blob)
            out.append(blob)
    return out


class _InstantEncoder(Encoder):
    """Vectors at almost no cost, so the cache's own read/write time shows."""

    modality = "text"
    identity = "bench-instant"

    def __init__(self, dim: int) -> None:
        self._dim = dim

    @property
    def dim(self) -> int:
        return self._dim

    def encode(self, contents, *, progress=False):
        out = np.random.default_rng(len(contents)).random((len(contents), self._dim), dtype=np.float32) + 0.1
        return out / np.linalg.norm(out, axis=1, keepdims=True)


def store_overhead(n: int, dim: int, repeats: int) -> dict:
    """Microseconds per item the cache itself spends writing (cold) and reading (warm)."""
    contents = make_texts(n, seed=1)
    enc = _InstantEncoder(dim)
    t0 = time.perf_counter()
    enc.encode(contents)
    encode_s = time.perf_counter() - t0
    with tempfile.TemporaryDirectory(prefix="xrec-bench-") as root:
        t0 = time.perf_counter()
        EmbeddingCache(Path(root)).encode(enc, contents)
        cold_s = time.perf_counter() - t0 - encode_s
        warm_s = min(_timed(lambda: EmbeddingCache(Path(root)).encode(enc, contents)) for _ in range(repeats))
    print(
        f" store: n={n:5d} dim={dim}  write {1e6 * cold_s / n:6.1f} us/item | read {1e6 * warm_s / n:6.1f} us/item "
        f"({n / warm_s:,.0f} items/s warm)",
        flush=True,
    )
    return {"encoder": "store", "n": n, "write_us": 1e6 * cold_s / n, "read_us": 1e6 * warm_s / n}


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def run(name: str, make_encoder, contents: list, repeats: int, progress: bool) -> dict:
    t0 = time.perf_counter()
    encoder = make_encoder().load()
    load_s = time.perf_counter() - t0
    encoder.encode(contents[: min(4, len(contents))])  # first-call warm-up (allocations, thread pool)

    t0 = time.perf_counter()
    direct = encoder.encode(contents, progress=progress)
    direct_s = time.perf_counter() - t0

    with tempfile.TemporaryDirectory(prefix="xrec-bench-") as root:
        cache = EmbeddingCache(Path(root))
        t0 = time.perf_counter()
        cold = cache.encode(encoder, contents, progress=progress)
        cold_s = time.perf_counter() - t0
        assert cache.last_stats.misses == len(contents), cache.last_stats
        warm_s = float("inf")
        for _ in range(repeats):
            fresh = EmbeddingCache(Path(root))
            t0 = time.perf_counter()
            warm = fresh.encode(encoder, contents)
            warm_s = min(warm_s, time.perf_counter() - t0)
            assert fresh.last_stats.hits == len(contents), fresh.last_stats
        np.testing.assert_array_equal(warm, cold)
        max_diff = float(np.abs(cold - direct).max())
    n = len(contents)
    row = {
        "encoder": name,
        "n": n,
        "load_s": load_s,
        "direct_per_s": n / direct_s,
        "cold_per_s": n / cold_s,
        "warm_per_s": n / warm_s,
        "cold_over_direct": cold_s / direct_s,
        "warm_speedup": cold_s / warm_s,
        "max_abs_diff_cold_vs_direct": max_diff,
    }
    print(
        f"{name:>6}: n={n:5d}  load {load_s:5.1f} s | direct {row['direct_per_s']:8.1f}/s | "
        f"cold {row['cold_per_s']:8.1f}/s (x{row['cold_over_direct']:.3f} of direct time) | "
        f"warm {row['warm_per_s']:9.0f}/s | warm/cold speed-up {row['warm_speedup']:6.0f}x "
        f"(goal >= 20x) | max |cold - direct| {max_diff:.1e}",
        flush=True,
    )
    return row


def main(argv: list[str] | None = None) -> list[dict]:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--texts", type=int, default=1000)
    parser.add_argument("--images", type=int, default=200)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--threads", type=int, default=2, help="torch threads for the encoders")
    parser.add_argument("--store", type=int, default=10_000, help="items for the cache-only measurement (0: skip)")
    parser.add_argument("--path-images", type=int, default=32, help="images per path measurement (0: skip paths)")
    parser.add_argument("--path-texts", type=int, default=64, help="texts per path measurement (0: skip)")
    parser.add_argument("--demo", type=int, default=128, help="demo-shop items encoded cold, old vs new defaults (0: skip)")
    parser.add_argument("--quality", type=int, default=0, help="demo-shop items for the int8 quality check (0: skip)")
    parser.add_argument("--progress", action="store_true")
    args = parser.parse_args(argv)
    rows = []
    rows += paths_report(args)
    if args.store:
        rows.append(store_overhead(args.store, 384, args.repeats))
    if args.texts:
        from xrec.encoders.text import MiniLMTextEncoder

        def text_encoder():
            return MiniLMTextEncoder(num_threads=args.threads)

        rows.append(run("text", text_encoder, make_texts(args.texts), args.repeats, args.progress))
    if args.images:
        from xrec.encoders.image import EfficientNetLite0Encoder

        def image_encoder():
            return EfficientNetLite0Encoder(num_threads=args.threads)

        rows.append(run("image", image_encoder, make_images(args.images), args.repeats, args.progress))
    return rows


def paths_report(args) -> list[dict]:
    """The per-path table, the FLOP limit, cold demo encoding and int8 quality (see the module docstring)."""
    import _encoder_paths as paths

    rows: list[dict] = []
    if not (args.path_images or args.path_texts or args.demo or args.quality):
        return rows
    limits = paths.Limit()
    table = []
    if args.path_images:
        image_rows, flops = paths.image_paths(make_images(max(args.path_images, 64), seed=2), limits, args.path_images)
        print(f"EfficientNet-Lite0: {flops / 1e9:.3f} GFLOPs per image (FlopCounterMode)", flush=True)
        table += image_rows
    if args.path_texts:
        texts = _demo_texts(args.path_texts)
        text_rows, flops = paths.text_paths(texts, limits, args.path_texts)
        print(f"MiniLM-L6: {flops / 1e9:.3f} GFLOPs per text as run ({np.mean([len(t) for t in texts]):.0f} characters "
              "on average, length-sorted batches with padding; FlopCounterMode)", flush=True)
        table += text_rows
    if table:
        print("float32 matmul probe, best over the run: "
              + ", ".join(f"{t} thread(s) {v / 1e9:.1f} GFLOP/s" for t, v in limits.best.items())
              + "; limit used: " + ", ".join(f"{t} thread(s) {limits.rate(t) / 1e9:.1f}" for t in limits.best), flush=True)
    for r in table:
        print(f"  {r['what']:>18} {r['path']:>5} threads {r['threads']} batch {r['batch']:>2}: "
              f"{r['per_s']:7.1f}/s  {100 * r['share']:5.1f}% of the FLOP limit"
              + (" (float32-equivalent)" if r["path"] == "int8" else ""), flush=True)
    _print_ratios(table)
    rows += table
    if args.demo:
        cold = paths.demo_cold(args.demo)
        before, after = cold["before (PyTorch eager)"], cold["after (ONNX Runtime)"]
        print(f"demo shop, {cold['n']} items' images + texts into an empty cache: before {before:.1f} s, "
              f"after {after:.1f} s (x{before / after:.2f})", flush=True)
        rows.append({"what": "demo cold", **cold})
    if args.quality:
        q = paths.int8_quality(args.quality)
        print(f"int8 text on {q['n']} demo-shop texts: cosine to fp32 mean {q['cos_mean']:.4f}, 5th percentile "
              f"{q['cos_p05']:.4f}, min {q['cos_min']:.4f}; ridge bridge recall@10 fp32 {q['bridge_recall_fp32']:.4f} "
              f"vs int8 {q['bridge_recall_int8']:.4f}", flush=True)
        rows.append({"what": "int8 quality", **q})
    return rows


def _demo_texts(n: int) -> list[str]:
    """The first ``n`` demo-shop item texts (name + description, ~200 characters), else generated ones."""
    try:
        from xrec.data.demo import load_demo_shop
        from xrec.encoders.cache import catalog_texts

        return catalog_texts(load_demo_shop().catalog, None)[:n]
    except Exception:  # the demo shop is missing: fall back to the word-list texts
        return make_texts(n)


def _print_ratios(table: list[dict]) -> None:
    best = {}
    for r in table:
        key = (r["what"], r["path"])
        if key not in best or r["per_s"] > best[key]["per_s"]:
            best[key] = r
    for what, fast, slow in (("image", "onnx", "torch"), ("image forward only", "onnx", "torch"), ("text", "int8", "fp32")):
        if (what, fast) in best and (what, slow) in best:
            a, b = best[(what, fast)], best[(what, slow)]
            print(f"{what}: best {fast} {a['per_s']:.1f}/s (batch {a['batch']}, {a['threads']} threads) vs best {slow} "
                  f"{b['per_s']:.1f}/s (batch {b['batch']}, {b['threads']} threads): x{a['per_s'] / b['per_s']:.2f}", flush=True)
            rate = {(r["path"], r["threads"], r["batch"]): r["per_s"] for r in table if r["what"] == what}
            ratios = [rate[(fast, t, bs)] / rate[(slow, t, bs)] for (p, t, bs) in rate if p == fast and (slow, t, bs) in rate]
            print(f"  {fast}/{slow} at the same threads and batch: median x{np.median(ratios):.2f} "
                  f"(range x{min(ratios):.2f} to x{max(ratios):.2f}, {len(ratios)} settings)", flush=True)


if __name__ == "__main__":
    main()
