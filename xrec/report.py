"""Plain-text and JSON views of experiment results, for the command line."""

from __future__ import annotations

from typing import Any

import pandas as pd

from xrec._validation import parse_metric_column
from xrec.experiment import ExperimentResult, evaluation_options


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
    protocol = evaluation_options(result.spec)["protocol"]
    chance = ", ".join(f"HR@{k} {v:.4f}" for k, v in random_hit_rate(fold, result.spec.ks, protocol).items())
    record = protocol_record(protocol)
    among = f" (ranked among {record['negatives']} sampled negatives)" if "negatives" in record else " (full ranking)"
    parts = [head, "", "Scorecards (mean [95% bootstrap CI]):", table.to_string(), "", f"A random ranking expects {chance}{among}."]
    for name, rec in result.extras.get("learned", {}).items():
        weights = ", ".join(f"{k}={v:.3f}" for k, v in rec["weights"].items())
        gated = " (gated by item popularity; start weights shown)" if "band_weights" in rec else ""
        parts += ["", f"{name}: {rec['method']} on the validation split, {rec['metric']} = {rec['validation']:.4f} "
                  f"(best single source {rec['best_single']}: {rec['best_single_validation']:.4f}); weights {weights}{gated}"]
        if "bands" in rec:
            from xrec.blend.gating import band_weights_text

            bands = rec["bands"]
            used = bands.get("objective_used", "overall")
            why = f" ({bands['reason']})" if "reason" in bands else ""
            parts += [f"{name} band weights (objective {used}{why}):", *band_weights_text(rec["band_weights"], bands)]
    parts += known_new_text(result)
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


def known_new_parts(result: ExperimentResult) -> dict[str, Any] | None:
    """Known-item and new-item results of a mixed split (``None`` for other splits).

    Returns ``{"counts": {part: users}, "table": <per scorer, part and headline metric: mean and
    bootstrap 95% CI>, "comparisons": {part: Comparison against the baseline on that part's users}}``
    (comparisons only when the spec has a baseline). Parts: see
    :func:`xrec.evaluate.known_new.known_new_labels`.
    """
    if not str(result.split.settings.get("rule", "")).startswith("mixed"):
        return None
    from xrec.evaluate import compare
    from xrec.evaluate.known_new import known_new_labels, known_new_table, restrict

    k = min(result.spec.ks)
    metrics = tuple(f"{m}@{k}" for m in HEADLINE_METRICS)
    cards = {n: c for n, c in result.scorecards.items() if all(m in c.per_user for m in metrics)}
    labels = known_new_labels(result.split.test)
    seed = int(result.spec.evaluate.get("seed", 0))
    out: dict[str, Any] = {"counts": {str(p): int(n) for p, n in labels.value_counts().items()},
                           "table": known_new_table(cards, labels, metrics, seed=seed), "comparisons": {}}
    base = result.comparison.baseline if result.comparison is not None else None
    if base in cards and len(cards) > 1:
        for part in out["counts"]:
            users = labels.index[labels == part].to_numpy()
            others = [restrict(c, users, part) for n, c in cards.items() if n != base]
            out["comparisons"][part] = compare(restrict(cards[base], users, part), *others, metrics=list(metrics), seed=seed)
    return out


def known_new_text(result: ExperimentResult, parts: dict[str, Any] | None = None) -> list[str]:
    """Lines for :func:`format_experiment`: every scorer on known-item and new-item users, and the
    paired differences against the baseline on each part (mixed splits only)."""
    parts = known_new_parts(result) if parts is None else parts
    if parts is None:
        return []
    lines = ["", "Known items and new items (mixed split; users by what they hold out; mean [95% bootstrap CI]):"]
    t = parts["table"]
    for metric, block in t.groupby("metric", sort=False):
        cells = {(r["scorer"], f"{r['part']} (n={r['n_users']})"): _fmt(r["mean"], r["ci_low"], r["ci_high"]) for _, r in block.iterrows()}
        lines += [f"{metric}:", pd.Series(cells).unstack().loc[block["scorer"].unique()].to_string()]
    for part, comparison in parts["comparisons"].items():
        lines += ["", format_comparison(comparison)]
    return lines


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


