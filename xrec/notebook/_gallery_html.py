"""HTML of one gallery panel: a user's history, held-out items and two top-K lists side by side.

Plain HTML with inline styles (see :mod:`xrec.notebook.thumbnails`): the live widget sets
it as an ``ipywidgets.HTML`` value, and the report places it on a self-contained page.
"""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from xrec.data.catalog import Catalog
from xrec.notebook._gallery_rank import Ranked, UserView
from xrec.notebook.thumbnails import MARK_STYLES, Tile, largest_contribution, strip_html, tiles_for

__all__ = ["PanelStyle", "legend_html", "view_html"]


@dataclass(frozen=True)
class PanelStyle:
    """Sizes and limits of a panel."""

    size: int = 72  # top-K thumbnails
    history_size: int = 48  # history thumbnails
    history_max: int = 12  # history items shown (most recent first)
    fmt: str = "webp"


def _ranked_tiles(
    catalog: Catalog, ranked: Ranked, marks: Sequence[tuple[str, ...]], style: PanelStyle
) -> list[Tile]:
    tiles = tiles_for(catalog, ranked.items, size=style.size, fmt=style.fmt)
    return [
        replace(t, score=float(ranked.scores[i]), marks=marks[i], contributions={n: float(v[i]) for n, v in ranked.contributions.items()})
        for i, t in enumerate(tiles)
    ]


def _marks(items: np.ndarray, view: UserView, other: np.ndarray, moved: str, new_items: np.ndarray) -> list[tuple[str, ...]]:
    out = []
    for j in items:
        m = []
        if j in view.heldout:
            m.append("hit")
        if j not in other:
            m.append(moved)
        if new_items[j]:
            m.append("new")
        out.append(tuple(m))
    return out


def legend_html(weights: Mapping[str, float], colors: Mapping[str, str], normalizer: str) -> str:
    """One swatch per source with its weight, and how the bars are read."""
    chips = "".join(
        f'<span style="display:inline-block;margin-right:10px"><span style="display:inline-block;width:10px;height:10px;'
        f'background:{html.escape(colors[n])};margin-right:3px"></span>{html.escape(n)} {w:.2f}</span>'
        for n, w in weights.items()
    )
    return (
        f'<div class="xrec-gallery-legend" style="font-size:12px;color:#333;margin:4px 0">{chips}'
        f'<span style="color:#666">bars: weight × {html.escape(normalizer)}-normalized score per source '
        "(right of the line adds, left subtracts; they sum to the score)</span></div>"
    )


def view_html(
    view: UserView,
    catalog: Catalog,
    *,
    weights: Mapping[str, float],
    normalizer: str,
    colors: Mapping[str, str],
    baseline_name: str,
    new_items: np.ndarray,
    revision: int | None = None,
    note: str = "",
    style: PanelStyle = PanelStyle(),
) -> str:
    """The panel of one user as one ``<div class="xrec-gallery">`` (with ``data-revision`` when given)."""
    k = view.k
    base_tiles = _ranked_tiles(catalog, view.baseline, _marks(view.baseline.items, view, view.blend.items, "dropped", new_items), style)
    blend_tiles = _ranked_tiles(catalog, view.blend, _marks(view.blend.items, view, view.baseline.items, "added", new_items), style)
    scale = largest_contribution(base_tiles + blend_tiles)
    shown = view.history[: style.history_max]
    history = tiles_for(catalog, shown, size=style.history_size, fmt=style.fmt)
    held = []
    for t, j in zip(tiles_for(catalog, view.heldout, size=style.history_size, fmt=style.fmt), view.heldout, strict=True):
        lists = (("blend", view.blend), (baseline_name, view.baseline))
        m = [f"{name} #{int(np.flatnonzero(r.items == j)[0]) + 1}" for name, r in lists if j in r.items]
        held.append(replace(t, marks=(*m, *(("new",) if new_items[j] else ()))))
    n_held = len(view.heldout)
    head = (
        f"<b>User {html.escape(str(view.user_id))}</b>{' · ' + html.escape(note) if note else ''} · "
        f"top {k} · held-out items found: blend {len(view.blend_hits)}/{n_held}, "
        f"{html.escape(baseline_name)} {len(view.baseline_hits)}/{n_held} · "
        f"blend added {len(view.added)}, dropped {len(view.dropped)}"
    )
    history_title = f"Training history (most recent first; {len(shown)} of {view.history_total} items)"
    col = 'style="flex:1 1 0;min-width:0"'
    marks_key = " · ".join(
        f'<span style="color:{color}">{html.escape(text)}</span>' for name, (text, color) in MARK_STYLES.items()
    )
    revision_attr = f' data-revision="{int(revision)}"' if revision is not None else ""
    return (
        f'<div class="xrec-gallery"{revision_attr} data-user="{html.escape(str(view.user_id))}" '
        f'style="font-family:system-ui,sans-serif;font-size:13px;line-height:1.3">'
        f'<div class="xrec-gallery-head">{head}</div>'
        f"{legend_html(weights, colors, normalizer)}"
        f'<div style="font-size:11px;color:#666">marks: {marks_key}; a green frame is a held-out item</div>'
        f'{strip_html(history, title=history_title, size=style.history_size, empty="no training history (a cold user)")}'
        f'{strip_html(held, title="Held out (what the user chose next)", size=style.history_size, empty="nothing held out")}'
        f'<div style="display:flex;gap:12px;align-items:flex-start">'
        f'<div class="xrec-gallery-baseline" {col}>'
        f'{strip_html(base_tiles, title=f"Baseline: {baseline_name}", size=style.size, colors=colors, scale=scale)}</div>'
        f'<div class="xrec-gallery-blend" {col}>'
        f'{strip_html(blend_tiles, title="Blend", size=style.size, colors=colors, scale=scale)}</div>'
        "</div></div>"
    )
