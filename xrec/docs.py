"""The README's result tables, generated from real runs: ``python -m xrec.docs``.

Every table of results in ``README.md`` sits between two marker comments::

    <!-- xrec:results NAME -->
    <!-- xrec:inputs sha256:... -->
    | the table ... |
    <!-- /xrec:results -->

``python -m xrec.docs`` re-runs the study behind each table (the demo, or a built-in spec,
seed 0, full ranking) and rewrites what is between the markers, so the numbers in the README
are always those of the code that produced them. The second line records a SHA-256
fingerprint of the table's inputs: the spec file, the xrec source files the run goes through,
and the dataset's fingerprint. ``tests/test_docs.py`` keeps the README honest: cheap tables
(:data:`TABLES` marks them) are re-run and compared text for text; for the others, the
fingerprint is recomputed and a mismatch fails, naming the table to regenerate.

Usage::

    python -m xrec.docs                    # regenerate every table in README.md
    python -m xrec.docs movielens_fusion   # just one
    python -m xrec.docs --check            # exit 1 if any table is stale (what the test checks)

Benchmark figures (``<!-- xrec:bench NAME -->`` blocks) are rendered from the committed
``benchmarks/results/*.json`` files by :mod:`xrec.docs_bench` in the same pass; no
benchmark is run.
"""

from __future__ import annotations

import argparse
import hashlib
import re
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from xrec.docs_bench import marked_blocks
from xrec.errors import ConfigError

__all__ = ["TABLES", "Table", "check_readme", "fingerprint", "render", "update_readme"]

PACKAGE = Path(__file__).resolve().parent
README = PACKAGE.parent / "README.md"
_BLOCK = re.compile(r"(<!-- xrec:results (?P<name>[\w-]+) -->\n)(?P<body>.*?)(<!-- /xrec:results -->)", re.S)
_INPUTS = re.compile(r"<!-- xrec:inputs (sha256:[0-9a-f]{64}) -->")

# What every run goes through: data, split, sources, blends, evaluation, this generator.
_COMMON_CODE = ("data", "sources", "blend", "evaluate", "split.py", "fold.py", "spec.py", "experiment.py", "docs.py", "_settings.py")


@dataclass(frozen=True)
class Table:
    """One generated table: how to make it, and what its numbers depend on.

    Attributes
    ----------
    make
        Runs the study; returns the Markdown that goes between the markers.
    cheap
        Re-run by the tests (seconds); otherwise guarded by its inputs' fingerprint.
    spec
        Built-in spec name the table is made from (its file is an input), if any.
    code
        Paths under ``xrec/`` (files or folders) the run goes through.
    dataset
        Returns the dataset fingerprint.
    """

    make: Callable[[], str]
    cheap: bool
    spec: str | None
    code: tuple[str, ...]
    dataset: Callable[[], str]


def _spec_dataset(name: str) -> Callable[[], str]:
    def fp() -> str:
        from xrec.experiment import load_spec_dataset
        from xrec.spec import load_spec

        return load_spec_dataset(load_spec(name)).fingerprint()

    return fp


def _demo_dataset() -> str:
    from xrec.data.demo import load_demo_shop

    return load_demo_shop(None).fingerprint()


def _signed(x: float, digits: int = 4) -> str:
    return f"{x:+.{digits}f}".replace("-", "−")


