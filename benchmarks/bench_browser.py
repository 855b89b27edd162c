"""End-to-end latency of the weight mixer in a real browser: key press -> chart / gallery redrawn.

JupyterLab (127.0.0.1, a free port, a random token) serves a copy of
``notebooks/quickstart.ipynb``; headless Debian Chromium (``/usr/bin/chromium`` through
Playwright) opens it and runs every cell, exactly as ``tests/test_browser.py`` does (both use
``tests/_jupyter_browser.py``). Then one mixer slider is moved by ``--moves`` arrow-key presses,
each awaited. Measured in the page: ``performance.now()`` at the key press, and the first
moment a MutationObserver sees a newly drawn chart in the ``xrec-mixer-chart`` container and a
higher ``data-revision`` on the ``xrec-gallery`` element (and, to split the chart's time, the
first change of any kind in the chart container: the kernel's new output arrived). After each move the kernel is asked
how long its own share took (``mixer.last_seconds_``: re-evaluation and redraw in Python),
the in-process baseline the end-to-end figure is compared with.

Goal (issue 14): median under 150 ms for the chart and under 300 ms for the gallery.

Run: ``python benchmarks/bench_browser.py [--moves 10] [--slider als]`` (needs /usr/bin/chromium
and the test extra). Writes ``benchmarks/results/browser.json``; then ``python -m xrec.docs``
renders the README block. Wall-clock numbers depend on the machine and its load.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

from _results import ROOT, save  # noqa: E402  (benchmarks/_results.py)

sys.path.insert(0, str(ROOT / "tests"))
os.environ.setdefault("XREC_CACHE_DIR", str(ROOT / ".pytest_cache" / "xrec-embeddings"))

from _jupyter_browser import LabServer, NotebookPage, cell_errors, copy_notebook, launch_chromium, time_slider_moves  # noqa: E402

NOTEBOOK = ROOT / "notebooks" / "quickstart.ipynb"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--moves", type=int, default=10, help="arrow-key presses timed")
    parser.add_argument("--slider", default="als", help="mixer slider moved")
    args = parser.parse_args()

    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory(prefix="xrec-bench-browser-") as tmp:
        base = Path(tmp)
        copy_notebook(NOTEBOOK, base / "root")
        server = LabServer(base / "root", base / "home")
        started = time.monotonic()
        try:
            server.start()
            with sync_playwright() as pw:
                browser = launch_chromium(pw)
                try:
                    page = browser.new_page(viewport={"width": 1400, "height": 1000})
                    nb = NotebookPage(page, server, NOTEBOOK.name).open()
                    run_s = nb.run_all()
                    errors = cell_errors(nb.cells())
                    if errors:
                        raise SystemExit("the quickstart failed in the browser:\n" + "\n".join(errors))
                    gallery = page.locator(".xrec-gallery").count() > 0
                    print(f"quickstart ran in {run_s:.1f} s; gallery {'found' if gallery else 'absent (not timed)'}")
                    timed = time_slider_moves(page, args.slider, args.moves, gallery=gallery, kernel_seconds="mixer.last_seconds_")
                    chromium_version = browser.version
                finally:
                    browser.close()
        finally:
            server.stop()
        total_s = time.monotonic() - started

    import jupyterlab

    for what in ("chart", "gallery", "chart_dom", "kernel"):
        s = timed[what]
        print(f"  key press -> {what:<8} n={s['n']:>2}  median {s['median_ms']} ms  max {s['max_ms']} ms")
    figures = {
        "moves": args.moves,
        "slider": args.slider,
        "start_value": timed["start"],
        "end_value": timed["end"],
        "chart_ms": timed["chart"],
        "gallery_ms": timed["gallery"],
        "kernel_ms": timed["kernel"],
        "chart_output_arrived_ms": timed["chart_dom"],
        "per_move": timed["per_move"],
        "gallery_timed": gallery,
        "run_all_s": round(run_s, 1),
        "total_s": round(total_s, 1),
        "load_1min_at_end": round(os.getloadavg()[0], 2),
        "chromium": chromium_version,
        "jupyterlab": jupyterlab.__version__,
    }
    save("browser", figures)


if __name__ == "__main__":
    main()
