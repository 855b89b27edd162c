"""The README's benchmark figures, rendered from the benchmarks' committed results files.

Every benchmark script in ``benchmarks/`` writes what it measured to
``benchmarks/results/<name>.json`` (machine, UTC date, load average at start, command line,
commit, figures; see ``benchmarks/_results.py``). Each block of benchmark figures in
``README.md`` sits between two marker comments::

    <!-- xrec:bench NAME -->
    <!-- xrec:from benchmarks/results/a.json -->
    | the table ... |
    <!-- /xrec:bench -->

``python -m xrec.docs`` rewrites these blocks from the results files (no benchmark is run),
and ``tests/test_docs.py`` checks that every block equals the rendering of the committed
files, so a README figure cannot drift from the run that measured it. Re-running a benchmark
and then ``python -m xrec.docs`` updates both.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from xrec.errors import ConfigError

__all__ = ["BENCH", "BenchBlock", "RESULTS", "bench_problems", "render_bench", "rewrite_bench"]

RESULTS = Path(__file__).resolve().parent.parent / "benchmarks" / "results"
_BLOCK = re.compile(r"(<!-- xrec:bench (?P<name>[\w-]+) -->\n)(?P<body>.*?)(<!-- /xrec:bench -->)", re.S)


@dataclass(frozen=True)
class BenchBlock:
    """One README block of benchmark figures.

    Attributes
    ----------
    files
        Results files (names under ``benchmarks/results/``) the block is rendered from.
    make
        Takes the parsed files (name -> JSON) and returns the Markdown of the block.
    """

    files: tuple[str, ...]
    make: Callable[[dict[str, dict]], str]


def _n(x: float, digits: int = 1) -> str:
    return f"{x:,.{digits}f}"


def _sci(x: float) -> str:
    mantissa, exp = f"{x:.1e}".split("e")
    return f"{mantissa}·10^{int(exp)}"


def _load(run: dict) -> str:
    return f"load {run['run']['load_1min_at_start']:.1f} at start, {run['run']['date_utc'][:16].replace('T', ' ')} UTC"


# --- bench_scale ------------------------------------------------------------------------------

_SCALE_RUNS = (
    "bench_scale.json",
    "bench_scale_growth_run1.json",
    "bench_scale_catalog_run1.json",
    "bench_scale_catalog_run2.json",
    "bench_scale_catalog.json",
    "bench_scale_catalog_run3.json",
    "bench_scale_catalog_final.json",
)
_SCREEN_RUNS = tuple(f for f in _SCALE_RUNS if "catalog" in f)
_ENGINES = {
    "evaluate-blend": "`evaluate(Blend)` (general path)",
    "chunked": "`evaluate_blend_chunked`",
    "chunked-1": "`evaluate_blend_chunked`, 1 BLAS thread",
    "candidates-numpy": "`evaluate_candidates`, numpy, top-100",
    "candidates-faiss": "`evaluate_candidates`, faiss, top-100",
    "screen": "`evaluate_screened`",
}


def _scale_table(data: dict[str, dict]) -> str:
    head = ["results file", "case", "users × items", "engine", "users evaluated", "wall s", "≈ all users s", "cells/s", "peak RSS GB", "load"]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    exps = []
    for name in _SCALE_RUNS:
        for r in data[name]["rows"]:
            if r["engine"] not in _ENGINES:
                continue
            every = r.get("wall_all_users_s")
            row = [
                f"`{name}`", r["case"], f"{r['users']:,} × {r['items']:,}", _ENGINES[r["engine"]], f"{r['evaluated_users']:,}",
                _n(r["wall_s"]), _n(every, 0) if every else "", _sci(r["cells_per_s"]), f"{r['peak_rss_gb']:.2f}", f"{r['load_1min']:.1f}",
            ]
            lines.append("| " + " | ".join(row) + " |")
        exp = data[name].get("growth_exponent", {}).get("chunked")
        if exp is not None:
            exps.append(f"{exp:.2f} (`{name}`)")
    lines.append("")
    lines.append(
        "Each row ran in its own process; `≈ all users` extrapolates a sampled run linearly (the work per user does not "
        "depend on the other users); load is the 1-minute load average when the row started (2 cores). Time grows as "
        "(users × items)^e with e = " + ", ".join(exps) + " (least squares on log–log over the growth cases, `evaluate_blend_chunked`)."
    )
    return "\n".join(lines) + "\n"


def _screen_table(data: dict[str, dict]) -> str:
    head = ["results file", "case", "full ranking s (users)", "full, all users s", "screen, all users s (measured)", "of it lists s", "speed-up", "ranked in full", "exact@10", "peak RSS GB", "load"]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for name in _SCREEN_RUNS:
        for r in data[name]["rows"]:
            if r["engine"] != "screen-vs-full":
                continue
            row = [
                f"`{name}`", r["case"], f"{_n(r['full_sample_s'])} ({r['full_sample_users']:,})", _n(r["full_all_users_s"], 0),
                _n(r["screen_all_users_s"]), _n(r["lists_s"]), f"**{r['speedup']:.1f}×**" if r["speedup"] >= 1 else f"{r['speedup']:.2f}× (slower)",
                f"{100 * r['ranked_in_full_share']:.1f} %", f"{100 * r['exact_share@10']:.0f} %", f"{r['peak_rss_gb']:.2f}", f"{r['load_1min']:.1f}",
            ]
            lines.append("| " + " | ".join(row) + " |")
    equal = all(r["equal_on_sample"] for name in _SCREEN_RUNS for r in data[name]["rows"] if r["engine"] == "screen-vs-full")
    lines.append("")
    lines.append(
        "One process per row: full ranking (`evaluate_blend_chunked`) of a sample (extrapolated linearly when the sample is not "
        "every user), then `evaluate_screened` on every user; the per-user metrics were equal on the sample "
        + ("in every run. " if equal else "**not** in every run (see the files). ")
        + "Rows are in the order they were run; the code changed between them (see each file's `source`)."
    )
    return "\n".join(lines) + "\n"


def _sig2(x: float) -> str:
    """Two significant figures, with thousands separators."""
    r = float(f"{x:.2g}")
    if r == 0 or abs(r) >= 100:
        return f"{r:,.0f}"
    return f"{r:.{max(0, 1 - math.floor(math.log10(abs(r))))}f}"


def _paper(data: dict[str, dict]) -> str:
    """The 10^8 × 10^7 projection from the ML-20M row's measured cells/s (growth taken as linear)."""
    res = data["bench_scale.json"]
    row = next(r for r in res["rows"] if r["case"] == "ml-20m" and r["engine"] == "chunked")
    cps, exp = row["cells_per_s"], res["growth_exponent"]["chunked"]
    seconds = 1e15 / cps
    hours = seconds / 3600
    return (
        f"**On paper: 10^8 users × 10^7 items** is 10^15 cells. At the {_sci(cps)} cells/s measured on the ML-20M shape "
        f"(`bench_scale.json`, one 2-core machine), and taking growth as linear (exponent 1, more cautious than the {exp:.2f} "
        f"fitted on small sizes), that is about {_sci(seconds)} s ≈ {_sig2(hours)} machine-hours. Users split into independent "
        f"shards, so it takes about {_sig2(hours / 100)} h on 100 such workers, {_sig2(hours / 1000)} h on 1,000, and 1 h on about "
        f"{_sig2(hours)}.\n"
    )


