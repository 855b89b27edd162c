"""The demo's cold-start reading: known-item and new-item sides, chosen and compared honestly.

Kept apart from :mod:`xrec.demo` so that module stays one idea (the steps of the study).
The side a baseline stands for is chosen on the validation split; every comparison here is
on the test split, paired over the users of one part (:mod:`xrec.evaluate.known_new`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd

from xrec.evaluate.compare import compare
from xrec.evaluate.known_new import restrict
from xrec.evaluate.scorecard import Scorecard

__all__ = ["EXPORTED", "best_on", "closing_note", "parts_chart", "side_comparisons", "side_rows", "sides_text"]

#: The blend the demo writes to ``blend.toml`` and judges on both sides.
EXPORTED = "gated blend"
_METRICS = ["ndcg@10", "hit_rate@10"]


def _users(parts: pd.Series, part: str):
    return parts.index[parts == part].to_numpy()


def best_on(cards: Mapping[str, Scorecard], parts: pd.Series, part: str, names: Sequence[str], metric: str = "ndcg@10") -> str:
    """The scorer among ``names`` with the best mean ``metric`` over the users of ``part`` (first on ties)."""
    users = _users(parts, part)
    return max(names, key=lambda n: restrict(cards[n], users).means()[metric])


def side_comparisons(cards: Mapping[str, Scorecard], parts: pd.Series, best_known: str, best_content_new: str,
                     seed: int, among_new: Mapping[str, Scorecard] | None = None) -> dict[str, Any]:
    """Paired comparisons on the test split, per side.

    ``known``: the exported and the learned blend against ``best_known`` on known-item users;
    ``new``: both blends and the mapped source against ``best_content_new`` on new-item users;
    ``mapped_vs_<source>``: the mapped source against attributes and against text on new-item users;
    ``among_new_mapped_vs_<source>``: the same with only new items as candidates (``among_new``:
    scorecards of :func:`~xrec.evaluate.known_new.among_new_items` on the new-item users).
    """
    known, new = _users(parts, "known items"), _users(parts, "new items")

    def on(users, label, base, *cands):
        return compare(restrict(cards[base], users, label), *(restrict(cards[c], users, label) for c in cands),
                       metrics=_METRICS, seed=seed)

    out = {
        "known": on(known, "known items", best_known, EXPORTED, "learned blend"),
        "new": on(new, "new items", best_content_new, *[c for c in (EXPORTED, "learned blend", "mapped") if c != best_content_new]),
    }
    for other in ("attributes", "text"):
        out[f"mapped_vs_{other}"] = on(new, "new items", other, "mapped")
    if among_new:
        for other in ("attributes", "text"):
            out[f"among_new_mapped_vs_{other}"] = compare(among_new[other], among_new["mapped"], metrics=_METRICS, seed=seed)
    return out


def side_rows(sides: Mapping[str, Any]) -> list[dict]:
    """Flat rows (side, baseline, candidate, metric, means, difference, CI, p) of :func:`side_comparisons`."""
    rows = []
    for side, comp in sides.items():
        for r in comp.table.to_dict(orient="records"):
            rows.append({
                "side": side, "baseline": comp.baseline.split(" [")[0], "candidate": r["candidate"].split(" [")[0],
                "metric": r["metric"], "baseline_mean": float(r["baseline_mean"]), "candidate_mean": float(r["candidate_mean"]),
                "difference": float(r["difference"]), "ci_low": float(r["ci_low"]), "ci_high": float(r["ci_high"]),
                "p_value": float(r["p_value"]), "n_users": int(comp.settings.get("n_users", 0)),
            })  # fmt: skip
    return rows


def sides_text(rows: Sequence[dict], metric: str = "hit_rate@10") -> list[str]:
    """One line per comparison on ``metric``: difference, 95% CI and whether it excludes zero."""
    lines = []
    for r in rows:
        if r["metric"] != metric:
            continue
        verdict = "CI excludes 0" if r["ci_low"] > 0 or r["ci_high"] < 0 else "CI includes 0"
        lines.append(f"  [{r['side']}] {r['candidate']} vs {r['baseline']}: {r['candidate_mean']:.3f} vs {r['baseline_mean']:.3f}, "
                     f"{r['difference']:+.3f} [{r['ci_low']:+.3f}, {r['ci_high']:+.3f}] ({verdict}, n={r['n_users']})")
    return lines


def _excludes_zero(r: dict) -> bool:
    return r["ci_low"] > 0 or r["ci_high"] < 0


def closing_note(rows: Sequence[dict], metric: str = "hit_rate@10") -> list[str]:
    """Whether the exported blend won each side (paired 95% CI above zero), with the numbers.

    A side not won is named with its difference and interval, and why: a loss (CI below
    zero) is the price of the other side (new items shown to known-item users take top-10
    places from known items, and the reverse), a tie (CI across zero) is too small to tell.
    """
    lines = []
    won = {}
    for side in ("known", "new"):
        r = next((r for r in rows if r["side"] == side and r["candidate"] == EXPORTED and r["metric"] == metric), None)
        if r is None:
            continue
        won[side] = r["ci_low"] > 0
        numbers = (f"{r['candidate_mean']:.3f} vs {r['baseline']} {r['baseline_mean']:.3f}, {r['difference']:+.3f} "
                   f"[{r['ci_low']:+.3f}, {r['ci_high']:+.3f}], n={r['n_users']}")
        if won[side]:
            lines.append(f"  {side} side: won ({numbers})")
        elif _excludes_zero(r):
            other = "new" if side == "known" else "known"
            lines.append(f"  {side} side: NOT won, lost ({numbers}): the price of the {other} side, whose items take "
                         f"top-10 places from {side} items in the one mixed ranking")
        else:
            lines.append(f"  {side} side: NOT won, no difference shown ({numbers}): the CI includes 0")
    head = "both sides won" if won and all(won.values()) else "not both sides won"
    return [f"The {EXPORTED} on {metric} (test split, paired 95% CI): {head}", *lines]


def parts_chart(frame: pd.DataFrame, metric: str = "hit_rate@10"):
    """Bars with 95% CIs: each scorer's ``metric`` on known items and on new items."""
    import altair as alt

    data = frame[frame["metric"] == metric]
    base = alt.Chart(data).encode(y=alt.Y("scorer:N", title=None), color=alt.Color("scorer:N", legend=None))
    bars = base.mark_bar().encode(
        x=alt.X("mean:Q", title=metric),
        tooltip=["scorer", "part", alt.Tooltip("mean:Q", format=".3f"), "n_users"],
    )
    rules = base.mark_rule().encode(x="ci_low:Q", x2="ci_high:Q")
    return (bars + rules).properties(width=260, height=220).facet(column=alt.Column("part:N", title=None)).properties(
        title="Known items and new items (no interactions in training), test split of the mixed protocol"
    )
