"""Notebook widgets and rich display: charts, the weight mixer, ``%load_ext xrec`` formatters.

Charts need only ``altair``; the mixer imports ``ipywidgets`` when it is built.
"""

from xrec.notebook.charts import (
    charts_to_html,
    comparison_chart,
    comparison_frame,
    difference_bars,
    metric_bars,
    segment_bars,
    segment_hit_rates,
    summary_frame,
    weight_profile,
    wilson_interval,
)
from xrec.notebook.display import comparison_html, offline_charts, scorecard_html
from xrec.notebook.mixer import WeightMixer, interval_frame
from xrec.notebook.segment_charts import segment_differences, segment_means
from xrec.notebook.explorer import ExplorerWidget  # ipywidgets is imported when the widget is built

__all__ = [
    "ExplorerWidget",
    "WeightMixer",
    "charts_to_html",
    "comparison_chart",
    "comparison_frame",
    "comparison_html",
    "difference_bars",
    "interval_frame",
    "metric_bars",
    "offline_charts",
    "scorecard_html",
    "segment_bars",
    "segment_differences",
    "segment_hit_rates",
    "segment_means",
    "summary_frame",
    "weight_profile",
    "wilson_interval",
]
