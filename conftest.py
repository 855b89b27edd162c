"""Test-session settings shared by tests/ and the notebooks run under nbval."""

import os
from pathlib import Path

# One embedding cache for the whole session (tests, notebooks and the demo smoke test), so the
# demo shop's images and texts are encoded once per machine rather than once per test.
os.environ.setdefault("XREC_CACHE_DIR", str(Path(__file__).resolve().parent / ".pytest_cache" / "xrec-embeddings"))
os.environ.setdefault("TQDM_DISABLE", "1")
