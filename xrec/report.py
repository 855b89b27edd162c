"""Plain-text and JSON views of experiment results, for the command line."""

from __future__ import annotations

from typing import Any

import pandas as pd

from xrec._validation import parse_metric_column
from xrec.experiment import ExperimentResult


def _fmt(mean: float, lo: float, hi: float) -> str:
    if pd.isna(lo):
        return f"{mean:.4f}"
    return f"{mean:.4f} [{lo:.4f}, {hi:.4f}]"


def scorecard_table(scorecards: dict[str, Any]) -> pd.DataFrame:
    """One row per scorer; each cell "mean [ci_low, ci_high]" (bootstrap 95% CI)."""
    rows = {}
    for name, card in scorecards.items():
        summary = card.summary()
        rows[name] = {metric: _fmt(r["mean"], r["ci_low"], r["ci_high"]) for metric, r in summary.iterrows()}
    return pd.DataFrame(rows).T


HEADLINE_METRICS = ("hit_rate", "ndcg")


def format_comparison(comparison: Any, metrics: tuple[str, ...] | None = None) -> str:
    """The comparison with differences, CIs and p-values, one line per (metric, candidate).

    ``metrics`` keeps only those metric names (e.g. ``("hit_rate", "ndcg")``); default all.
    """
    t = comparison.table
    if metrics is not None:
        t = t[t["metric"].map(lambda m: parse_metric_column(m)[0]).isin(metrics)]
    lines = [comparison.title()]
    for _, r in t.iterrows():
        verdict = "excludes 0" if (r["ci_low"] > 0 or r["ci_high"] < 0) else "includes 0"
        lines.append(
            f"  {r['metric']:<14} {r['candidate']:<22} {r['baseline_mean']:.4f} -> {r['candidate_mean']:.4f}  "
            f"diff {r['difference']:+.4f} [{r['ci_low']:+.4f}, {r['ci_high']:+.4f}] ({verdict})  "
            f"p={r['p_value']:.4f} holm={r['p_holm']:.4f}"
        )
    lines += [change.describe() for change in getattr(comparison, "top_lists", {}).values()]
    return "\n".join(lines)


def format_experiment(result: ExperimentResult) -> str:
    """Scorecard table (means with 95% CIs) and the paired comparison against the baseline."""
    split = result.split.settings
    fold = result.split.test
    head = (
        f"{result.spec.name}: {result.dataset.name}, {fold.n_users} users x {fold.n_items} items, "
        f"split {split.get('rule')} (seed {split.get('seed', 0)}), {len(fold.eval_users)} test users, "
        f"protocol {next(iter(result.scorecards.values())).protocol.get('kind', '?')}"
    )
    table = scorecard_table(result.scorecards).T
    chance = ", ".join(f"HR@{k} {v:.4f}" for k, v in random_hit_rate(fold, result.spec.ks).items())
    parts = [head, "", "Scorecards (mean [95% bootstrap CI]):", table.to_string(), "", f"A random ranking expects {chance}."]
    for name, rec in result.extras.get("learned", {}).items():
        weights = ", ".join(f"{k}={v:.3f}" for k, v in rec["weights"].items())
        gated = " (gated by item popularity; start weights shown)" if "band_weights" in rec else ""
        parts += ["", f"{name}: {rec['method']} on the validation split, {rec['metric']} = {rec['validation']:.4f} "
                  f"(best single source {rec['best_single']}: {rec['best_single_validation']:.4f}); weights {weights}{gated}"]
    if result.comparison is not None:
        parts += ["", format_comparison(result.comparison, HEADLINE_METRICS), "(every metric's comparison: --json)"]
    if "segments" in result.extras:
        headline = f"{HEADLINE_METRICS[0]}@{min(result.spec.ks)}"
        parts += ["", format_segments(result.extras["segments"], headline)]
        if result.comparison is not None:
            parts += ["", format_segment_comparison(result.comparison, headline)]
    changes = result.extras.get("top_lists", {})
    if changes:
        parts += ["", "Top-list overlap with the baseline (share of each user's top-K kept):"]
        parts += [change.describe() for change in changes.values()]
    for run in result.extras.get("pairs", []):
        parts += ["", format_comparison(run["comparison"], HEADLINE_METRICS)]
        if "top_lists" in run:
            parts.append(run["top_lists"].describe())
    return "\n".join(parts)


