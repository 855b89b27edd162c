"""Altair charts of scorecards, comparisons, blend weights and item segments, and an offline HTML page.

Every chart function returns an :mod:`altair` chart built from a small tidy frame, so the
same charts serve the notebook (rendered by the front end) and static reports
(:func:`charts_to_html`, which inlines the Vega libraries so the page needs no network).
"""

from __future__ import annotations

import functools
import html
import json
import math
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import altair as alt
import numpy as np
import pandas as pd

from xrec._files import write_text_atomic
from xrec.errors import ConfigError, DataError

__all__ = [
    "BASELINE_COLOR",
    "OTHER_COLOR",
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
SUMMARY_COLUMNS = ["scorer", "metric", "mean", "ci_low", "ci_high", "n_users"]
DIFFERENCE_COLUMNS = ["candidate", "metric", "difference", "ci_low", "ci_high", "verdict"]
SEGMENT_COLUMNS = ["scorer", "segment", "hits", "n", "hit_rate", "ci_low", "ci_high"]


# ---------------------------------------------------------------------------------------
# tidy frames
# ---------------------------------------------------------------------------------------


def _summary_rows(name: str, summary: pd.DataFrame) -> pd.DataFrame:
    frame = summary.reset_index()
    if "metric" not in frame.columns:
        frame = frame.rename(columns={frame.columns[0]: "metric"})
    missing = [c for c in ("mean", "ci_low", "ci_high") if c not in frame.columns]
    if missing:
        raise DataError(f"summary of {name!r} lacks column(s) {missing}; expected Scorecard.summary() output")
    frame["scorer"] = name
    if "n_users" not in frame.columns:
        frame["n_users"] = np.nan
    return frame[SUMMARY_COLUMNS]


def summary_frame(
    scorecards_or_summary: Any,
    *,
    confidence: float = 0.95,
    seed: int = 0,
    n_resamples: int = 2000,
) -> pd.DataFrame:
    """One row per (scorer, metric): mean and confidence interval.

    Parameters
    ----------
    scorecards_or_summary
        A :class:`~xrec.evaluate.Scorecard`, a sequence of them, a mapping name ->
        Scorecard or name -> ``Scorecard.summary()`` frame, or an already tidy frame with
        columns ``scorer, metric, mean, ci_low, ci_high``.
    confidence, seed, n_resamples
        Passed to ``Scorecard.summary`` (bootstrap percentile intervals).

    Returns
    -------
    DataFrame
        Columns ``scorer, metric, mean, ci_low, ci_high, n_users``, scorers in the order given.
    """
    from xrec.evaluate.scorecard import Scorecard

    obj = scorecards_or_summary
    if isinstance(obj, pd.DataFrame):
        missing = [c for c in ("scorer", "metric", "mean", "ci_low", "ci_high") if c not in obj.columns]
        if missing:
            raise DataError(f"summary frame lacks column(s) {missing}; it has {list(obj.columns)}")
        out = obj.copy()
        if "n_users" not in out.columns:
            out["n_users"] = np.nan
        return out[SUMMARY_COLUMNS].reset_index(drop=True)
    if isinstance(obj, Scorecard):
        obj = [obj]
    if isinstance(obj, Mapping):
        items = list(obj.items())
    elif isinstance(obj, Sequence) and not isinstance(obj, str):
        items = [(getattr(card, "name", str(i)), card) for i, card in enumerate(obj)]
    else:
        raise ConfigError(
            f"expected Scorecard(s), a mapping of name -> Scorecard / summary, or a tidy frame; got {type(obj).__name__}"
        )
    if not items:
        raise ConfigError("no scorecards given")
    names = [str(n) for n, _ in items]
    if len(set(names)) != len(names):
        raise ConfigError(f"scorer names repeat: {names}; pass a mapping with unique names")
    parts = []
    for name, value in items:
        if isinstance(value, Scorecard):
            value = value.summary(confidence=confidence, seed=seed, n_resamples=n_resamples)
        if not isinstance(value, pd.DataFrame):
            raise ConfigError(f"{name!r}: expected a Scorecard or a summary frame, got {type(value).__name__}")
        parts.append(_summary_rows(str(name), value))
    return pd.concat(parts, ignore_index=True)


def comparison_frame(comparison: Any, *, alpha: float = 0.05) -> pd.DataFrame:
    """Differences against the baseline as a tidy frame (one row per candidate and metric).

    ``verdict`` is ``"higher"`` / ``"lower"`` when the interval excludes 0 and the
    Holm-adjusted p-value is below ``alpha``, else ``"unclear"``.
    """
    table = getattr(comparison, "table", comparison)
    if not isinstance(table, pd.DataFrame):
        raise ConfigError(f"expected a Comparison or its table, got {type(comparison).__name__}")
    missing = [c for c in ("candidate", "metric", "difference", "ci_low", "ci_high") if c not in table.columns]
    if missing:
        raise DataError(f"comparison table lacks column(s) {missing}")
    out = table.copy()
    p = out["p_holm"] if "p_holm" in out.columns else out.get("p_value", pd.Series(0.0, index=out.index))
    out["verdict"] = _verdict(out["ci_low"].to_numpy(), out["ci_high"].to_numpy(), p.to_numpy(dtype=float) < alpha)
    return out[DIFFERENCE_COLUMNS + [c for c in ("p_value", "p_holm") if c in out.columns]].reset_index(drop=True)


def _verdict(lo: np.ndarray, hi: np.ndarray, significant: np.ndarray | None = None) -> list[str]:
    sig = np.ones(len(lo), dtype=bool) if significant is None else np.asarray(significant, dtype=bool)
    out = []
    for a, b, s in zip(lo, hi, sig):
        if s and a > 0:
            out.append("higher")
        elif s and b < 0:
            out.append("lower")
        else:
            out.append("unclear")
    return out


def wilson_interval(hits: np.ndarray, n: np.ndarray, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of a binomial proportion (Wilson, JASA 22, 1927), vectorized.

    ``n == 0`` gives NaN bounds.

    Parameters
    ----------
    hits, n
        Successes and trials (arrays of the same shape).
    confidence
        Two-sided level of the interval.

    Returns
    -------
    (np.ndarray, np.ndarray)
        Lower and upper bounds.
    """
    from scipy.stats import norm

    hits = np.asarray(hits, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    z = float(norm.ppf(0.5 + confidence / 2.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        p = hits / n
        denom = 1.0 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
    return centre - half, centre + half


def _segment_labels(edges: Sequence[int]) -> list[str]:
    labels = []
    bounds = [0, *edges]
    for i, lo in enumerate(bounds):
        hi = bounds[i + 1] if i + 1 < len(bounds) else None
        if hi is None:
            labels.append(f"{lo}+")
        elif hi - lo == 1:
            labels.append("0 (cold)" if lo == 0 else f"{lo}")
        else:
            labels.append(f"{lo}-{hi - 1}")
    return labels


def segment_hit_rates(
    scorers: Mapping[str, Any],
    fold: Any,
    *,
    k: int = 10,
    edges: Sequence[int] = (1,),
    users: np.ndarray | None = None,
    confidence: float = 0.95,
    chunk_size: int = 1024,
) -> pd.DataFrame:
    """Hit rate at ``k`` of held-out items, split by the items' training popularity.

    Every held-out (user, item) pair is ranked among the user's candidates with the
    evaluator's ranking (same tie rule); a pair is a hit when its rank is at most ``k``.
    Pairs are grouped by the item's number of training interactions: with ``edges=(1,)``
    into *cold* (0) and ``1+``; with ``edges=(1, 20)`` into 0, 1-19 and 20+.

    Parameters
    ----------
    scorers
        Name -> anything :func:`xrec.evaluate.evaluate` accepts (source, blend, array, callable).
    fold
        The fold whose held-out items are ranked.
    k
        Cut-off.
    edges
        Increasing positive training counts that start each segment after the first.
    users
        Users to include; default ``fold.eval_users``.
    confidence
        Level of the Wilson score interval of each hit rate.
    chunk_size
        Users scored per block.

    Returns
    -------
    DataFrame
        Columns ``scorer, segment, hits, n, hit_rate, ci_low, ci_high``; segments (labelled
        by training count: ``"0 (cold)"``, ``"1-19"``, ``"20+"``) in popularity order (a segment without held-out pairs has ``n = 0`` and NaN rates).
    """
    from xrec.evaluate import as_score_fn, rank_heldout

    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise ConfigError(f"k must be a positive integer, got {k!r}")
    edges = [int(e) for e in edges]
    if any(e < 1 for e in edges) or any(b <= a for a, b in zip(edges, edges[1:])):
        raise ConfigError(f"edges must be increasing positive integers, got {edges}")
    if not isinstance(scorers, Mapping) or not scorers:
        raise ConfigError("scorers must be a non-empty mapping of name -> scorer")
    labels = _segment_labels(edges)
    segment_of_item = np.searchsorted(np.asarray(edges), fold.item_train_counts, side="right")
    users = fold.eval_users if users is None else np.asarray(users, dtype=np.int64)
    seen_all = fold.train_matrix
    truth_all = fold.heldout_matrix
    rows = []
    for name, scorer in scorers.items():
        score = as_score_fn(scorer, fold.n_users, fold.n_items)
        hits = np.zeros(len(labels), dtype=np.int64)
        total = np.zeros(len(labels), dtype=np.int64)
        for start in range(0, len(users), chunk_size):
            chunk = users[start : start + chunk_size]
            seen, truth = seen_all[chunk], truth_all[chunk]
            ranks = rank_heldout(np.asarray(score(chunk)), seen, truth)
            seg = segment_of_item[ranks.items]
            total += np.bincount(seg, minlength=len(labels))
            hits += np.bincount(seg, weights=(ranks.ranks <= k), minlength=len(labels)).astype(np.int64)
        lo, hi = wilson_interval(hits, total, confidence)
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = hits / np.where(total > 0, total, np.nan)
        for j, label in enumerate(labels):
            rows.append((str(name), label, int(hits[j]), int(total[j]), float(rate[j]), float(lo[j]), float(hi[j])))
    return pd.DataFrame(rows, columns=SEGMENT_COLUMNS)


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
    return _metric_bars_spec(data, metrics, names, baseline, title=title, width=width)


def prepare_summary(frame: pd.DataFrame, baseline: str | None) -> pd.DataFrame:
    """``frame`` (tidy summary rows) with the ``role`` column the metric bars colour by."""
    data = frame[SUMMARY_COLUMNS].copy()
    data["role"] = np.where(data["scorer"] == baseline, "baseline", "candidate")
    return data


def _metric_bars_spec(
    data: pd.DataFrame | alt.Data, metrics: Sequence[str], names: Sequence[str], baseline: str | None, *, title: str, width: int
) -> alt.TopLevelMixin:
    """Metric bars over one data source (a frame, or named data filled in later), one panel per metric."""
    color = _scorer_color(baseline, names)
    y = alt.Y("scorer:N", sort=list(names), title=None)
    tooltip = ["scorer:N", alt.Tooltip("mean:Q", format=".4f"), alt.Tooltip("ci_low:Q", format=".4f"), alt.Tooltip("ci_high:Q", format=".4f"), "n_users:Q"]
    panels = []
    for m in metrics:
        bars = alt.Chart().mark_bar(opacity=0.85).encode(y=y, x=alt.X("mean:Q", title=m), color=color, tooltip=tooltip)
        err = alt.Chart().mark_errorbar(ticks=True, color="black").encode(y=y, x=alt.X("ci_low:Q", title=m), x2="ci_high:Q")
        layers = [bars, err]
        if baseline is not None:
            layers.append(
                alt.Chart().transform_filter(alt.datum.role == "baseline").mark_rule(strokeDash=[4, 3], color=BASELINE_COLOR).encode(x="mean:Q")
            )
        panel = alt.layer(*layers).transform_filter(alt.datum.metric == m).properties(width=width, title=m if len(metrics) > 1 else "")
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
        if isinstance(w, bool) or not isinstance(w, (int, float, np.integer, np.floating)) or not math.isfinite(float(w)) or w < 0:
            raise ConfigError(f"weights.{name}: must be a finite number >= 0, got {w!r}")
        values[str(name)] = float(w)
    total = sum(values.values())
    data = pd.DataFrame({"source": list(values), "weight": list(values.values())})
    data["share"] = data["weight"] / total if total > 0 else 0.0
    data["label"] = [f"{s:.0%}" for s in data["share"]]
    if isinstance(normalizers, str):
        data["normalizer"] = normalizers
    elif isinstance(normalizers, Mapping):
        data["normalizer"] = [normalizers.get(n, "") for n in data["source"]]
    tooltip = ["source:N", alt.Tooltip("weight:Q", format=".3f"), alt.Tooltip("share:Q", format=".1%")]
    if "normalizer" in data:
        tooltip.append("normalizer:N")
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
    tooltip = ["scorer:N", "segment:N", alt.Tooltip("hit_rate:Q", format=".3f"), alt.Tooltip("ci_low:Q", format=".3f"), alt.Tooltip("ci_high:Q", format=".3f")]
    if "n" in data.columns:
        tooltip.append("n:Q")
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
        data["verdict"] = _verdict(data["ci_low"].to_numpy(), data["ci_high"].to_numpy())
    metrics = list(dict.fromkeys(data["metric"]))
    names = list(dict.fromkeys(data["candidate"]))
    extras = [c for c in ("p_value", "p_holm") if c in data.columns]
    return _difference_spec(data, metrics, names, baseline, extras, title=title or f"Difference vs {baseline}", width=width)


def _difference_spec(
    data: pd.DataFrame | alt.Data, metrics: Sequence[str], names: Sequence[str], baseline: str, extras: Sequence[str], *, title: str, width: int
) -> alt.TopLevelMixin:
    color = alt.Color(
        "verdict:N",
        scale=alt.Scale(domain=["higher", "unclear", "lower"], range=[BETTER_COLOR, UNCLEAR_COLOR, BASELINE_COLOR]),
        legend=alt.Legend(title=None, orient="bottom"),
    )
    y = alt.Y("candidate:N", sort=list(names), title=None)
    tooltip = ["candidate:N", alt.Tooltip("difference:Q", format="+.4f"), alt.Tooltip("ci_low:Q", format="+.4f"), alt.Tooltip("ci_high:Q", format="+.4f"), "verdict:N"]
    tooltip += [alt.Tooltip(f"{extra}:Q", format=".3g") for extra in extras]
    panels = []
    for m in metrics:
        x_title = f"{m}: difference vs {baseline}"
        err = alt.Chart().mark_rule(strokeWidth=2).encode(y=y, x=alt.X("ci_low:Q", title=x_title), x2="ci_high:Q", color=color)
        dot = alt.Chart().mark_point(filled=True, size=70).encode(y=y, x=alt.X("difference:Q", title=x_title), color=color, tooltip=tooltip)
        zero = alt.Chart().mark_rule(color="black", strokeDash=[3, 3]).encode(x=alt.datum(0))
        panel = alt.layer(zero, err, dot).transform_filter(alt.datum.metric == m).properties(width=width, title=m if len(metrics) > 1 else "")
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
        ranked = [m for m in dict.fromkeys(data["metric"]) if m.rpartition("@")[0] != "popularity"]
        metric = ranked or list(dict.fromkeys(data["metric"]))
    wanted = _metric_list(metric, data["metric"].tolist())
    data = data[data["metric"].isin(wanted)]
    baseline = getattr(comparison, "baseline", "baseline")
    settings = getattr(comparison, "settings", {}) or {}
    if title is None:
        title = f"Difference vs {baseline} ({settings.get('confidence', 0.95):.0%} paired-bootstrap CI)"
    return difference_bars(data, baseline=baseline, title=title)


# ---------------------------------------------------------------------------------------
# offline HTML page
# ---------------------------------------------------------------------------------------

_PAGE = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>{title}</title>
<style>
body {{ font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 2em auto; max-width: 1100px; color: #222; padding: 0 1em; }}
h1 {{ font-size: 1.6em; }} h2 {{ font-size: 1.2em; margin-top: 2em; }}
table {{ border-collapse: collapse; font-size: 0.9em; }} th, td {{ border: 1px solid #ddd; padding: 3px 8px; text-align: right; }}
.xrec-chart {{ margin: 1em 0; }}
</style>
{head_script}
</head>
<body>
<h1>{title}</h1>
{intro}
{body}
{tail_script}
</body>
</html>
"""


@functools.lru_cache(maxsize=1)
def _bundle() -> str:
    """The Vega, Vega-Lite and Vega-Embed libraries as one script (built once per process)."""
    import vl_convert as vlc

    version = alt.SCHEMA_VERSION.lstrip("v")
    major_minor = ".".join(version.split(".")[:2])
    if major_minor in vlc.get_vegalite_versions():
        return vlc.javascript_bundle(vl_version=major_minor)
    return vlc.javascript_bundle()


def _script_json(value: Any) -> str:
    # "</" would close the <script> element early; "<\/" means the same inside a JS string.
    return json.dumps(value).replace("</", "<\\/")


def _as_items(charts: Any) -> list[tuple[str | None, Any]]:
    if isinstance(charts, Mapping):
        return [(str(k), v) for k, v in charts.items()]
    if isinstance(charts, (alt.TopLevelMixin, str)):
        charts = [charts]
    items: list[tuple[str | None, Any]] = []
    for entry in charts:
        if isinstance(entry, tuple) and len(entry) == 2:
            items.append((None if entry[0] is None else str(entry[0]), entry[1]))
        else:
            items.append((None, entry))
    return items


def charts_to_html(
    charts: Any,
    title: str,
    path: str | os.PathLike,
    intro_html: str = "",
    *,
    mode: str = "script",
) -> Path:
    """Write one self-contained HTML page holding several charts (no network needed to view it).

    Parameters
    ----------
    charts
        A chart, a sequence of entries, or a mapping heading -> entry. An entry is an altair
        chart, an object with ``_repr_html_`` (e.g. a Scorecard or Comparison, shown as its
        table), a raw HTML string, or a ``(heading, entry)`` pair.
    title
        Page title and top heading (escaped).
    path
        File to write (its folder must exist); written atomically.
    intro_html
        HTML placed under the title (not escaped: pass trusted markup).
    mode
        ``"script"``: interactive charts, with the Vega, Vega-Lite and Vega-Embed libraries
        inlined once (about 0.9 MB) from ``vl-convert-python``; ``"svg"``: static SVG drawn
        by ``vl-convert-python`` (no script at all).

    Returns
    -------
    Path
        The file written.
    """
    if mode not in ("script", "svg"):
        raise ConfigError(f"mode must be 'script' or 'svg', got {mode!r}")
    path = Path(path)
    if not path.parent.is_dir():
        raise ConfigError(f"path: folder {str(path.parent)!r} does not exist")
    body: list[str] = []
    specs: list[tuple[str, dict]] = []
    for i, (heading, entry) in enumerate(_as_items(charts)):
        if heading:
            body.append(f"<h2>{html.escape(heading)}</h2>")
        if isinstance(entry, alt.TopLevelMixin):
            spec = entry.to_dict()
            if mode == "svg":
                import vl_convert as vlc

                body.append(f'<div class="xrec-chart">{vlc.vegalite_to_svg(spec)}</div>')
            else:
                div = f"xrec-chart-{i}"
                body.append(f'<div class="xrec-chart" id="{div}"></div>')
                specs.append((div, spec))
        elif isinstance(entry, str):
            body.append(entry)
        elif hasattr(entry, "_repr_html_"):
            body.append(entry._repr_html_())
        else:
            raise ConfigError(f"charts: cannot place a {type(entry).__name__} on the page (give a chart, HTML text or a scorecard)")
    head_script = tail_script = ""
    if specs:
        head_script = f'<script type="text/javascript">\n{_bundle()}\n</script>'
        # The "actions" menu would link to the online Vega editor; keep only local exports.
        options = {"actions": {"export": True, "source": False, "compiled": False, "editor": False}}
        calls = "\n".join(
            f"vegaEmbed('#{div}', {_script_json(spec)}, {_script_json(options)}).catch(console.error);" for div, spec in specs
        )
        tail_script = f'<script type="text/javascript">\n{calls}\n</script>'
    page = _PAGE.format(
        title=html.escape(title), intro=intro_html, body="\n".join(body), head_script=head_script, tail_script=tail_script
    )
    return write_text_atomic(path, page)