def random_hit_rate(fold: Any, ks: tuple[int, ...], protocol: Any = None) -> dict[int, float]:
    """Expected hit rate of a uniformly random ranking on ``fold``, under ``protocol``.

    Full ranking (``protocol`` ``None`` or :class:`~xrec.evaluate.FullRanking`): a user with
    ``r`` held-out items among ``n`` unseen candidates misses all of them in a random top-K
    with the hypergeometric probability ``C(n-r, K) / C(n, K)``.

    Sampled negatives (:class:`~xrec.evaluate.SampledNegatives`): the candidates are the
    user's ``m = min(n_negatives, free items)`` sampled negatives plus the ``r`` held-out items
    not seen in training, so the miss probability is ``C(m, K) / C(m+r, K)``; with one held-out
    item this is a hit rate of ``K / (m+1)``, e.g. 10/101 for 100 negatives.
    """
    import numpy as np
    from scipy.stats import hypergeom

    from xrec.evaluate import SampledNegatives

    users = fold.eval_users
    seen = fold.train_matrix[users]
    truth = fold.heldout_matrix[users]
    if isinstance(protocol, SampledNegatives):
        seen.data[:] = 1
        truth.data[:] = 1
        excluded = (seen + truth).getnnz(axis=1)  # the sparse sum merges an item in both
        relevant = truth.getnnz(axis=1) - truth.multiply(seen).getnnz(axis=1)
        n_candidates = np.minimum(int(protocol.n_negatives), fold.n_items - excluded) + relevant
    else:
        n_candidates = fold.n_items - seen.getnnz(axis=1)
        relevant = truth.getnnz(axis=1)
    return {int(k): float(np.mean(1.0 - hypergeom.pmf(0, n_candidates, relevant, np.minimum(k, n_candidates)))) for k in ks}


def protocol_record(protocol: Any) -> dict[str, Any]:
    """The evaluation protocol as the JSON output records it: ``name``, and for sampled negatives ``negatives`` and ``seed``."""
    from xrec.evaluate import SampledNegatives

    if isinstance(protocol, SampledNegatives):
        return {"name": "sampled_negatives", "negatives": int(protocol.n_negatives), "seed": int(protocol.seed)}
    return {"name": "full_ranking"}


def experiment_payload(result: ExperimentResult) -> dict[str, Any]:
    """JSON-ready summary: settings, the protocol, a random ranking's hit rate, per-scorer summaries with CIs, the comparison."""
    protocol = evaluation_options(result.spec)["protocol"]
    out: dict[str, Any] = {
        "spec": result.spec.name,
        "dataset": {"name": result.dataset.name, "fingerprint": result.dataset.fingerprint()},
        "split": result.split.settings,
        "protocol": protocol_record(protocol),
        "random_hit_rate": {f"hit_rate@{k}": v for k, v in random_hit_rate(result.split.test, result.spec.ks, protocol).items()},
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
    parts = known_new_parts(result)
    if parts is not None:
        # users per part, every scorer's headline metrics per part, and per-part comparisons with the baseline
        out["known_new"] = {"counts": parts["counts"], "rows": parts["table"].to_dict(orient="records"),
                            "comparisons": {p: c.to_dict() for p, c in parts["comparisons"].items()}}
    if "segments" in result.extras:
        # One row per (breakdown, segment, metric, scorer); small segments have no interval (null).
        rows = result.extras["segments"].astype(object).where(result.extras["segments"].notna(), None)
        out["segments"] = rows.to_dict(orient="records")
    if result.extras.get("top_lists"):
        out["top_lists"] = {name: change.to_dict() for name, change in result.extras["top_lists"].items()}
    if result.extras.get("pairs"):
        out["pairs"] = [{key: value.to_dict() for key, value in run.items()} for run in result.extras["pairs"]]
    return out
