"""What the weight mixer draws: its frames, its Vega-Lite spec and the output bundle.

Kept apart from :mod:`xrec.notebook.mixer` (the widgets and their state): everything here
is a plain function of frames and settings, so it is tested without widgets.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from xrec.evaluate._stats import normal_interval
from xrec.notebook.frames import interval_frame, verdicts

SUMMARY_DATA = "xrec_mixer_summary"
DIFF_DATA = "xrec_mixer_differences"


def records(frame: pd.DataFrame) -> list[dict]:
    """Rows as JSON-ready dicts (NaN becomes null, numpy scalars plain Python)."""
    out = []
    for row in frame.to_dict("records"):
        clean = {}
        for key, value in row.items():
            if isinstance(value, (float, np.floating)):
                value = None if math.isnan(value) else float(value)
            elif isinstance(value, np.integer):
                value = int(value)
            clean[key] = value
        out.append(clean)
    return out


def mixer_frames(
    baseline: pd.DataFrame, current: pd.DataFrame, baseline_name: str, columns: Sequence[str], confidence: float
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Summary rows (baseline and blend, normal intervals) and paired differences with verdicts."""
    summary = interval_frame({baseline_name: baseline, "blend": current}, columns, confidence)
    rows = []
    for col in columns:
        diff = current[col].to_numpy(dtype=np.float64) - baseline[col].to_numpy(dtype=np.float64)
        mean, lo, hi = normal_interval(diff, confidence)
        rows.append(("blend", col, mean, lo, hi))
    diffs = pd.DataFrame(rows, columns=["candidate", "metric", "difference", "ci_low", "ci_high"])
    diffs["verdict"] = verdicts(diffs["ci_low"].to_numpy(), diffs["ci_high"].to_numpy())
    return summary, diffs


def chart_template(columns: Sequence[str], baseline_name: str) -> dict:
    """Vega-Lite spec of the live chart with named, empty data (altair builds and checks it once)."""
    import altair as alt

    from xrec.notebook.charts import difference_spec, metric_bars_spec

    names = [baseline_name, "blend"]
    bars = metric_bars_spec(alt.Data(name=SUMMARY_DATA), columns, names, baseline_name, title=f"Blend vs {baseline_name}", width=240)
    delta = difference_spec(alt.Data(name=DIFF_DATA), columns, ["blend"], baseline_name, [], title="Paired difference (blend − baseline)", width=240)
    # The two panels colour by different fields (role, verdict): keep their scales apart.
    return alt.vconcat(bars, delta).resolve_scale(color="independent").to_dict()


def filled_spec(template: dict, summary: pd.DataFrame, diffs: pd.DataFrame, baseline_name: str) -> dict:
    """``template`` with its named data filled in (a millisecond, where altair takes about a second)."""
    from xrec.notebook.charts import prepare_summary

    spec = dict(template)
    spec["datasets"] = {SUMMARY_DATA: records(prepare_summary(summary, baseline_name)), DIFF_DATA: records(diffs)}
    return spec


def chart_output(spec: dict) -> dict[str, Any]:
    """One ``display_data`` output drawing ``spec`` with altair's active renderer."""
    import altair as alt

    bundle = alt.renderers.get()(spec)
    if isinstance(bundle, tuple):
        bundle, metadata = bundle
    else:
        metadata = {}
    return {"output_type": "display_data", "data": bundle, "metadata": metadata}
