"""Loading a large interactions file: rows per second and peak memory against the file's own size.

Writes a seeded synthetic interactions file (default 20M rows in the ML-20M shape: ~144 distinct
items per user, 26,744 items; user ids int64, item ids text, epoch-second timestamps, float32
weights) as Parquet, then measures in fresh processes, one per job, so each peak is its own:

- ``arrow table``    : ``pyarrow.parquet.read_table`` alone (the file's in-memory size = ``table.nbytes``);
- ``arrow -> pandas``: ``read_table(...).to_pandas()``, the plain way to get a DataFrame;
- ``xrec``           : :func:`xrec.data.read_interactions` (read, check, convert, sort).

Peak RSS is the process's high-water mark (``resource.getrusage``), reported in MB and as a
ratio to the Arrow table's size; "above start" subtracts the process's RSS after its imports.
Absolute times depend on the machine's load; compare the rows within one run.

    python benchmarks/bench_load.py                 # 20M rows (writes ~0.3 GB to a temp folder)
    python benchmarks/bench_load.py --rows 2000000  # a quicker look
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

N_ITEMS = 26_744
PER_USER = 144

_JOB = r"""
import json, resource, sys, time
import psutil
job, path = sys.argv[1], sys.argv[2]
import pyarrow.parquet as pq
import pandas as pd
import xrec.data
start_rss = psutil.Process().memory_info().rss
t0 = time.perf_counter()
out = {}
if job == "arrow":
    table = pq.read_table(path)
    out["nbytes"] = table.nbytes
    rows = table.num_rows
elif job == "pandas":
    rows = len(pq.read_table(path).to_pandas())
else:
    inter = xrec.data.read_interactions(path, user_col="user", item_col="item", time_col="timestamp", weight_col="weight")
    rows = len(inter)
    out["result_bytes"] = int(inter.frame.memory_usage(deep=False).sum())
seconds = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
out.update(rows=rows, seconds=seconds, peak=peak, start=start_rss)
print(json.dumps(out))
"""


def write_interactions(path: Path, rows: int, seed: int = 0) -> int:
    """A Parquet file of ``rows`` (rounded down to whole users) distinct (user, item) pairs, in row groups."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    users = rows // PER_USER
    group_users = 1_000_000 // PER_USER
    schema = pa.schema([("user", pa.int64()), ("item", pa.string()), ("timestamp", pa.int64()), ("weight", pa.float32())])
    with pq.ParquetWriter(path, schema) as writer:
        for first in range(0, users, group_users):
            ids = np.arange(first, min(first + group_users, users), dtype=np.int64)
            user = np.repeat(ids, PER_USER)
            offset = (ids * 7919) % N_ITEMS  # each user's items: PER_USER consecutive ones, distinct
            item = (np.repeat(offset, PER_USER) + np.tile(np.arange(PER_USER), len(ids))) % N_ITEMS
            order = rng.permutation(len(user))  # rows in no particular order, as exported files often are
            item_text = pc.binary_join_element_wise("sku-", pc.cast(pa.array(item[order]), pa.string()), "")
            writer.write_table(pa.table({
                "user": user[order],
                "item": item_text,
                "timestamp": rng.integers(1_000_000_000, 1_500_000_000, len(user)),
                "weight": rng.integers(1, 11, len(user)).astype(np.float32) / 2,
            }, schema=schema))
    return users * PER_USER


def measure(job: str, path: Path) -> dict:
    done = subprocess.run([sys.executable, "-c", _JOB, job, str(path)], capture_output=True, text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=20_000_000)
    parser.add_argument("--folder", type=Path, default=None, help="where to write the file (default: a temp folder)")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(dir=args.folder) as tmp:
        path = Path(tmp) / "interactions.parquet"
        rows = write_interactions(path, args.rows)
        print(f"{rows:,} rows, Parquet file {path.stat().st_size / 1e6:,.0f} MB on disk")
        arrow = measure("arrow", path)
        size = arrow["nbytes"]
        print(f"in memory as an Arrow table: {size / 1e6:,.0f} MB")
        print(f"{'job':<16}{'seconds':>9}{'rows/s':>13}{'peak MB':>10}{'above start':>13}{'peak/size':>11}{'above/size':>12}")
        for label, job in (("arrow table", "arrow"), ("arrow -> pandas", "pandas"), ("xrec", "xrec")):
            got = arrow if job == "arrow" else measure(job, path)
            above = got["peak"] - got["start"]
            print(f"{label:<16}{got['seconds']:>9.1f}{got['rows'] / got['seconds']:>13,.0f}{got['peak'] / 1e6:>10,.0f}"
                  f"{above / 1e6:>13,.0f}{got['peak'] / size:>11.2f}{above / size:>12.2f}")
            if "result_bytes" in got:
                print(f"  (the checked, sorted Interactions frame itself: {got['result_bytes'] / 1e6:,.0f} MB)")


if __name__ == "__main__":
    main()
