"""Charts of results by segment: per-segment means and per-segment paired differences.

Both read the tables the evaluation already made (:meth:`xrec.evaluate.Scorecard.by_segment`,
:attr:`xrec.evaluate.Comparison.segments`); nothing is recomputed here. One panel per
breakdown (item segment, user segment, a catalog column), each segment labelled with its
number of users; segments too small for an interval are drawn pale and say so.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import altair as alt
import numpy as np
import pandas as pd

from xrec.errors import ConfigError, DataError
from xrec.notebook.charts import BASELINE_COLOR, BETTER_COLOR, UNCLEAR_COLOR

__all__ = ["segment_differences", "segment_means", "segment_section"]

SMALL_COLOR = "#d9d9d9"


def _rows(table: pd.DataFrame, metric: str, needed: tuple[str, ...]) -> pd.DataFrame:
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise DataError(f"segment table lacks column(s) {missing}; build it with Scorecard.by_segment or compare(..., by=...)")
    rows = table[table["metric"] == metric].copy()
    if rows.empty:
        raise ConfigError(f"metric {metric!r} is not in the segment table; available: {sorted(set(table['metric']))}")
    rows["segment_n"] = [f"{s} (n={int(n)})" for s, n in zip(rows["segment"], rows["n_users"])]
    return rows


def _panels(rows: pd.DataFrame, draw, title: str) -> alt.TopLevelMixin:
    panels = [draw(block, by) for by, block in rows.groupby("by", sort=False)]
    chart = panels[0] if len(panels) == 1 else alt.vconcat(*panels).resolve_scale(color="shared")
    return chart.properties(title=title)


def segment_means(
    table: pd.DataFrame | Mapping[str, Any],
    metric: str = "hit_rate@10",
    labels: Any = None,
    *,
    title: str | None = None,
    width: int = 360,
) -> alt.TopLevelMixin:
    """Mean of ``metric`` per segment and scorer, with each segment's own interval.

    Parameters
    ----------
    table
        Rows of :meth:`Scorecard.by_segment` with a ``scorer`` column (as in
        ``ExperimentResult.extras["segments"]``), or a mapping name -> Scorecard (then
        ``labels`` is required and the table is built here).
    metric
        One ``"metric@K"`` column.
    labels
        Segment labels (a Series, or several) when scorecards are given.
    title, width
        Chart title and panel width in pixels.
    """
    if isinstance(table, Mapping):
        if labels is None:
            raise ConfigError("segment_means: give labels along with the scorecards (segment_labels(fold, by))")
        table = pd.concat([card.by_segment(labels, [metric]).assign(scorer=name) for name, card in table.items()], ignore_index=True)
    rows = _rows(table, metric, ("by", "segment", "metric", "n_users", "mean", "ci_low", "ci_high", "small", "scorer"))
    names = list(dict.fromkeys(rows["scorer"]))
    rows["note"] = np.where(rows["small"], "small segment: no interval", "")

    def draw(block: pd.DataFrame, by: str) -> alt.TopLevelMixin:
        order = list(dict.fromkeys(block["segment_n"]))
        y = alt.Y("segment_n:N", sort=order, title=by)
        offset = alt.YOffset("scorer:N", sort=names)
        color = alt.Color("scorer:N", sort=names, legend=alt.Legend(title=None, orient="bottom"))
        tooltip = ["scorer:N", "segment:N", "n_users:Q", alt.Tooltip("mean:Q", format=".4f"),
                   alt.Tooltip("ci_low:Q", format=".4f"), alt.Tooltip("ci_high:Q", format=".4f"), "note:N"]
        base = alt.Chart(block)
        bars = base.mark_bar().encode(y=y, yOffset=offset, x=alt.X("mean:Q", title=metric), color=color, tooltip=tooltip,
                                      opacity=alt.condition(alt.datum.small, alt.value(0.35), alt.value(0.9)))
        err = base.mark_errorbar(ticks=True, color="black").encode(y=y, yOffset=offset, x=alt.X("ci_low:Q", title=metric), x2="ci_high:Q")
        return alt.layer(bars, err).properties(width=width, height=alt.Step(12))

    return _panels(rows, draw, title or f"{metric} by segment (95% bootstrap CI; pale: too few users for an interval)")


def segment_differences(
    comparison: Any,
    metric: str = "hit_rate@10",
    *,
    title: str | None = None,
    width: int = 360,
) -> alt.TopLevelMixin:
    """Paired difference (candidate − baseline) of ``metric`` in every segment, with its interval.

    Candidates are told apart by marker shape; colour says what the segment shows: ``higher`` / ``lower`` when the interval excludes 0
    and the Holm-over-segments p-value is under 0.05, ``unclear`` otherwise, ``too small``
    for segments without a test.

    Parameters
    ----------
    comparison
        A :class:`~xrec.evaluate.Comparison` made with ``by=``.
    metric
        One ``"metric@K"`` column.
    title, width
        Chart title and panel width in pixels.
    """
    table = getattr(comparison, "segments", None)
    if table is None or len(table) == 0:
        raise ConfigError("segment_differences: the comparison has no segments; make it with compare(..., by=segment_labels(...))")
    rows = _rows(table, metric, ("by", "segment", "metric", "n_users", "candidate", "difference", "ci_low", "ci_high", "small"))
    names = list(dict.fromkeys(rows["candidate"]))
    p = rows["p_holm_segments"].to_numpy(dtype=float)
    lo, hi = rows["ci_low"].to_numpy(dtype=float), rows["ci_high"].to_numpy(dtype=float)
    rows["verdict"] = np.select(
        [rows["small"].to_numpy(dtype=bool), (lo > 0) & (p < 0.05), (hi < 0) & (p < 0.05)], ["too small", "higher", "lower"], "unclear"
    )
    color = alt.Color("verdict:N", scale=alt.Scale(domain=["higher", "unclear", "lower", "too small"],
                                                   range=[BETTER_COLOR, UNCLEAR_COLOR, BASELINE_COLOR, SMALL_COLOR]),
                      legend=alt.Legend(title=None, orient="bottom"))
    x_title = f"{metric}: difference vs {comparison.baseline}"

    def draw(block: pd.DataFrame, by: str) -> alt.TopLevelMixin:
        order = list(dict.fromkeys(block["segment_n"]))
        y = alt.Y("segment_n:N", sort=order, title=by)
        offset = alt.YOffset("candidate:N", sort=names)
        tooltip = ["candidate:N", "segment:N", "n_users:Q", alt.Tooltip("difference:Q", format="+.4f"),
                   alt.Tooltip("ci_low:Q", format="+.4f"), alt.Tooltip("ci_high:Q", format="+.4f"),
                   alt.Tooltip("p_holm_segments:Q", format=".3g"), "verdict:N"]
        base = alt.Chart(block)
        err = base.mark_rule(strokeWidth=2).encode(y=y, yOffset=offset, x=alt.X("ci_low:Q", title=x_title), x2="ci_high:Q", color=color)
        shape = alt.Shape("candidate:N", sort=names, legend=alt.Legend(title=None, orient="bottom"))
        dot = base.mark_point(filled=True, size=60).encode(y=y, yOffset=offset, x=alt.X("difference:Q", title=x_title), color=color,
                                                          shape=shape, tooltip=tooltip)
        zero = alt.Chart().mark_rule(color="black", strokeDash=[3, 3]).encode(x=alt.datum(0))
        return alt.layer(zero, err, dot).properties(width=width, height=alt.Step(12))

    return _panels(rows, draw, title or f"Paired differences by segment ({metric}; 95% CI, Holm over segments)")


def segment_section(
    cards: Mapping[str, Any],
    fold: Any,
    baseline: str,
    candidates: list[str],
    by: tuple[str, ...] = ("item_segment", "user_segment"),
    *,
    metric: str = "hit_rate@10",
    seed: int = 0,
    n_resamples: int = 2000,
) -> tuple[dict[str, Any], dict[str, Any]]:
    """Report sections and JSON payload of results by segment, for a page of charts.

    Parameters
    ----------
    cards
        Scorecards by name, all on ``fold``.
    fold
        The fold the scorecards were evaluated on (segment labels come from it).
    baseline, candidates
        Names in ``cards`` compared segment by segment.
    by
        Breakdowns (see :func:`xrec.evaluate.segments.segment_labels`).
    metric
        The metric drawn.
    seed, n_resamples
        Resampling of the intervals and tests.

    Returns
    -------
    (dict, dict)
        Heading -> chart or HTML for :func:`~xrec.notebook.charts_to_html`, and a plain
        payload ``{"scorecards": rows, "comparison": rows}`` for a JSON file.
    """
    from xrec.evaluate import compare
    from xrec.evaluate.breakdown import MIN_SEGMENT_USERS, segment_labels

    labels = [segment_labels(fold, name) for name in by]
    names = [baseline, *candidates]
    table = pd.concat([cards[n].by_segment(labels, [metric], seed=seed, n_resamples=n_resamples).assign(scorer=n) for n in names],
                      ignore_index=True)
    comparison = compare(cards[baseline], *(cards[n] for n in candidates), metrics=[metric], by=labels, seed=seed, n_resamples=n_resamples)
    note = (
        f"<p>Each segment has its own 95% bootstrap interval; the paired differences are tested segment by segment and "
        f"adjusted by Holm (1979) over the segments. Item segment: the held-out item is <i>new</i> (no training "
        f"interactions), <i>head</i> (among the most-bought items that hold half of all training interactions) or "
        f"<i>tail</i> (the rest); user segment: the shopper's number of training interactions. Segments under "
        f"{MIN_SEGMENT_USERS} users are drawn pale: too few to say anything.</p>"
    )
    sections = {
        f"Results by segment ({metric})": segment_means(table, metric),
        f"Differences vs {baseline} by segment": segment_differences(comparison, metric),
        "Reading the segment panels": note,
    }
    payload = {"scorecards": _records(table), "comparison": comparison.to_dict().get("segments", [])}
    return sections, payload


def _records(table: pd.DataFrame) -> list[dict]:
    return table.astype(object).where(table.notna(), None).to_dict(orient="records")
