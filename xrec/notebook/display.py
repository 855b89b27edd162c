"""Rich notebook display of scorecards and comparisons, registered by ``%load_ext xrec``.

The extension adds HTML formatters to IPython's display formatter: a scorecard shows every
metric's mean with its bootstrap interval, a comparison shows each difference with its
interval and p-values, coloured by direction when the interval excludes zero. Plain-text
output stays the objects' own ``repr``.
"""

from __future__ import annotations

import functools
import html
from typing import Any

import numpy as np
import pandas as pd

from xrec._validation import parse_metric_column

__all__ = [
    "OFFLINE_RENDERER",
    "chart_html",
    "comparison_html",
    "libraries_html",
    "load_ipython_extension",
    "offline_charts",
    "scorecard_html",
    "unload_ipython_extension",
]

#: Name of the altair renderer :func:`offline_charts` registers.
OFFLINE_RENDERER = "xrec_offline"

_STYLE = (
    "<style>.xrec-table{border-collapse:collapse;font-size:0.9em}"
    ".xrec-table th,.xrec-table td{border:1px solid #ddd;padding:2px 8px;text-align:right}"
    ".xrec-table th{background:#f4f4f4}.xrec-up{color:#2f7d32}.xrec-down{color:#b00020}</style>"
)


def _fmt(value: Any, spec: str = ".4f") -> str:
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "–"
    return format(float(value), spec)


def scorecard_html(card: Any, *, confidence: float = 0.95, n_resamples: int = 2000, seed: int = 0) -> str:
    """HTML of a :class:`~xrec.evaluate.Scorecard`: rows metric, columns K, cells ``mean [low, high]``.

    Parameters
    ----------
    card
        The scorecard.
    confidence, n_resamples, seed
        Level, resamples and seed of the bootstrap intervals (passed to ``Scorecard.summary``).
    """
    summary = card.summary(confidence=confidence, seed=seed, n_resamples=n_resamples)
    cells: dict[str, dict[str, str]] = {}
    ks: list[str] = []
    for metric, row in summary.iterrows():
        name, k = parse_metric_column(metric)
        col = f"@{k}"
        if col not in ks:
            ks.append(col)
        if np.isnan(row["ci_low"]):
            text = _fmt(row["mean"])
        else:
            text = f"{_fmt(row['mean'])} <small>[{_fmt(row['ci_low'])}, {_fmt(row['ci_high'])}]</small>"
        cells.setdefault(name, {})[col] = text
    head = "".join(f"<th>{html.escape(k)}</th>" for k in ks)
    body = "".join(
        f"<tr><th>{html.escape(name)}</th>" + "".join(f"<td>{row.get(k, '')}</td>" for k in ks) + "</tr>" for name, row in cells.items()
    )
    title = html.escape(card.title())
    note = f"mean [{confidence:.0%} bootstrap interval over users, {n_resamples} resamples]"
    return f"{_STYLE}<div><b>{title}</b><br><small>{note}</small><table class='xrec-table'><tr><th></th>{head}</tr>{body}</table></div>"


def comparison_html(comparison: Any, *, alpha: float = 0.05) -> str:
    """HTML of a :class:`~xrec.evaluate.Comparison`: one row per metric and candidate.

    A difference is coloured when its interval excludes zero and the Holm-adjusted p-value
    is below ``alpha`` (green up, red down).
    """
    table: pd.DataFrame = comparison.table
    rows = []
    for r in table.to_dict("records"):
        significant = r.get("p_holm", r.get("p_value", 1.0)) < alpha
        cls = ""
        if significant and r["ci_low"] > 0:
            cls = "xrec-up"
        elif significant and r["ci_high"] < 0:
            cls = "xrec-down"
        rel = r.get("relative_change", np.nan)
        rows.append(
            "<tr>"
            f"<th>{html.escape(str(r['metric']))}</th><th>{html.escape(str(r['candidate']))}</th>"
            f"<td>{_fmt(r['baseline_mean'])}</td><td>{_fmt(r['candidate_mean'])}</td>"
            f"<td class='{cls}'>{_fmt(r['difference'], '+.4f')}</td>"
            f"<td>[{_fmt(r['ci_low'], '+.4f')}, {_fmt(r['ci_high'], '+.4f')}]</td>"
            f"<td>{_fmt(rel * 100 if rel == rel else np.nan, '+.1f')}%</td>"
            f"<td>{_fmt(r.get('p_value'), '.3g')}</td><td>{_fmt(r.get('p_holm'), '.3g')}</td>"
            "</tr>"
        )
    head = "<tr><th>metric</th><th>candidate</th><th>baseline</th><th>candidate</th><th>difference</th><th>interval</th><th>change</th><th>p</th><th>p (Holm)</th></tr>"
    return f"{_STYLE}<div><b>{html.escape(comparison.title())}</b><table class='xrec-table'>{head}{''.join(rows)}</table></div>"


_QUEUE = "xrecChartQueue"  # draw functions of charts that arrived before the libraries


