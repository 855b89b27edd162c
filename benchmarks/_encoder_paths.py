"""Per-path encoder speed against the machine's measured float32 limit (used by bench_encoders.py).

* **FLOP limit**: best of a few ``torch.mm`` products of two 1024x1024 float32 matrices
  (2 n^3 floating-point operations each) at 1 and 2 threads.
* **FLOPs per item**: :class:`torch.utils.flop_counter.FlopCounterMode` over one forward
  pass (convolutions and matrix products, 2 per multiply-add; the cheap elementwise work
  is not counted), on the same inputs the timing uses (text batches with their padding).
  The limit is the best rate seen over the run, probed before every measurement (see
  :class:`Limit`); int8 text is shown against the float32 limit (a float32-equivalent share).
* **Paths**: images through PyTorch eager and ONNX Runtime, texts in float32 and int8
  (ONNX Runtime was not faster than PyTorch for MiniLM here, so it is not offered), each
  at batch sizes 1/8/32/64 and 1/2 threads, the two paths alternated (best of 2 rounds)
  so that other work on the machine hits both alike, timed end to end (``encoder.encode``: decode
  and resize included for images) and for images also the forward pass alone on a ready
  batch of 32. Share of limit = items/s x FLOPs per item / FLOP rate at that thread count.
* **Demo shop, cold**: encoding ``--demo`` catalog images and texts into an empty cache with
  the old defaults (PyTorch eager) and the new ones (ONNX Runtime).
* **int8 quality**: cosine of int8 to float32 text vectors on the demo shop's texts and
  the text -> image bridge recall@10 (ridge bridge, same held-out split) with each.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np

BATCHES = (1, 8, 32, 64)
THREADS = (1, 2)


def flop_rate(threads: int, n: int = 1024, repeats: int = 5) -> float:
    """Measured dense float32 FLOP/s of ``torch.mm`` at ``threads`` intra-op threads."""
    import torch

    from xrec.encoders._common import torch_threads

    a, b = torch.randn(n, n), torch.randn(n, n)
    with torch_threads(threads):
        torch.mm(a, b)
        best = min(_timed(lambda: torch.mm(a, b)) for _ in range(repeats))
    return 2.0 * n**3 / best


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def image_flops(model) -> float:
    """FLOPs of one 224x224 image through the network (features + classifier)."""
    import torch
    from torch.utils.flop_counter import FlopCounterMode

    with torch.inference_mode(), FlopCounterMode(display=False) as counter:
        model(torch.zeros(1, 3, 224, 224))
    return float(counter.get_total_flops())


def text_flops(encoder, texts: list[str], batch_size: int = 32) -> float:
    """FLOPs per text of the float32 transformer on ``texts`` (length-sorted batches, with padding)."""
    import torch
    from torch.utils.flop_counter import FlopCounterMode

    model = encoder.model_
    order = sorted(texts, key=len)
    prepare = getattr(model, "preprocess", None) or model.tokenize  # renamed in sentence-transformers 5
    with torch.inference_mode(), FlopCounterMode(display=False) as counter:
        for start in range(0, len(order), batch_size):
            features = prepare(order[start : start + batch_size])
            model(features)
    return float(counter.get_total_flops()) / len(texts)


def _rate(encode, contents) -> float:
    return len(contents) / _timed(lambda: encode(contents))


class Limit:
    """The FLOP limit per thread count: the best ``torch.mm`` rate seen, probed before each measurement.

    On a loaded machine a single probe can land on a busy moment; taking the best over the
    whole run (and, for two threads, at least twice the one-thread best) gives the rate the
    cores reach when free, so shares are not flattered by a busy probe.
    """

    def __init__(self) -> None:
        self.best = {t: 0.0 for t in THREADS}

    def probe(self, threads: int) -> None:
        self.best[threads] = max(self.best[threads], flop_rate(threads, repeats=3))

    def rate(self, threads: int) -> float:
        """FLOP/s the cores can do at ``threads``: the best probe, and at least ``threads`` x the
        one-thread best (a loaded machine rarely shows two free cores at once)."""
        return max(self.best[threads], threads * self.best[1])


def _paired(encoders: dict[str, object], contents: list, bs: int, limit: Limit, threads: int, rounds: int = 2) -> dict[str, float]:
    """Best items/s of each encoder on ``contents``, alternating encoders so load hits them alike."""
    best = dict.fromkeys(encoders, 0.0)
    for _ in range(rounds):
        for name, enc in encoders.items():
            limit.probe(threads)
            enc.batch_size = bs
            best[name] = max(best[name], _rate(enc.encode, contents))
    return best


def image_paths(images: list[bytes], limit: Limit, n: int) -> tuple[list[dict], float]:
    """Images/s of PyTorch eager and ONNX Runtime per thread count and batch size, end to end and forward only."""
    from xrec.encoders._common import torch_threads
    from xrec.encoders.image import EfficientNetLite0Encoder

    rows, measured = [], []
    flops = 0.0
    for threads in THREADS:
        encoders = {r: EfficientNetLite0Encoder(runtime=r, num_threads=threads).load() for r in ("torch", "onnx")}
        if not flops:
            flops = image_flops(encoders["torch"].model_)
        for enc in encoders.values():
            enc.encode(images[:4])  # first-call warm-up (ONNX Runtime's memory arena, torch's thread pool)
        for bs in BATCHES:
            for runtime, per_s in _paired(encoders, images[: max(n, bs)], bs, limit, threads).items():
                measured.append(("image", runtime, threads, bs, per_s))
        batch = encoders["torch"]._prepare(images, 0, 32)[3]
        best = dict.fromkeys(encoders, 0.0)
        with torch_threads(threads):
            for _ in range(2):
                for runtime, enc in encoders.items():
                    limit.probe(threads)
                    best[runtime] = max(best[runtime], len(batch) / _timed(lambda: enc._forward(batch)))
        measured += [("image forward only", runtime, threads, len(batch), per_s) for runtime, per_s in best.items()]
    for what, path, threads, bs, per_s in measured:
        rows.append({"what": what, "path": path, "threads": threads, "batch": bs, "per_s": per_s,
                     "share": per_s * flops / limit.rate(threads)})
    return rows, flops


def text_paths(texts: list[str], limit: Limit, n: int) -> tuple[list[dict], float]:
    """Texts/s of the float32 and int8 MiniLM per thread count and batch size."""
    from xrec.encoders.text import MiniLMTextEncoder

    encoders = {p: MiniLMTextEncoder(precision=p).load() for p in ("fp32", "int8")}
    flops = text_flops(encoders["fp32"], texts[:n])
    measured = []
    for threads in THREADS:
        for enc in encoders.values():
            enc.num_threads = threads
            enc.encode(texts[:4])
        for bs in BATCHES:
            for precision, per_s in _paired(encoders, texts[: max(n, bs)], bs, limit, threads).items():
                measured.append((precision, threads, bs, per_s))
    rows = [{"what": "text", "path": p, "threads": t, "batch": bs, "per_s": v, "share": v * flops / limit.rate(t)}
            for p, t, bs, v in measured]
    return rows, flops


def demo_cold(n: int) -> dict:
    """Seconds to encode ``n`` demo-shop items' images and texts into an empty cache, old vs new defaults."""
    from xrec.data.demo import load_demo_shop
    from xrec.encoders.cache import EmbeddingCache
    from xrec.encoders.image import EfficientNetLite0Encoder
    from xrec.encoders.text import MiniLMTextEncoder
    from xrec.encoders.cache import catalog_texts

    catalog = load_demo_shop().catalog
    images = [catalog.image_path(i).read_bytes() for i in range(min(n, catalog.n_items))]
    texts = catalog_texts(catalog, None)[: len(images)]
    text_enc = MiniLMTextEncoder().load()
    out = {"n": len(images)}
    for label, runtime in (("before (PyTorch eager)", "torch"), ("after (ONNX Runtime)", "onnx")):
        # model load included (the ONNX graph is already exported: it is kept across runs)
        with tempfile.TemporaryDirectory(prefix="xrec-bench-") as root:
            cache = EmbeddingCache(Path(root))
            out[label] = _timed(lambda: (cache.encode(EfficientNetLite0Encoder(runtime=runtime).load(), images),
                                         cache.encode(text_enc, texts)))
    return out