def _spec_table(name: str, result=None) -> str:
    """Scorecards of a built-in spec's test split (HR@10, NDCG@10 with 95% bootstrap CIs), each
    scorer's paired NDCG@10 difference against the spec's baseline, and learned blends'
    validation score (``result``: an experiment already run from the spec)."""
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    spec = load_spec(name)
    result = run_experiment(spec) if result is None else result
    base = spec.baseline
    diffs = {}
    if result.comparison is not None:
        t = result.comparison.table
        for _, r in t[t["metric"] == "ndcg@10"].iterrows():
            diffs[r["candidate"]] = f"{_signed(r['difference'])} [{_signed(r['ci_low'])}, {_signed(r['ci_high'])}]"
    learned = result.extras.get("learned", {})
    head = ["scorer", "HR@10 [95% CI]", "NDCG@10 [95% CI]", f"NDCG@10 − {base} [95% CI]"] + (["validation NDCG@10"] if learned else [])
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for scorer, card in result.scorecards.items():
        s = card.summary()
        cell = {m: f"{s.loc[m, 'mean']:.4f} [{s.loc[m, 'ci_low']:.4f}, {s.loc[m, 'ci_high']:.4f}]" for m in ("hit_rate@10", "ndcg@10")}
        valid = f"{learned[scorer]['validation']:.4f}" if scorer in learned else ""
        diff = "baseline" if scorer == base else diffs.get(scorer, "")
        row = [scorer, cell["hit_rate@10"], cell["ndcg@10"], diff] + ([valid] if learned else [])
        lines.append("| " + " | ".join(row) + " |")
    fold = result.split.test
    lines.append("")
    lines.append(
        f"`xrec run {name}`: {fold.n_users:,} users × {fold.n_items:,} items, split {spec.split.get('rule')} "
        f"(seed {spec.split.get('seed', 0)}), full ranking, test split; differences are paired "
        "(bootstrap 95% CI)" + ("; validation is the learned weights' score on the validation split" if learned else ".")
    )
    singles = sorted({(r["best_single"], r["best_single_validation"]) for r in learned.values() if r.get("best_single")})
    if singles:
        lines[-1] += ", where the best single source scores " + ", ".join(f"{n} {v:.4f}" for n, v in singles) + "."
    return "\n".join(lines) + "\n"


def _demo_table() -> str:
    """``xrec demo``'s test NDCG@10 per scorer, hit rate@10 on known and on new items, and the
    paired comparisons of each side."""
    from xrec.demo import run_demo

    with tempfile.TemporaryDirectory() as out:
        summary = run_demo(out, progress=False, seed=0)
    best = summary["best_single_source"]
    parts = summary["known_new_hit_rate"]
    lines = ["| scorer | NDCG@10 (test) | HR@10 known items | HR@10 new items |", "|---|---|---|---|"]
    for scorer, value in sorted(summary["test"].items(), key=lambda kv: kv[1]):
        p = parts.get(scorer, {})
        lines.append(f"| {scorer} | {value:.4f} | {p.get('known items', float('nan')):.3f} | {p.get('new items', float('nan')):.3f} |")
    lines.append("")
    vs = summary["vs_best_single"]["learned blend"]
    n = summary["parts"]
    lines.append(
        f"`xrec demo` (seed 0, mixed split: {n.get('known items', 0):,} shoppers hold out a known item, "
        f"{n.get('new items', 0):,} a new one; test split, full ranking): the learned blend against the best "
        f"single source on validation ({best}): {_signed(vs['difference'])} NDCG@10, 95% paired-bootstrap CI "
        f"[{_signed(vs['ci_low'])}, {_signed(vs['ci_high'])}], p = {vs['p_value']:.3f}."
    )
    lines += ["", "| side | candidate vs baseline | HR@10 | difference [95% CI] |", "|---|---|---|---|"]
    for r in summary["sides"]:
        if r["metric"] == "hit_rate@10":
            lines.append(f"| {r['side']} | {r['candidate']} vs {r['baseline']} | {r['candidate_mean']:.3f} vs {r['baseline_mean']:.3f} "
                         f"| {_signed(r['difference'], 3)} [{_signed(r['ci_low'], 3)}, {_signed(r['ci_high'], 3)}] |")
    bands = summary["gated_bands"]
    lines.append("")
    lines.append(
        f"Sides: known-item shoppers against the best single source on known items ({summary['best_single_known_items']}), "
        f"new-item shoppers against the best content-only source on new items ({summary['best_content_new_items']}), "
        "both chosen on validation; `among_new` ranks the new items only. The exported gated blend learned its bands on "
        f"validation purchases {bands['learned_bands']} (not learned: {bands['unlearned_bands'] or 'none'}); "
        f"mapped source: {summary['mapped_mapping']['method']} map, new_item_scale {summary['mapped_new_item_scale']:g} "
        "(chosen on validation)."
    )
    return "\n".join(lines) + "\n"


