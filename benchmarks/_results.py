"""Where every benchmark script writes what it measured: ``benchmarks/results/<name>.json``.

The file holds the machine (platform, cores, Python and numpy versions), the UTC date, the
1-minute load average when the script started, its command line, the git commit it ran on
and the figures themselves. It is written atomically, so a crash never leaves half a file.
``python -m xrec.docs`` renders the README's benchmark blocks from these files
(``xrec/docs_bench.py``), and ``tests/test_docs.py`` checks the README against them.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results"
LOAD_AT_START = os.getloadavg()[0]


def _commit() -> str | None:
    try:
        done = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True, text=True, check=True)
    except (OSError, subprocess.CalledProcessError):
        return None
    return done.stdout.strip()


def run_info() -> dict:
    """Machine, date, load average at start, command line and commit of this run."""
    import numpy as np

    return {
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "machine": {"platform": platform.platform(), "cpu_count": os.cpu_count(), "python": platform.python_version(), "numpy": np.__version__},
        "load_1min_at_start": round(LOAD_AT_START, 2),
        "command": " ".join([Path(sys.executable).name, *sys.argv]),
        "commit": _commit(),
    }


def save(name: str, figures: dict, *, source: str = "this script's run") -> Path:
    """Write ``figures`` (JSON-able) with the run's info to ``benchmarks/results/<name>.json``."""
    sys.path.insert(0, str(ROOT))
    from xrec._files import write_text_atomic

    path = RESULTS / f"{name}.json"
    payload = {"run": run_info(), "source": source, "figures": figures}
    write_text_atomic(path, json.dumps(payload, indent=1) + "\n")
    print(f"results written to {path.relative_to(ROOT)}")
    return path