def int8_quality(n: int) -> dict:
    """Cosine of int8 to fp32 text vectors and ridge-bridge recall@10 with each, on the demo shop."""
    from xrec.data.demo import load_demo_shop
    from xrec.encoders.bridge import RidgeBridge, bridge_recall
    from xrec.encoders.cache import EmbeddingCache
    from xrec.encoders.image import EfficientNetLite0Encoder
    from xrec.encoders.text import MiniLMTextEncoder
    from xrec.encoders.cache import catalog_texts

    catalog = load_demo_shop().catalog
    m = min(n, catalog.n_items)
    texts = catalog_texts(catalog, None)[:m]
    cache = EmbeddingCache()  # the shared cache: warm runs reuse vectors
    fp32 = cache.encode(MiniLMTextEncoder(), texts)
    int8 = cache.encode(MiniLMTextEncoder(precision="int8"), texts)
    images = cache.encode(EfficientNetLite0Encoder(), [catalog.image_path(i).read_bytes() for i in range(m)])
    cos = (fp32 * int8).sum(axis=1)
    return {
        "n": m,
        "cos_mean": float(cos.mean()),
        "cos_min": float(cos.min()),
        "cos_p05": float(np.quantile(cos, 0.05)),
        "bridge_recall_fp32": bridge_recall(RidgeBridge(), images, fp32, k=10)["recall"],
        "bridge_recall_int8": bridge_recall(RidgeBridge(), images, int8, k=10)["recall"],
    }
