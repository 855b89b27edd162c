"""The weight mixer's numbers as HTML: the table under the chart and the static picture.

The table shows what the chart shows without hovering: each scorer's metric with its
interval, then the paired difference with its interval and verdict. The static picture is
the same table plus the weights and settings, written into the notebook beside the live
panel (:class:`xrec.notebook._still.StillPicture`) so that a saved notebook still shows the
last state when no kernel runs.
"""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from xrec.notebook.frames import metric_label

_VERDICT_WORDS = {"higher": "blend higher", "lower": "blend lower", "unclear": "unclear (interval holds 0)"}
_VERDICT_COLORS = {"higher": "#2f7d32", "lower": "#b00020", "unclear": "#666"}
_CELL = "border:1px solid #ddd;padding:2px 8px;text-align:right"
_HEAD = _CELL + ";background:#f4f4f4"


def _num(value: float, spec: str = ".4f") -> str:
    return "–" if value is None or not np.isfinite(value) else format(float(value), spec)


def numbers_table(summary: pd.DataFrame, diffs: pd.DataFrame, baseline_name: str, confidence: float) -> str:
    """HTML table: rows baseline, blend and their difference; one column per ``"metric@K"``.

    ``summary`` has rows ``scorer, metric, mean, ci_low, ci_high``; ``diffs`` has rows
    ``metric, difference, ci_low, ci_high, verdict`` (the blend minus the baseline).
    """
    metrics = list(dict.fromkeys(summary["metric"]))
    indexed = summary.set_index(["scorer", "metric"])
    head = "".join(f'<th style="{_HEAD}">{html.escape(metric_label(m))}</th>' for m in metrics)
    rows = []
    for scorer, label in ((baseline_name, f"baseline: {baseline_name}"), ("blend", "blend")):
        cells = []
        for m in metrics:
            r = indexed.loc[(scorer, m)]
            cells.append(f'<td style="{_CELL}">{_num(r["mean"])} <small>[{_num(r["ci_low"])}, {_num(r["ci_high"])}]</small></td>')
        rows.append(f'<tr><th style="{_HEAD};text-align:left">{html.escape(label)}</th>{"".join(cells)}</tr>')
    by_metric = diffs.set_index("metric")
    cells = []
    for m in metrics:
        r = by_metric.loc[m]
        verdict = str(r["verdict"])
        cells.append(
            f'<td style="{_CELL}">{_num(r["difference"], "+.4f")} <small>[{_num(r["ci_low"], "+.4f")}, {_num(r["ci_high"], "+.4f")}]</small>'
            f'<br><span style="color:{_VERDICT_COLORS.get(verdict, "#666")}">{html.escape(_VERDICT_WORDS.get(verdict, verdict))}</span></td>'
        )
    rows.append(f'<tr><th style="{_HEAD};text-align:left">blend − baseline<br><small>paired</small></th>{"".join(cells)}</tr>')
    note = f"mean [{confidence:.0%} normal interval over users]"
    return (
        f'<table class="xrec-mixer-numbers" style="border-collapse:collapse;font-size:0.9em">'
        f'<tr><th style="{_HEAD}"><small>{html.escape(note)}</small></th>{head}</tr>{"".join(rows)}</table>'
    )


def static_picture(
    table_html: str, weights: Mapping[str, float], normalizer: str, k: int, users: int, baseline_name: str, spec: dict | None = None
) -> str:
    """HTML of the mixer's state for a page with no kernel: settings, weights, the numbers and the chart.

    The chart (Vega-Lite ``spec``) is drawn by the libraries :func:`~xrec.notebook.offline_charts`
    keeps in the notebook; without them (untrusted page, no scripts) the numbers still show.
    """
    from xrec.notebook.display import chart_html

    chart = chart_html(spec) if spec is not None else ""
    bars = []
    for name, value in weights.items():
        width = max(0.0, min(1.0, float(value))) * 160
        bars.append(
            f'<tr><td style="text-align:right;padding-right:6px">{html.escape(name)}</td>'
            f'<td><div style="display:inline-block;width:{width:.0f}px;height:10px;background:#4c78a8"></div> {float(value):.2f}</td></tr>'
        )
    return (
        '<div class="xrec-mixer-static" style="border:1px dashed #bbb;padding:6px 10px">'
        "<b>Weight mixer</b> <small>(a still picture of its last state, kept in the notebook: "
        "run the cell again to move the sliders)</small><br>"
        f"<small>normalizer {html.escape(normalizer)} · K {int(k)} · {int(users)} users · baseline {html.escape(baseline_name)}</small>"
        f'<table style="border:none;font-size:0.9em">{"".join(bars)}</table>{chart}{table_html}</div>'
    )


def weights_text(weights: Mapping[str, float], names: Sequence[str] | None = None) -> str:
    """``"als 0.60, text 0.40"`` in slider order."""
    names = list(weights) if names is None else list(names)
    return ", ".join(f"{n} {float(weights[n]):.2f}" for n in names)