def format_segments(table: pd.DataFrame, metric: str) -> str:
    """Per-segment means of ``metric``: one block per breakdown, scorers × segments, ``mean [CI]``.

    ``table`` is :meth:`Scorecard.by_segment` output with a ``scorer`` column; small segments
    show their mean and are marked ``small``; the header row gives each segment's user count.
    """
    rows = table[table["metric"] == metric]
    lines = [f"Results by segment ({metric}, mean [95% bootstrap CI]; 'small': too few users for an interval):"]
    for by, block in rows.groupby("by", sort=False):
        sizes = block.drop_duplicates("segment").set_index("segment")["n_users"]
        cells = {
            (r["scorer"], f"{r['segment']} (n={sizes[r['segment']]})"): (
                f"{r['mean']:.4f} small" if r["small"] else _fmt(r["mean"], r["ci_low"], r["ci_high"])
            )
            for _, r in block.iterrows()
        }
        frame = pd.Series(cells).unstack().loc[block["scorer"].unique(), [f"{s} (n={n})" for s, n in sizes.items()]]
        lines += ["", f"by {by}:", frame.to_string()]
    return "\n".join(lines)


def format_segment_comparison(comparison: Any, metric: str) -> str:
    """The comparison of ``metric`` within each segment: difference, CI and Holm-over-segments p."""
    t = comparison.segments
    t = t[t["metric"] == metric]
    lines = [f"Paired differences vs {comparison.baseline!r} by segment ({metric}; holm: Holm over the segments):"]
    for _, r in t.iterrows():
        head = f"  {r['by']:<13} {str(r['segment']):<16} n={int(r['n_users']):<6} {r['candidate']:<22}"
        if r["small"]:
            lines.append(f"{head} diff {r['difference']:+.4f} (small segment: no interval, no test)")
        else:
            verdict = "excludes 0" if (r["ci_low"] > 0 or r["ci_high"] < 0) else "includes 0"
            lines.append(f"{head} diff {r['difference']:+.4f} [{r['ci_low']:+.4f}, {r['ci_high']:+.4f}] ({verdict}) "
                         f"p={r['p_value']:.4f} holm={r['p_holm_segments']:.4f}")
    return "\n".join(lines)


def random_hit_rate(fold: Any, ks: tuple[int, ...]) -> dict[int, float]:
    """Expected hit rate of a uniformly random full ranking on ``fold``.

    A user with ``r`` held-out items among ``n`` candidates misses all of them in a random
    top-K with the hypergeometric probability ``C(n-r, K) / C(n, K)``.
    """
    import numpy as np
    from scipy.stats import hypergeom

    users = fold.eval_users
    n_seen = np.diff(fold.train_matrix.indptr)[users]
    n_candidates = fold.n_items - n_seen
    relevant = np.diff(fold.heldout_matrix.indptr)[users]
    return {int(k): float(np.mean(1.0 - hypergeom.pmf(0, n_candidates, relevant, np.minimum(k, n_candidates)))) for k in ks}


def experiment_payload(result: ExperimentResult) -> dict[str, Any]:
    """JSON-ready summary: settings, per-scorer summaries with CIs, the comparison."""
    out: dict[str, Any] = {
        "spec": result.spec.name,
        "dataset": {"name": result.dataset.name, "fingerprint": result.dataset.fingerprint()},
        "split": result.split.settings,
        "scorecards": {},
    }
    for name, card in result.scorecards.items():
        summary = card.summary()
        out["scorecards"][name] = {
            metric: {k: (None if pd.isna(v) else float(v)) for k, v in r[["mean", "ci_low", "ci_high"]].items()}
            for metric, r in summary.iterrows()
        }
        out["scorecards"][name]["n_users"] = int(card.n_users)
    if result.comparison is not None:
        out["comparison"] = result.comparison.to_dict()
    if result.extras.get("learned"):
        out["learned"] = result.extras["learned"]
    if "segments" in result.extras:
        # One row per (breakdown, segment, metric, scorer); small segments have no interval (null).
        rows = result.extras["segments"].astype(object).where(result.extras["segments"].notna(), None)
        out["segments"] = rows.to_dict(orient="records")
    if result.extras.get("top_lists"):
        out["top_lists"] = {name: change.to_dict() for name, change in result.extras["top_lists"].items()}
    if result.extras.get("pairs"):
        out["pairs"] = [{key: value.to_dict() for key, value in run.items()} for run in result.extras["pairs"]]
    return out