# --- bench_load, bench_vectors, bench_serve ---------------------------------------------------


def _load_table(data: dict[str, dict]) -> str:
    res = data["bench_load.json"]
    f = res["figures"]
    size = f["arrow_bytes"]
    labels = {"arrow": "`pyarrow.parquet.read_table` alone", "pandas": "`read_table(...).to_pandas()`", "xrec": "`xrec.read_interactions` (read, check, sort)"}
    lines = ["| job | seconds | rows/s | peak RSS MB | above the process's start MB | above start / Arrow table |", "|---|---|---|---|---|---|"]
    for job, label in labels.items():
        g = f["jobs"][job]
        above = g["peak"] - g["start"]
        lines.append(f"| {label} | {g['seconds']:.1f} | {g['rows'] / g['seconds']:,.0f} | {g['peak'] / 1e6:,.0f} | {above / 1e6:,.0f} | {above / size:.2f} |")
    lines.append("")
    lines.append(
        f"`{res['run']['command']}`: {f['rows']:,} rows, {f['parquet_mb']:,.0f} MB of Parquet, {size / 1e6:,.0f} MB as an Arrow "
        f"table; each job in a fresh process ({_load(res)}; times swing with the load, peak memory does not)."
    )
    return "\n".join(lines) + "\n"


def _vectors_table(data: dict[str, dict]) -> str:
    res = data["bench_vectors.json"]
    f = res["figures"]
    base = f["layouts"]["baseline"]["seconds"]
    names = {"baseline": "`np.load` + one gather (baseline)", "npy": "`.npy` + id file", "parquet": "Parquet", "safetensors": "`.safetensors`"}
    lines = ["| layout | time / baseline | extra peak RSS / output |", "|---|---|---|"]
    for key, label in names.items():
        r = f["layouts"][key]
        lines.append(f"| {label} | {r['seconds'] / base:.2f} | {r['extra_bytes'] / r['out_bytes']:.2f} |")
    lines.append("")
    lines.append(f"`{res['run']['command']}`: {f['items']:,} vectors × {f['dim']} float32, file rows shuffled ({_load(res)}).")
    return "\n".join(lines) + "\n"


