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
    if result.comparison is not None:
        parts += ["", format_comparison(result.comparison, HEADLINE_METRICS), "(every metric's comparison: --json)"]
    return "\n".join(parts)


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
    return out
