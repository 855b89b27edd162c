"""Load test of ``xrec serve``: N concurrent clients for a fixed time, with a reload in the middle.

Starts ``xrec serve BUNDLE`` on a free port of 127.0.0.1 (never another address), then runs
``--clients`` threads, each with its own HTTP connection, sending ``POST /recommend`` for
random known users (k = 10; every ``--filter-every``-th request with an attribute filter)
back to back for ``--seconds``. Halfway through, the bundle folder is rewritten in place
(``save_bundle`` is atomic, so the folder is never half-written) and ``POST /reload`` swaps it
in while the clients keep going.

Reported: requests, requests/s, latency p50 / p95 / p99 / max (ms, client side, one request
= one round trip on a kept-alive connection), errors (any non-200 answer or transport
error), how many answers came from the bundle before and after the reload, and that no
request was dropped (every request sent got a 200 answer from one of the two bundles).

Also measured, in this process, before the server starts: loading the bundle (verifying
every checksum and the ranking digest) and scoring one user.

Run: ``python benchmarks/bench_serve.py [--bundle xrec-out/bundle] [--clients 8] [--seconds 20]``
(``xrec demo`` writes ``xrec-out/bundle``). Wall-clock numbers depend on the machine and its
load; the one this was written on is shared by several busy processes.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
from _results import save  # noqa: E402  (benchmarks/_results.py)

from xrec.serve.child import serving

ROOT = Path(__file__).resolve().parents[1]


_REWRITE = """
import sys
from xrec.bundle import load_bundle, save_bundle
from xrec.experiment import load_spec_dataset
from xrec.spec import parse_spec

bundle = load_bundle(sys.argv[1])
hints = dict(bundle.spec.dataset_load or {})
dataset = load_spec_dataset(parse_spec({"data": hints, "sources": {"_": {"kind": "popularity"}}}))
save_bundle(sys.argv[2], bundle.scorer, dataset=dataset, evidence=bundle.spec.evidence, dataset_load=hints)
"""


def _rewrite(source: Path, live: Path, env: dict) -> None:
    """Write the bundle's blend again into ``live`` (same rankings, new identity) with ``save_bundle``, atomically.

    Runs in a separate process, so the client threads of this one keep their pace. The data
    is found again through the blend file's ``[dataset.load]`` hints, as ``xrec recommend`` does.
    """
    subprocess.run([sys.executable, "-c", _REWRITE, str(source), str(live)], cwd=ROOT, env=env, check=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--bundle", default="xrec-out/bundle", help="bundle folder (default: %(default)s, written by 'xrec demo')")
    parser.add_argument("--clients", type=int, default=8)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--filter-every", type=int, default=4, help="every n-th request carries a filter (0: none)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    if not (1 <= args.clients <= 64 and 0 < args.seconds <= 600):
        parser.error("--clients must be in 1..64 and --seconds in (0, 600]")

    import httpx

    from xrec.bundle import load_bundle

    source = Path(args.bundle)
    if not source.is_dir():
        sys.exit(f"no bundle at {source}: run 'xrec demo' first or pass --bundle")

    t0 = time.perf_counter()
    bundle = load_bundle(source)
    t1 = time.perf_counter()
    bundle.recommend(bundle.user_ids[0], 10)
    t2 = time.perf_counter()
    print(f"load (verify + restore + digest): {1000 * (t1 - t0):.0f} ms; first user scored in {1000 * (t2 - t1):.1f} ms")
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1, "blas"):  # as the server scores: one BLAS thread per request
        t3 = time.perf_counter()
        for u in bundle.user_ids[:200]:
            bundle.ranked(u, 10)
        in_process = 1000 * (time.perf_counter() - t3) / min(200, len(bundle.user_ids))
    print(f"baseline, in this process without HTTP: {in_process:.2f} ms per user (top-10)")

    users = [str(u) for u in bundle.user_ids]
    filters = None
    cats = bundle.manifest["catalog"]["categorical"]
    if cats:  # half of the first categorical column's values
        values = sorted(bundle.fold.catalog.items[cats[0]].astype(str).unique())
        filters = {"attributes": {cats[0]: {"one_of": values[: max(1, len(values) // 2)]}}}

    with tempfile.TemporaryDirectory(prefix="xrec-bench-serve-") as tmp:
        live = Path(tmp) / "bundle"
        shutil.copytree(source, live)
        env = {**os.environ, "PYTHONPATH": str(ROOT)}
        with serving(live, env=env, cwd=ROOT) as service:
            base = service.url
            first_id = httpx.get(f"{base}/bundle").json()["bundle"]

            stop = threading.Event()
            records: list[list[tuple[float, int, str]]] = [[] for _ in range(args.clients)]
            sent = [0] * args.clients

            def client(i: int) -> None:
                rng = np.random.default_rng(args.seed + i)
                with httpx.Client(base_url=base, timeout=30) as http:
                    n = 0
                    while not stop.is_set():
                        body = {"user": users[int(rng.integers(len(users)))], "k": 10}
                        if filters and args.filter_every and n % args.filter_every == 0:
                            body["filters"] = filters
                        n += 1
                        sent[i] += 1
                        start = time.perf_counter()
                        try:
                            r = http.post("/recommend", json=body)
                            status, ident = r.status_code, (r.json().get("bundle", "") if r.status_code == 200 else r.text[:80])
                        except httpx.HTTPError as exc:
                            status, ident = -1, repr(exc)[:80]
                        records[i].append((time.perf_counter() - start, status, ident))

            threads = [threading.Thread(target=client, args=(i,)) for i in range(args.clients)]
            began = time.perf_counter()
            for t in threads:
                t.start()
            time.sleep(args.seconds / 2)
            _rewrite(source, live, env)
            r0 = time.perf_counter()
            reload = httpx.post(f"{base}/reload", timeout=60)
            reload_ms = 1000 * (time.perf_counter() - r0)
            time.sleep(args.seconds / 2)
            stop.set()
            for t in threads:
                t.join()
            elapsed = time.perf_counter() - began

    rows = [r for per in records for r in per]
    lat = np.array([r[0] for r in rows]) * 1000
    errors = [r for r in rows if r[1] != 200]
    second_id = reload.json().get("bundle") if reload.status_code == 200 else None
    by_bundle = {"before reload": sum(r[2] == first_id for r in rows), "after reload": sum(r[2] == second_id for r in rows)}
    summary = {
        "clients": args.clients,
        "seconds": round(elapsed, 1),
        "requests": len(rows),
        "requests_per_s": round(len(rows) / elapsed, 1),
        "latency_ms": {q: round(float(np.percentile(lat, p)), 2) for q, p in (("p50", 50), ("p95", 95), ("p99", 99))} | {"max": round(float(lat.max()), 2)},
        "errors": len(errors),
        "reload": {"status": reload.status_code, "ms": round(reload_ms, 1), "changed_bundle": second_id not in (None, first_id)},
        "answers_by_bundle": by_bundle,
        "dropped": sum(sent) - len(rows) + len(errors),
        "p50_over_in_process": round(float(np.percentile(lat, 50)) / in_process, 1),
    }
    print(json.dumps(summary, indent=1))
    save("bench_serve", summary)
    if errors:
        print("first errors:", errors[:3])


if __name__ == "__main__":
    main()