def chart_html(spec: dict) -> str:
    """HTML that draws the Vega-Lite ``spec`` with the libraries :func:`offline_charts` put in the page.

    The chart's div says what is missing until it is drawn; when the libraries are not there
    yet, the draw call waits in a page-wide queue that the libraries' loader empties (so
    charts above the loader's output, or drawn before it finished, still appear).
    """
    import json
    import uuid

    div = f"xrec-vis-{uuid.uuid4().hex[:12]}"
    # "</" would end the <script> element early; "<\\/" reads the same inside JS strings.
    spec_js = json.dumps(spec).replace("</", "<\\/")
    options = json.dumps({"actions": {"export": True, "source": False, "compiled": False, "editor": False}})
    waiting = "Chart waiting for its libraries: run the cell with xrec.notebook.offline_charts() (a trusted notebook draws it then)."
    script = (
        "(function(){"
        f"var el=document.getElementById('{div}');var spec={spec_js};var opt={options};"
        "function draw(){el.innerText='';window.vegaEmbed(el,spec,opt).catch(function(e){el.innerText=String(e);});}"
        f"if(window.vegaEmbed){{draw();}}else{{(window.{_QUEUE}=window.{_QUEUE}||[]).push(draw);}}"
        "})();"
    )
    return f'<div id="{div}" class="xrec-chart"><small>{html.escape(waiting)}</small></div><script type="text/javascript">{script}</script>'


def _offline_renderer(spec: dict, **_metadata: Any) -> dict[str, str]:
    """Altair renderer: :func:`chart_html` (the libraries come from :func:`offline_charts`)."""
    return {"text/html": chart_html(spec), "text/plain": "<altair chart>"}


@functools.lru_cache(maxsize=1)
def libraries_html() -> str:
    """One ``text/html`` output that loads Vega, Vega-Lite and Vega-Embed into the page, compressed.

    The libraries (about 0.9 MB of script) are stored gzip-compressed and base64-encoded
    (about 0.4 MB) and unpacked by the browser (``DecompressionStream``) into one script run
    once per page; charts waiting in the queue are then drawn. Nothing is fetched.
    """
    import base64
    import gzip

    from xrec.notebook.html_page import vega_bundle

    # Wrapped in a function so that running the loader twice cannot redeclare the bundle's
    # top-level names; the bundle sets window.vegaEmbed / vega / vegaLite itself.
    code = "(function(){" + vega_bundle() + "\n})();"
    packed = base64.b64encode(gzip.compress(code.encode("utf-8"), 9, mtime=0)).decode("ascii")
    note = "xrec: chart libraries loaded (offline, once for this notebook)."
    script = (
        "(function(){"
        f"function drain(){{var q=window.{_QUEUE}||[];window.{_QUEUE}=[];q.forEach(function(f){{f();}});}}"
        "if(window.vegaEmbed){drain();return;}"
        "if(window.xrecChartsLoading){return;}window.xrecChartsLoading=true;"
        f'var b=atob("{packed}");var a=new Uint8Array(b.length);for(var i=0;i<b.length;i++){{a[i]=b.charCodeAt(i);}}'
        'new Response(new Blob([a]).stream().pipeThrough(new DecompressionStream("gzip"))).text().then(function(t){'
        "var s=document.createElement('script');s.text=t;document.head.appendChild(s);window.xrecChartsLoading=false;drain();"
        "}).catch(function(e){window.xrecChartsLoading=false;console.error('xrec chart libraries',e);});"
        "})();"
    )
    return f'<script type="text/javascript">{script}</script><small>{note}</small>'


def offline_charts(display_libraries: bool = True) -> None:
    """Draw altair charts in this notebook without any network access.

    Altair's default notebook output fetches the Vega libraries from a CDN, which fails
    offline. This registers and enables an altair renderer (``"xrec_offline"``) whose outputs
    call the libraries already in the page, and displays one output that holds them
    (Vega, Vega-Lite and Vega-Embed from ``vl-convert-python``, gzip-compressed: about 0.4 MB
    in the saved notebook, against 0.9 MB as plain script). Call it once, near the top of the
    notebook; every chart drawn in the page (including the weight mixer's) uses that one copy,
    and a chart that arrives first waits for it. Front ends that run scripts in trusted HTML
    outputs (Jupyter Notebook, JupyterLab) are supported.

    Parameters
    ----------
    display_libraries
        Display the libraries output now (turn off when an earlier cell already did).

    """
    import altair as alt

    alt.renderers.register(OFFLINE_RENDERER, _offline_renderer)
    alt.renderers.enable(OFFLINE_RENDERER)
    if display_libraries:
        from IPython.display import HTML, display

        display(HTML(libraries_html()))


def _formatters(ipython: Any) -> Any:
    return ipython.display_formatter.formatters["text/html"]


def load_ipython_extension(ipython: Any) -> None:
    """Register the HTML formatters of scorecards and comparisons with ``ipython``.

    Called by ``%load_ext xrec`` (through :func:`xrec.load_ipython_extension`).
    """
    from xrec.evaluate.compare import Comparison
    from xrec.evaluate.scorecard import Scorecard

    fmt = _formatters(ipython)
    fmt.for_type(Scorecard, scorecard_html)
    fmt.for_type(Comparison, comparison_html)


def unload_ipython_extension(ipython: Any) -> None:
    """Remove the formatters added by :func:`load_ipython_extension`."""
    from xrec.evaluate.compare import Comparison
    from xrec.evaluate.scorecard import Scorecard

    fmt = _formatters(ipython)
    for cls in (Scorecard, Comparison):
        try:
            fmt.pop(cls)
        except KeyError:
            pass
