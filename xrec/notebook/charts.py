"""Altair charts of scorecards, comparisons, blend weights and item segments, and an offline HTML page.

Every chart function returns an :mod:`altair` chart built from a small tidy frame, so the
same charts serve the notebook (rendered by the front end) and static reports
(:func:`charts_to_html`, which inlines the Vega libraries so the page needs no network).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import altair as alt
import numpy as np
import pandas as pd

from xrec._validation import check_number, parse_metric_column
from xrec.errors import ConfigError, DataError
from xrec.evaluate._stats import wilson_interval
from xrec.evaluate.segments import SEGMENT_COLUMNS, segment_hit_rates
from xrec.notebook.frames import DIFFERENCE_COLUMNS, SUMMARY_COLUMNS, comparison_frame, metric_label, summary_frame, verdicts
from xrec.notebook.html_page import charts_to_html

__all__ = [
    "BASELINE_COLOR",
    "DIFFERENCE_COLUMNS",
    "OTHER_COLOR",
    "SEGMENT_COLUMNS",
    "SUMMARY_COLUMNS",
    "charts_to_html",
    "comparison_chart",
    "comparison_frame",
    "difference_bars",
    "metric_bars",
    "segment_bars",
    "segment_hit_rates",
    "summary_frame",
    "weight_profile",
    "wilson_interval",
]

BASELINE_COLOR = "#e45756"
OTHER_COLOR = "#4c78a8"
BETTER_COLOR = "#54a24b"
UNCLEAR_COLOR = "#9d9d9d"
_PANELS_PER_ROW = 2


# ---------------------------------------------------------------------------------------
# charts
# ---------------------------------------------------------------------------------------


def _metric_list(metric: str | Sequence[str], available: Sequence[str]) -> list[str]:
    wanted = [metric] if isinstance(metric, str) else list(metric)
    missing = [m for m in wanted if m not in set(available)]
    if missing:
        raise ConfigError(f"metric(s) {missing} not in the scorecards; available: {sorted(set(available))}")
    return wanted


def _scorer_color(baseline: str | None, names: Sequence[str]) -> alt.Color:
    if baseline is None:
        return alt.value(OTHER_COLOR)
    if baseline not in names:
        raise ConfigError(f"baseline {baseline!r} is not among the scorers {list(names)}")
    return alt.Color(
        "role:N",
        scale=alt.Scale(domain=["baseline", "candidate"], range=[BASELINE_COLOR, OTHER_COLOR]),
        legend=alt.Legend(title=None, orient="bottom"),
    )


def metric_bars(
    scorecards_or_summary: Any,
    metric: str | Sequence[str] = "ndcg@10",
    *,
    baseline: str | None = None,
    title: str | None = None,
    width: int = 320,
    confidence: float = 0.95,
    seed: int = 0,
    n_resamples: int = 2000,
) -> alt.TopLevelMixin:
    """Horizontal bars of a metric's mean per scorer, with confidence-interval error bars.

    Parameters
    ----------
    scorecards_or_summary
        Anything :func:`summary_frame` accepts.
    metric
        One ``"metric@K"`` name, or several (one panel each, two panels per row).
    baseline
        Name of the pinned baseline scorer: drawn in its own colour, with a dashed rule at
        its mean so the other bars read against it.
    title
        Chart title.
    width
        Width of each panel in pixels.
    confidence, seed, n_resamples
        Interval settings when scorecards are given.

    Returns
    -------
    altair chart
    """
    frame = summary_frame(scorecards_or_summary, confidence=confidence, seed=seed, n_resamples=n_resamples)
    metrics = _metric_list(metric, frame["metric"].tolist())
    names = list(dict.fromkeys(frame["scorer"]))
    if baseline is not None and baseline not in names:
        raise ConfigError(f"baseline {baseline!r} is not among the scorers {names}")
    data = prepare_summary(frame[frame["metric"].isin(metrics)], baseline)
    if title is None:
        title = f"{metrics[0]} ({confidence:.0%} CI)" if len(metrics) == 1 else f"Metrics ({confidence:.0%} CI)"
    return metric_bars_spec(data, metrics, names, baseline, title=title, width=width)


def prepare_summary(frame: pd.DataFrame, baseline: str | None) -> pd.DataFrame:
    """``frame`` (tidy summary rows) with the ``role`` column the metric bars colour by."""
    data = frame[SUMMARY_COLUMNS].copy()
    data["role"] = np.where(data["scorer"] == baseline, "baseline", "candidate")
    return data


def metric_bars_spec(
    data: pd.DataFrame | alt.Data, metrics: Sequence[str], names: Sequence[str], baseline: str | None, *, title: str, width: int
) -> alt.TopLevelMixin:
    """Metric bars over one data source (a frame, or named data filled in later), one panel per metric."""
    color = _scorer_color(baseline, names)
    y = alt.Y("scorer:N", sort=list(names), title=None)
    panels = []
    for m in metrics:
        label = metric_label(m)
        tooltip = [
            alt.Tooltip("scorer:N", title="scorer"), alt.Tooltip("mean:Q", format=".4f", title=label),
            alt.Tooltip("ci_low:Q", format=".4f", title="interval from"), alt.Tooltip("ci_high:Q", format=".4f", title="interval to"),
            alt.Tooltip("n_users:Q", title="users"),
        ]  # fmt: skip
        bars = alt.Chart().mark_bar(opacity=0.85).encode(y=y, x=alt.X("mean:Q", title=label), color=color, tooltip=tooltip)
        err = alt.Chart().mark_errorbar(ticks=True, color="black").encode(y=y, x=alt.X("ci_low:Q", title=label), x2="ci_high:Q")
        layers = [bars, err]
        if baseline is not None:
            layers.append(
                alt.Chart().transform_filter(alt.datum.role == "baseline").mark_rule(strokeDash=[4, 3], color=BASELINE_COLOR).encode(x="mean:Q")
            )
        panel = alt.layer(*layers).transform_filter(alt.datum.metric == m).properties(width=width, title=label if len(metrics) > 1 else "")
        panels.append(panel)
    if len(panels) == 1:
        chart = panels[0]
        chart.data = data
    else:
        chart = alt.concat(*panels, columns=min(len(panels), _PANELS_PER_ROW), data=data)
    return chart.properties(title=title)


def weight_profile(weights: Mapping[str, float], *, title: str = "Blend weights", normalizers: Mapping[str, str] | str | None = None) -> alt.Chart:
    """Bar chart of blend weights, labelled with each source's share of the total.

    Parameters
    ----------
    weights
        Source name -> weight >= 0.
    title
        Chart title.
    normalizers
        Optional normalizer name (or per-source mapping) shown in the tooltip.
    """
    if not isinstance(weights, Mapping) or not weights:
        raise ConfigError("weights must be a non-empty mapping of source name -> weight")
    values = {}
    for name, w in weights.items():
        values[str(name)] = check_number(w, f"weights.{name}:", low=0)
    total = sum(values.values())
    data = pd.DataFrame({"source": list(values), "weight": list(values.values())})
    data["share"] = data["weight"] / total if total > 0 else 0.0
    data["label"] = [f"{s:.0%}" for s in data["share"]]
    if isinstance(normalizers, str):
        data["normalizer"] = normalizers
    elif isinstance(normalizers, Mapping):
        data["normalizer"] = [normalizers.get(n, "") for n in data["source"]]
    tooltip = [alt.Tooltip("source:N", title="source"), alt.Tooltip("weight:Q", format=".3f", title="weight"), alt.Tooltip("share:Q", format=".1%", title="share of total")]
    if "normalizer" in data:
        tooltip.append(alt.Tooltip("normalizer:N", title="normalizer"))
    base = alt.Chart(data)
    y = alt.Y("source:N", sort=list(values), title=None)
    bars = base.mark_bar(color=OTHER_COLOR).encode(y=y, x=alt.X("weight:Q", title="weight"), tooltip=tooltip)
    text = base.mark_text(align="left", dx=3).encode(y=y, x="weight:Q", text="label:N")
    return alt.layer(bars, text).properties(title=title, width=280)


def segment_bars(
    segments_or_scorers: pd.DataFrame | Mapping[str, Any],
    fold: Any = None,
    *,
    k: int = 10,
    edges: Sequence[int] = (1,),
    baseline: str | None = None,
    title: str | None = None,
    confidence: float = 0.95,
) -> alt.TopLevelMixin:
    """Grouped bars of hit rate per item-popularity segment (e.g. cold vs warm items) per scorer.

    Parameters
    ----------
    segments_or_scorers
        A frame from :func:`segment_hit_rates`, or a mapping name -> scorer (then ``fold``
        is required and the frame is computed with ``k``, ``edges`` and ``confidence``).
    fold
        The fold, when scorers are given.
    k, edges, confidence
        Passed to :func:`segment_hit_rates` when scorers are given; ignored for a frame.
    baseline
        Scorer drawn in the baseline colour.
    title
        Chart title.
    """
    if isinstance(segments_or_scorers, pd.DataFrame):
        data = segments_or_scorers.copy()
        missing = [c for c in ("scorer", "segment", "hit_rate", "ci_low", "ci_high") if c not in data.columns]
        if missing:
            raise DataError(f"segment frame lacks column(s) {missing}; build it with segment_hit_rates")
    else:
        if fold is None:
            raise ConfigError("segment_bars: give a fold along with the scorers (or a frame from segment_hit_rates)")
        data = segment_hit_rates(segments_or_scorers, fold, k=k, edges=edges, confidence=confidence)
    names = list(dict.fromkeys(data["scorer"]))
    segments = list(dict.fromkeys(data["segment"]))
    if baseline is not None and baseline not in names:
        raise ConfigError(f"baseline {baseline!r} is not among the scorers {names}")
    data["role"] = np.where(data["scorer"] == baseline, "baseline", "candidate")
    base = alt.Chart(data)
    x = alt.X("segment:N", sort=segments, title="held-out item's training interactions", axis=alt.Axis(labelAngle=0))
    offset = alt.XOffset("scorer:N", sort=names)
    tooltip = [
        alt.Tooltip("scorer:N", title="scorer"), alt.Tooltip("segment:N", title="segment"), alt.Tooltip("hit_rate:Q", format=".3f", title="hit rate"),
        alt.Tooltip("ci_low:Q", format=".3f", title="interval from"), alt.Tooltip("ci_high:Q", format=".3f", title="interval to"),
    ]  # fmt: skip
    if "n" in data.columns:
        tooltip.append(alt.Tooltip("n:Q", title="held-out items"))
    color = alt.Color("scorer:N", sort=names, legend=alt.Legend(title=None, orient="bottom"))
    bars = base.mark_bar().encode(x=x, xOffset=offset, y=alt.Y("hit_rate:Q", title="hit rate"), color=color, tooltip=tooltip)
    if baseline is not None:
        # The baseline keeps its palette colour but is outlined, so the legend stays one list.
        bars = bars.encode(strokeWidth=alt.condition(alt.datum.role == "baseline", alt.value(2), alt.value(0)), stroke=alt.value("black"))
    err = base.mark_errorbar(ticks=True, color="black").encode(x=x, xOffset=offset, y=alt.Y("ci_low:Q", title="hit rate"), y2="ci_high:Q")
    if title is None:
        title = f"Hit rate by item popularity ({confidence:.0%} Wilson CI)"
    return alt.layer(bars, err).properties(title=title, width=max(200, 45 * len(segments) * len(names)))


def difference_bars(frame: pd.DataFrame, *, baseline: str = "baseline", title: str | None = None, width: int = 320) -> alt.TopLevelMixin:
    """Dot-and-interval chart of candidate − baseline differences (one panel per metric).

    ``frame`` has columns ``candidate, metric, difference, ci_low, ci_high`` and optionally
    ``verdict`` (``higher`` / ``lower`` / ``unclear``, computed from the interval if absent).
    """
    missing = [c for c in ("candidate", "metric", "difference", "ci_low", "ci_high") if c not in frame.columns]
    if missing:
        raise DataError(f"difference frame lacks column(s) {missing}")
    data = frame.copy()
    if "verdict" not in data.columns:
        data["verdict"] = verdicts(data["ci_low"].to_numpy(), data["ci_high"].to_numpy())
    metrics = list(dict.fromkeys(data["metric"]))
    names = list(dict.fromkeys(data["candidate"]))
    extras = [c for c in ("p_value", "p_holm") if c in data.columns]
    return difference_spec(data, metrics, names, baseline, extras, title=title or f"Difference vs {baseline}", width=width)


def difference_spec(
    data: pd.DataFrame | alt.Data, metrics: Sequence[str], names: Sequence[str], baseline: str, extras: Sequence[str], *, title: str, width: int
) -> alt.TopLevelMixin:
    color = alt.Color(
        "verdict:N",
        scale=alt.Scale(domain=["higher", "unclear", "lower"], range=[BETTER_COLOR, UNCLEAR_COLOR, BASELINE_COLOR]),
        legend=alt.Legend(title=None, orient="bottom"),
    )
    y = alt.Y("candidate:N", sort=list(names), title=None)
    extra_titles = {"p_value": "p-value", "p_holm": "p-value (Holm)"}
    panels = []
    for m in metrics:
        label = metric_label(m)
        tooltip = [
            alt.Tooltip("candidate:N", title="scorer"), alt.Tooltip("difference:Q", format="+.4f", title=f"{label} difference"),
            alt.Tooltip("ci_low:Q", format="+.4f", title="interval from"), alt.Tooltip("ci_high:Q", format="+.4f", title="interval to"),
            alt.Tooltip("verdict:N", title="verdict"),
        ]  # fmt: skip
        tooltip += [alt.Tooltip(f"{extra}:Q", format=".3g", title=extra_titles.get(extra, extra)) for extra in extras]
        x_title = f"{label}: difference vs {baseline}"
        err = alt.Chart().mark_rule(strokeWidth=2).encode(y=y, x=alt.X("ci_low:Q", title=x_title), x2="ci_high:Q", color=color)
        dot = alt.Chart().mark_point(filled=True, size=70).encode(y=y, x=alt.X("difference:Q", title=x_title), color=color, tooltip=tooltip)
        zero = alt.Chart().mark_rule(color="black", strokeDash=[3, 3]).encode(x=alt.datum(0))
        panel = alt.layer(zero, err, dot).transform_filter(alt.datum.metric == m).properties(width=width, title=label if len(metrics) > 1 else "")
        panels.append(panel)
    if len(panels) == 1:
        chart = panels[0]
        chart.data = data
    else:
        chart = alt.concat(*panels, columns=min(len(panels), _PANELS_PER_ROW), data=data)
    return chart.properties(title=title)


def comparison_chart(comparison: Any, metric: str | Sequence[str] | None = None, *, alpha: float = 0.05, title: str | None = None) -> alt.TopLevelMixin:
    """Paired differences against the baseline with their intervals, from a :class:`~xrec.evaluate.Comparison`.

    Parameters
    ----------
    comparison
        Result of :func:`xrec.evaluate.compare`.
    metric
        Metric(s) to show; default the rank metrics of the comparison (hit rate, NDCG,
        recall, MRR), leaving out ``popularity@K``, whose direction is no verdict.
    alpha
        Level below which the Holm-adjusted p-value counts as significant (colour).
    title
        Chart title.
    """
    data = comparison_frame(comparison, alpha=alpha)
    if metric is None:
        ranked = [m for m in dict.fromkeys(data["metric"]) if parse_metric_column(m)[0] != "popularity"]
        metric = ranked or list(dict.fromkeys(data["metric"]))
    wanted = _metric_list(metric, data["metric"].tolist())
    data = data[data["metric"].isin(wanted)]
    baseline = getattr(comparison, "baseline", "baseline")
    settings = getattr(comparison, "settings", {}) or {}
    if title is None:
        title = f"Difference vs {baseline} ({settings.get('confidence', 0.95):.0%} paired-bootstrap CI)"
    return difference_bars(data, baseline=baseline, title=title)
