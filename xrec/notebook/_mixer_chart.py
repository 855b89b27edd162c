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


def baseline_frame(baseline: Any, engine: Any, users: np.ndarray, columns: Sequence[str], weights: dict[str, float]) -> tuple[pd.DataFrame, str]:
    """Per-user metrics and label of the mixer's baseline: ``None`` (the starting weights), a
    source name (that source alone) or a :class:`~xrec.evaluate.Scorecard` covering ``users``."""
    from xrec.errors import ConfigError, DataError
    from xrec.evaluate.scorecard import Scorecard

    cols = ["user", *columns]
    if baseline is None:
        return engine.per_user()[cols].reset_index(drop=True), "start blend"
    if isinstance(baseline, str):
        if baseline not in weights:
            raise ConfigError(f"baseline {baseline!r} is not a source; sources are {list(weights)}")
        alone = {n: (1.0 if n == baseline else 0.0) for n in weights}
        frame = engine.per_user(alone)[cols].reset_index(drop=True)
        engine.evaluate(weights)  # back to the mixer's weights
        return frame, baseline
    if isinstance(baseline, Scorecard):
        missing = [c for c in columns if c not in baseline.per_user.columns]
        if missing:
            raise ConfigError(f"baseline scorecard {baseline.name!r} lacks metric(s) {missing}; evaluate it with the mixer's ks")
        indexed = baseline.per_user.set_index("user")
        absent = np.setdiff1d(users, indexed.index.to_numpy())
        if absent.size:
            raise DataError(
                f"baseline scorecard {baseline.name!r} does not cover {absent.size} of the mixer's users "
                f"(first {absent[:5].tolist()}); evaluate it on the same fold's evaluation users"
            )
        return indexed.loc[users, list(columns)].reset_index(), str(baseline.name)
    raise ConfigError(f"baseline must be a Scorecard, a source name or None, got {type(baseline).__name__}")
