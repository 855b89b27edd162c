"""Reading your own item vectors: time and extra peak memory per file layout.

Writes N seeded random vectors in each layout the ``vectors`` source reads, then reads each
one into catalog order (shuffled file order) in a fresh process, and reports the time
against the least work possible (the baseline: ``np.load`` of the whole ``.npy`` and one
gather into catalog order by a known permutation, no id handling, no checks), and the
peak RSS above the process's RSS before reading (sampled every 2 ms), in multiples of the
output array.

    python benchmarks/bench_vectors.py [--items 200000] [--dim 128]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

CHILD = r"""
import json, sys, threading, time
import numpy as np, psutil
from xrec.data.catalog import Catalog
from xrec.sources.vectors import read_item_vectors
folder, layout, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
catalog = Catalog.from_ids([f"i{j}" for j in range(n)])
perm = np.load(f"{folder}/perm.npy")
proc = psutil.Process()
start_rss, peak, running = proc.memory_info().rss, [0], [True]
def sample():
    while running[0]:
        peak[0] = max(peak[0], proc.memory_info().rss)
        time.sleep(0.002)
watcher = threading.Thread(target=sample)
watcher.start()
t = time.perf_counter()
if layout == "baseline":
    out = np.load(f"{folder}/v.npy")[perm]
else:
    args = {"npy": dict(path=f"{folder}/v.npy", ids=f"{folder}/ids.txt"),
            "parquet": dict(path=f"{folder}/v.parquet"),
            "safetensors": dict(path=f"{folder}/v.safetensors", ids=f"{folder}/ids.txt")}[layout]
    out, _ = read_item_vectors(catalog, **args)
elapsed = time.perf_counter() - t
running[0] = False
watcher.join()
print(json.dumps({"seconds": elapsed, "extra_bytes": max(peak[0], proc.memory_info().rss) - start_rss, "out_bytes": out.nbytes}))
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=200_000)
    parser.add_argument("--dim", type=int, default=128)
    args = parser.parse_args()

    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq
    from safetensors.numpy import save_file

    rng = np.random.default_rng(0)
    vectors = rng.normal(size=(args.items, args.dim)).astype(np.float32)
    order = rng.permutation(args.items)
    ids = [f"i{j}" for j in order]
    with tempfile.TemporaryDirectory() as folder:
        np.save(f"{folder}/v.npy", vectors[order])
        np.save(f"{folder}/perm.npy", np.argsort(order))  # catalog row j is file row perm[j]
        Path(folder, "ids.txt").write_text("\n".join(ids) + "\n", encoding="utf-8")
        flat = pa.FixedSizeListArray.from_arrays(pa.array(vectors[order].ravel()), args.dim)
        pq.write_table(pa.table({"item": ids, "vec": flat}), f"{folder}/v.parquet")
        save_file({"vectors": vectors[order]}, f"{folder}/v.safetensors")
        del vectors, flat
        rows = {}
        for layout in ("baseline", "npy", "parquet", "safetensors"):
            done = subprocess.run([sys.executable, "-c", CHILD, folder, layout, str(args.items)], capture_output=True, text=True, check=True)
            rows[layout] = json.loads(done.stdout)
    base = rows["baseline"]["seconds"]
    print(f"{args.items:,} vectors × {args.dim} float32 ({rows['npy']['out_bytes'] / 2**20:.0f} MiB), file rows shuffled")
    print(f"{'layout':<20} {'time / baseline':>16} {'extra peak RSS / output':>24}")
    for layout, r in rows.items():
        print(f"{layout:<20} {r['seconds'] / base:>16.2f} {r['extra_bytes'] / r['out_bytes']:>24.2f}")


if __name__ == "__main__":
    main()