def _serve_text(data: dict[str, dict]) -> str:
    res = data["bench_serve.json"]
    f = res["figures"]
    lat = f["latency_ms"]
    return (
        f"`{res['run']['command']}` ({f['clients']} concurrent clients for {f['seconds']:.0f} s on 127.0.0.1, the bundle "
        f"rewritten and reloaded halfway; {_load(res)}): {f['requests_per_s']:,.0f} requests/s, latency p50 {lat['p50']:.1f} ms, "
        f"p95 {lat['p95']:.1f} ms, p99 {lat['p99']:.1f} ms, {f['errors']} errors, {f['dropped']} dropped; reload "
        f"{f['reload']['ms']:.0f} ms.\n"
    )


def _dask_table(data: dict[str, dict]) -> str:
    res = data["bench_dask.json"]
    f = res["figures"]
    lines = ["| workers | pair | one process s | sharded s | sharded / one process | task compute s | engine overhead s | cluster start s | load |", "|" + "---|" * 9]
    for p in f["pairs"]:
        lines.append(
            f"| {p['workers']} | {p['pair']} | {p['one_process_s']:.1f} | {p['sharded_s']:.1f} | {p['sharded_s'] / p['one_process_s']:.2f}× | "
            f"{p['task_compute_s']:.1f} | {p['overhead_s']:.1f} | {p['cluster_start_s']:.1f} | {p['load_1min']:.1f} |"
        )
    equal = "equal" if f["per_user_values_equal"] else "**differ from**"
    lines.append("")
    lines.append(
        f"`{res['run']['command']}`: the {f['shape']} shape ({f['users']:,} users × {f['items']:,} items, {f['training_rows']:,} "
        f"training rows), {f['path']} path, one-process and sharded runs alternating ({_load(res)}). The engine overhead is the "
        f"wall time minus the shards' compute time divided by the workers. The sharded per-user values {equal} the one-process values."
    )
    return "\n".join(lines) + "\n"


