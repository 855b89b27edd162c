"""One self-contained HTML page holding several charts, viewable without a network."""

from __future__ import annotations

import functools
import html
import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import altair as alt

from xrec._files import write_text_atomic
from xrec.errors import ConfigError

__all__ = ["charts_to_html", "vega_bundle"]

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
def vega_bundle() -> str:
    """The Vega, Vega-Lite and Vega-Embed libraries as one script (built once per process)."""
    import vl_convert as vlc

    version = alt.SCHEMA_VERSION.lstrip("v")
    major_minor = ".".join(version.split(".")[:2])
    if major_minor in vlc.get_vegalite_versions():
        return vlc.javascript_bundle(vl_version=major_minor)
    return vlc.javascriptvega_bundle()


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
        head_script = f'<script type="text/javascript">\n{vega_bundle()}\n</script>'
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

