"""Notebook widgets and rich display: charts, the weight mixer, ``%load_ext xrec`` formatters.

Charts need only ``altair``; the mixer imports ``ipywidgets`` when it is built, the gallery
(:class:`Gallery`, thumbnails from :mod:`xrec.notebook.thumbnails`) when its widget is shown.
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
from xrec.notebook.explorer import ExplorerWidget
from xrec.notebook.gallery import Gallery, choose_report_users, report_gallery
from xrec.notebook.mixer import WeightMixer, interval_frame
from xrec.notebook.segment_charts import segment_differences, segment_means

__all__ = [
    "ExplorerWidget",
    "Gallery",
    "WeightMixer",
    "charts_to_html",
    "choose_report_users",
    "comparison_chart",
    "comparison_frame",
    "comparison_html",
    "difference_bars",
    "interval_frame",
    "metric_bars",
    "offline_charts",
    "report_gallery",
    "scorecard_html",
    "segment_bars",
    "segment_differences",
    "segment_hit_rates",
    "segment_means",
    "summary_frame",
    "weight_profile",
    "wilson_interval",
]