def _encoders_table(data: dict[str, dict]) -> str:
    """Encoder paths (PyTorch eager vs ONNX Runtime images, float32 vs int8 text) at equal threads and batch."""
    res = data["bench_encoders.json"]
    rows = res["figures"]["rows"]
    rate = {(r["what"], r["path"], r["threads"], r["batch"]): r for r in rows if "per_s" in r and "path" in r}
    pairs = (("image forward only", "torch", "onnx", "img/s"), ("image", "torch", "onnx", "img/s"), ("text", "fp32", "int8", "texts/s"))
    lines = ["| measurement | threads | batch | before | after | after / before | FLOP limit used, before → after |", "|---|---|---|---|---|---|---|"]
    names = {"torch": "PyTorch eager", "onnx": "ONNX Runtime", "fp32": "float32", "int8": "int8"}
    for what, slow, fast, unit in pairs:
        keys = sorted((t, b) for (w, p, t, b) in rate if w == what and p == fast and (w, slow, t, b) in rate)
        for t, b in keys:
            a, z = rate[(what, slow, t, b)], rate[(what, fast, t, b)]
            lines.append(
                f"| {what} ({names[slow]} → {names[fast]}) | {t} | {b} | {a['per_s']:.1f} {unit} | {z['per_s']:.1f} {unit} | "
                f"{z['per_s'] / a['per_s']:.2f}× | {100 * a['share']:.0f} % → {100 * z['share']:.0f} % |"
            )
    lines.append("")
    notes = [f"`{res['run']['command']}` ({_load(res)}; the paths alternate in one process, so the ratios hold under load; int8 shares "
             "count float32-equivalent operations, so they can pass 100 %)"]
    cold = next((r for r in rows if r.get("what") == "demo cold"), None)
    if cold:
        before, after = cold["before (PyTorch eager)"], cold["after (ONNX Runtime)"]
        notes.append(f"{cold['n']} demo-shop items' images and texts into an empty cache: {before:.1f} s before, {after:.1f} s after ({before / after:.2f}×)")
    q = next((r for r in rows if r.get("what") == "int8 quality"), None)
    if q:
        notes.append(
            f"int8 text on {q['n']:,} demo-shop texts: cosine to float32 mean {q['cos_mean']:.3f} (5th percentile {q['cos_p05']:.3f}, "
            f"minimum {q['cos_min']:.3f}); ridge bridge text → image recall@10 {q['bridge_recall_fp32']:.3f} (float32) against "
            f"{q['bridge_recall_int8']:.3f} (int8)"
        )
    lines.append("; ".join(notes) + ".")
    return "\n".join(lines) + "\n"


def _bridges_table(data: dict[str, dict]) -> str:
    """Text→image lift over random at 10 per bridge and seed (``bridge_recall``), and mean fit seconds."""
    res = data["bench_bridges.json"]
    f = res["figures"]
    lines = [f"| bridge | mean, seeds 0–{f['seeds'] - 1} | per seed | fit s per seed (mean) |", "|---|---|---|---|"]
    for b in f["bridges"]:
        lifts = b["lift_per_seed"]
        lines.append(f"| {b['bridge']} | {sum(lifts) / len(lifts):.1f}× | {' '.join(f'{v:.1f}' for v in lifts)} | {sum(b['fit_s_per_seed']) / len(lifts):.1f} |")
    lines.append("")
    lines.append(
        f"`{res['run']['command']}`: {f['pairs']:,} image–description pairs, {100 * (1 - f['test_fraction']):.0f}/{100 * f['test_fraction']:.0f} "
        f"split per seed, lift = recall@{f['k']} / the random expectation ({_load(res)})."
    )
    return "\n".join(lines) + "\n"


_BROWSER_GOALS_MS = {"chart": 150, "gallery": 300}  # issue 14's goals for the medians


def _browser_text(data: dict[str, dict]) -> str:
    """Key press -> chart / gallery redrawn in JupyterLab + headless Chromium (``bench_browser.py``)."""
    res = data["browser.json"]
    f = res["figures"]
    chart, kernel, arrived = f["chart_ms"], f["kernel_ms"], f["chart_output_arrived_ms"]
    lines = ["| key press → | median ms | max ms | moves |", "|---|---|---|---|"]
    lines.append(f"| chart redrawn | {chart['median_ms']:.0f} | {chart['max_ms']:.0f} | {chart['n']} |")
    if f["gallery_timed"]:
        g = f["gallery_ms"]
        lines.append(f"| gallery redrawn | {g['median_ms']:.0f} | {g['max_ms']:.0f} | {g['n']} |")
    lines.append(f"| new chart output in the page (not yet drawn) | {arrived['median_ms']:.0f} | {arrived['max_ms']:.0f} | {arrived['n']} |")
    lines.append(
        f"| of it in the kernel: re-evaluation and redraw, the gallery's callback included (`mixer.last_seconds_`) | "
        f"{kernel['median_ms']:.0f} | {kernel['max_ms']:.0f} | {kernel['n']} |"
    )
    lines.append("")
    gallery = "" if f["gallery_timed"] else " The quickstart had no gallery when this ran, so the gallery was not timed."
    lines.append(
        f"`{res['run']['command']}`: the quickstart run in JupyterLab {f['jupyterlab']} and headless Chromium {f['chromium'].split('.')[0]} "
        f"on 127.0.0.1, then {f['moves']} arrow-key presses on the `{f['slider']}` slider, each awaited; times from "
        f"`performance.now()` at the key press to a MutationObserver seeing the new drawing ({_load(res)}; "
        f"{f['load_1min_at_end']:.1f} at the end). Goal: a median under {_BROWSER_GOALS_MS['chart']} ms for the chart and under "
        f"{_BROWSER_GOALS_MS['gallery']} ms for the gallery.{gallery}"
    )
    return "\n".join(lines) + "\n"