def _cold_table(name: str) -> str:
    """A mixed-protocol spec: its scorecards (as :func:`_spec_table`) and every scorer's hit rate@10
    on known-item and on new-item users, with bootstrap 95% CIs."""
    from xrec.evaluate.known_new import known_new_labels, known_new_table
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    result = run_experiment(load_spec(name))
    labels = known_new_labels(result.split.test)
    table = known_new_table(result.scorecards, labels, ("hit_rate@10",))
    counts = labels.value_counts()
    parts = [p for p in ("known items", "new items", "cold users") if p in counts.index]
    lines = [_spec_table(name, result), "| scorer | " + " | ".join(f"HR@10 {p} (n={counts[p]}) [95% CI]" for p in parts) + " |",
             "|---|" + "---|" * len(parts)]
    for scorer in result.scorecards:
        cells = []
        for p in parts:
            r = table[(table["scorer"] == scorer) & (table["part"] == p)].iloc[0]
            cells.append(f"{r['mean']:.4f} [{r['ci_low']:.4f}, {r['ci_high']:.4f}]")
        lines.append(f"| {scorer} | " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


def _p(p: float) -> str:
    return "<0.001" if p < 0.001 else f"{p:.3f}"


def _segment_table(name: str, by: tuple[str, ...] = ("item_segment", "user_segment")) -> str:
    """``xrec run NAME --by ...``: HR@10 per segment, and each scorer's paired difference against the
    baseline within the segment (95% CI, Holm over the segments of that breakdown)."""
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    spec = load_spec(name)
    result = run_experiment(spec, by=by)
    base, metric = spec.baseline, "hit_rate@10"
    means = result.extras["segments"]
    means = means[means["metric"] == metric]
    diffs = result.comparison.segments
    diffs = diffs[diffs["metric"] == metric]
    names = [n for n in result.scorecards if n != base]
    head = ["breakdown", "segment", "users", f"{base} HR@10"] + [f"{n} − {base} [95% CI], Holm p" for n in names]
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for (breakdown, segment), rows in diffs.groupby(["by", "segment"], sort=False):
        first = rows.iloc[0]
        b = means[(means["by"] == breakdown) & (means["segment"] == segment) & (means["scorer"] == base)].iloc[0]
        cells = []
        for n in names:
            r = rows[rows["candidate"] == n].iloc[0]
            cells.append(f"{_signed(r['difference'])} (too few users)" if r["small"] else
                         f"{_signed(r['difference'])} [{_signed(r['ci_low'])}, {_signed(r['ci_high'])}], {_p(r['p_holm_segments'])}")
        lines.append("| " + " | ".join([breakdown, str(segment), f"{int(first['n_users']):,}", f"{b['mean']:.4f}", *cells]) + " |")
    lines.append("")
    lines.append(
        f"`xrec run {name} {' '.join('--by ' + b for b in by)}` (seed 0, test split, full ranking): hit rate at 10 by "
        f"the held-out item's segment and by the user's training-history length; segments under "
        f"{int(result.comparison.settings['min_users'])} users get no interval or test."
    )
    return "\n".join(lines) + "\n"


_SPEC_CODE = _COMMON_CODE + ("specs",)
#: The README's generated tables.
TABLES: dict[str, Table] = {
    "demo": Table(_demo_table, cheap=False, spec=None, code=_COMMON_CODE + ("demo.py", "_demo_cold.py", "encoders"), dataset=_demo_dataset),
    "movielens": Table(lambda: _spec_table("movielens"), cheap=True, spec="movielens", code=_SPEC_CODE, dataset=_spec_dataset("movielens")),
    "movielens_segments": Table(
        lambda: _segment_table("movielens"), cheap=True, spec="movielens", code=_SPEC_CODE, dataset=_spec_dataset("movielens")
    ),
    "movielens_fusion": Table(
        lambda: _spec_table("movielens_fusion"), cheap=False, spec="movielens_fusion", code=_SPEC_CODE, dataset=_spec_dataset("movielens_fusion")
    ),
    "movielens_cold": Table(
        lambda: _cold_table("movielens_cold"), cheap=False, spec="movielens_cold", code=_SPEC_CODE + ("encoders",),
        dataset=_spec_dataset("movielens_cold"),
    ),
}


def _code_files(paths: tuple[str, ...]) -> list[Path]:
    files: set[Path] = set()
    for rel in paths:
        p = PACKAGE / rel
        if p.is_dir():
            files.update(f for f in p.rglob("*") if f.suffix in (".py", ".toml") and "__pycache__" not in f.parts)
        elif p.is_file():
            files.add(p)
        else:
            raise ConfigError(f"docs: input {rel!r} is not under {PACKAGE}")
    return sorted(files)


def fingerprint(name: str) -> str:
    """``sha256:<hex>`` of a table's inputs: its name, spec file, source files and dataset fingerprint."""
    table = _table(name)
    h = hashlib.sha256()
    h.update(f"xrec docs table {name}\n".encode())
    for path in _code_files(table.code):
        rel = path.relative_to(PACKAGE).as_posix()
        h.update(f"file {rel} {len(path.read_bytes())}\n".encode())
        h.update(path.read_bytes())
    h.update(f"dataset {table.dataset()}\n".encode())
    return "sha256:" + h.hexdigest()


def render(name: str) -> str:
    """The full text between a table's markers: the inputs line, then the table from a fresh run."""
    return f"<!-- xrec:inputs {fingerprint(name)} -->\n" + _table(name).make()


def _table(name: str) -> Table:
    if name not in TABLES:
        raise ConfigError(f"docs: no table named {name!r}; tables are {sorted(TABLES)}")
    return TABLES[name]


def _blocks(text: str) -> dict[str, str]:
    return marked_blocks(_BLOCK, text, "table")


def update_readme(names: list[str] | None = None, readme: Path = README, *, progress: bool = True) -> list[str]:
    """Regenerate the named tables (default: every table with markers in ``readme``); returns their names."""
    from xrec.docs_bench import BENCH, rewrite_bench

    text = readme.read_text(encoding="utf-8")
    present = _blocks(text)
    bench = None if names is None else [n for n in names if n in BENCH and n not in TABLES]
    names = [n for n in TABLES if n in present] if names is None else [n for n in names if n not in (bench or ())]
    missing = [n for n in names if n not in present]
    if missing:
        raise ConfigError(f"README: no markers for table(s) {missing}; add <!-- xrec:results NAME --> ... <!-- /xrec:results -->")
    bodies = {}
    for name in names:
        if progress:
            print(f"- running {name} ...", flush=True)
        bodies[name] = render(name)
    text = _BLOCK.sub(lambda m: m.group(1) + bodies.get(m["name"], m["body"]) + m.group(4), text)
    text, bench = rewrite_bench(text, bench)  # benchmark blocks: rendered from benchmarks/results, nothing re-run
    from xrec._files import write_text_atomic

    write_text_atomic(readme, text)
    return names + bench


def check_readme(readme: Path = README, *, rerun_cheap: bool = True) -> list[str]:
    """Problems with the README's tables (empty when up to date).

    Every table in :data:`TABLES` and every benchmark block in
    :data:`xrec.docs_bench.BENCH` must have markers; a benchmark block must equal the rendering
    of its committed results files; an expensive table's recorded inputs
    fingerprint must equal the current one; a cheap table (when ``rerun_cheap``) must equal
    a fresh run.
    """
    from xrec.docs_bench import bench_problems

    text = readme.read_text(encoding="utf-8")
    present = _blocks(text)
    problems = bench_problems(text)
    for name, table in TABLES.items():
        if name not in present:
            problems.append(f"{name}: no <!-- xrec:results {name} --> block in {readme.name}")
            continue
        body = present[name]
        recorded = _INPUTS.search(body)
        current = fingerprint(name)
        if recorded is None or recorded.group(1) != current:
            problems.append(f"{name}: inputs changed since the table was made (code, spec or data); run `python -m xrec.docs {name}`")
        elif table.cheap and rerun_cheap and body != render(name):
            problems.append(f"{name}: a fresh run gives other numbers; run `python -m xrec.docs {name}`")
    unknown = sorted(set(present) - set(TABLES))
    problems += [f"{name}: a results block that no generator makes" for name in unknown]
    return problems


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m xrec.docs", description="Regenerate the README's result tables from real runs.")
    from xrec.docs_bench import BENCH

    parser.add_argument("names", nargs="*", help=f"tables to regenerate (default: all): {', '.join([*TABLES, *BENCH])}")
    parser.add_argument("--check", action="store_true", help="report stale tables and exit 1 instead of rewriting")
    parser.add_argument("--readme", type=Path, default=README)
    args = parser.parse_args(argv)
    if args.check:
        problems = check_readme(args.readme)
        for p in problems:
            print(p)
        return 1 if problems else 0
    done = update_readme(args.names or None, args.readme)
    print(f"updated {args.readme}: {', '.join(done)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