#: The README's benchmark blocks.
BENCH: dict[str, BenchBlock] = {
    "scale": BenchBlock(_SCALE_RUNS, _scale_table),
    "scale_screen": BenchBlock(_SCREEN_RUNS, _screen_table),
    "scale_paper": BenchBlock(("bench_scale.json",), _paper),
    "load": BenchBlock(("bench_load.json",), _load_table),
    "vectors": BenchBlock(("bench_vectors.json",), _vectors_table),
    "serve": BenchBlock(("bench_serve.json",), _serve_text),
    "dask": BenchBlock(("bench_dask.json",), _dask_table),
    "encoders": BenchBlock(("bench_encoders.json",), _encoders_table),
    "bridges": BenchBlock(("bench_bridges.json",), _bridges_table),
    "browser": BenchBlock(("browser.json",), _browser_text),
}


def render_bench(name: str, results: Path = RESULTS) -> str:
    """The text between a benchmark block's markers, rendered from its committed results files."""
    if name not in BENCH:
        raise ConfigError(f"docs: no benchmark block named {name!r}; blocks are {sorted(BENCH)}")
    block = BENCH[name]
    data = {}
    for file in block.files:
        path = results / file
        if not path.is_file():
            raise ConfigError(f"docs: benchmark block {name!r} needs {path}; run the benchmark that writes it")
        data[file] = json.loads(path.read_text(encoding="utf-8"))
    source = ", ".join(f"benchmarks/results/{f}" for f in block.files)
    return f"<!-- xrec:from {source} -->\n" + block.make(data)


def marked_blocks(pattern: re.Pattern[str], text: str, what: str) -> dict[str, str]:
    """Bodies of the README blocks ``pattern`` finds, by name; a name found twice is an error."""
    found: dict[str, str] = {}
    for m in pattern.finditer(text):
        if m["name"] in found:
            raise ConfigError(f"README: {what} {m['name']!r} appears twice")
        found[m["name"]] = m["body"]
    return found


def _bench_blocks(text: str) -> dict[str, str]:
    return marked_blocks(_BLOCK, text, "benchmark block")


def rewrite_bench(text: str, names: list[str] | None = None, results: Path = RESULTS) -> tuple[str, list[str]]:
    """``text`` with the named benchmark blocks (default: every one present) re-rendered; and their names."""
    present = _bench_blocks(text)
    names = [n for n in BENCH if n in present] if names is None else names
    bodies = {n: render_bench(n, results) for n in names}
    return _BLOCK.sub(lambda m: m.group(1) + bodies.get(m["name"], m["body"]) + m.group(4), text), names


def bench_problems(text: str, results: Path = RESULTS) -> list[str]:
    """Benchmark blocks that are missing, unknown, or differ from their results files' rendering."""
    present = _bench_blocks(text)
    problems = [f"{n}: no <!-- xrec:bench {n} --> block in the README" for n in BENCH if n not in present]
    problems += [f"{n}: a benchmark block that no renderer makes" for n in sorted(set(present) - set(BENCH))]
    for name in (n for n in BENCH if n in present):
        if present[name] != render_bench(name, results):
            problems.append(f"{name}: differs from benchmarks/results (hand-edited, or a results file changed); run `python -m xrec.docs {name}`")
    return problems
