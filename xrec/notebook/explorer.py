"""The cross-modal explorer in a notebook: type a description, pick an item, compose, filter; see thumbnails.

:class:`ExplorerWidget` puts ipywidgets controls over a fitted
:class:`~xrec.explore.CatalogExplorer` and draws every answer as thumbnail tiles with
scores (:mod:`xrec.notebook.thumbnails`). Its root element carries the CSS class
``xrec-explorer`` (its controls ``xrec-explorer-text``, ``-search``, ``-item``, ``-similar``,
``-words``, ``-compose``); the results area is a ``<div class="xrec-explorer-results">`` whose
``data-revision`` attribute grows with every redraw, so a browser test can wait for it.
"""

from __future__ import annotations

import dataclasses
import html
from collections.abc import Sequence
from typing import Any

import pandas as pd

from xrec._validation import check_fitted, check_int, check_number
from xrec.errors import ConfigError, XrecError

__all__ = ["ExplorerWidget"]

_ANY = "(any)"
# strip titles per query: modality -> title
_SEARCH_TITLES = {"text_to_image": "pictures matching the words"}
_SIMILAR_TITLES = {
    "image": "looks alike (image)",
    "text": "described alike (text)",
    "attributes": "same attributes",
    "text_to_image": "its description → pictures (bridge)",
    "image_to_text": "its picture → descriptions (bridge)",
}
_COMPOSE_TITLES = {"composed": "this item, but …"}
_MODALITY_LABELS = {
    "all": None,
    "image": "image",
    "text": "text",
    "attributes": "attributes",
    "its text → pictures": "text_to_image",
    "its picture → texts": "image_to_text",
}


class ExplorerWidget:
    """Description search, similar items, "this item, but <words>" and filters, as notebook controls.

    Parameters
    ----------
    explorer
        A fitted :class:`~xrec.explore.CatalogExplorer`.
    k
        Results per query (per modality for similar items).
    alpha
        Starting weight of the words in a composed query (see :meth:`CatalogExplorer.compose`).
    filters
        Catalog columns offered as filter menus; ``None``: every categorical column.
    size
        Thumbnail side in pixels.
    item
        Item first shown in the item picker (default: the first catalog item).

    Attributes
    ----------
    widget
        The whole panel (an ``ipywidgets.VBox`` with class ``xrec-explorer``).
    text_box, search_button
        Description box and its button (Enter in the box searches too).
    item_picker, modality_menu, similar_button
        Item menu, modality menu and the button that lists similar items.
    words_box, alpha_slider, compose_button
        The words of a composed query (Enter in the box composes), their weight, and its button.
    filter_menus
        Column -> ``Dropdown`` of its values (``"(any)"`` first).
    results
        ``HTML`` widget holding the tiles.
    status
        One line saying what is shown, or what went wrong.
    result_
        The DataFrame behind the tiles shown last (``None`` before the first query).
    revision_
        Number of redraws so far.
    """

    def __init__(
        self,
        explorer: Any,
        *,
        k: int = 8,
        alpha: float = 1.5,
        filters: Sequence[str] | None = None,
        size: int = 96,
        item: Any = None,
    ) -> None:
        import ipywidgets as w

        check_fitted(explorer, how="call explorer.fit(catalog) first")
        self.explorer = explorer
        self.k = check_int(k, "k", low=1, high=200)
        self.size = check_int(size, "size", low=16, high=512)
        alpha = check_number(alpha, "alpha", low=0)
        catalog = explorer.catalog_
        columns = list(catalog.schema.categorical) if filters is None else [filters] if isinstance(filters, str) else list(filters)
        bad = [c for c in columns if c not in catalog.schema.categorical]
        if bad:
            raise ConfigError(f"filters: {bad} are not categorical catalog columns; those are {list(catalog.schema.categorical)}")
        ids = catalog.item_ids
        start = ids[0] if item is None else ids[explorer.item_index(item)]
        wide = w.Layout(width="420px")
        label = {"description_width": "110px"}

        self.text_box = w.Text(placeholder="describe what you are looking for", description="Description", continuous_update=False, layout=wide, style=label)
        self.text_box.observe(self._on_text, names="value")
        self.search_button = w.Button(description="Find pictures", icon="search", button_style="primary")
        self.search_button.on_click(lambda _b: self.search())
        options = [(f"{name} ({item_id})", item_id) for item_id, name in zip(ids, explorer.names_, strict=True)]
        self.item_picker = w.Dropdown(options=options, value=start, description="Item", layout=wide, style=label)
        self.modality_menu = w.Dropdown(options=list(_MODALITY_LABELS), value="all", description="compare by", layout=w.Layout(width="260px"))
        self.similar_button = w.Button(description="Similar items", icon="clone")
        self.similar_button.on_click(lambda _b: self.similar())
        self.words_box = w.Text(placeholder="e.g. embroidered patch", description="… but", continuous_update=False, layout=wide, style=label)
        self.words_box.observe(self._on_words, names="value")
        self.alpha_slider = w.FloatSlider(
            value=float(alpha), min=0.0, max=max(4.0, float(alpha)), step=0.25, description="words weight",
            readout_format=".2f", style={"description_width": "initial"},
        )  # fmt: skip
        self.compose_button = w.Button(description="This item, but …", icon="magic")
        self.compose_button.on_click(lambda _b: self.compose())
        self.filter_menus = {
            col: w.Dropdown(options=[_ANY, *sorted(set(catalog.items[col].astype(str)))], value=_ANY, description=col, style=label)
            for col in columns
        }
        for menu in self.filter_menus.values():
            menu.observe(self._on_filter, names="value")
        self.status = w.HTML()
        self.results = w.HTML()
        self.result_: pd.DataFrame | None = None
        self.revision_ = 0
        self._muted = False
        self._last: Any = None  # the query method shown last, re-run when a filter changes
        header = w.HTML(
            f"<b>Catalog explorer</b>: {catalog.n_items} items, bridge "
            f"{html.escape(type(explorer.bridge_).__name__)}; scores are cosines"
        )
        rows = [
            header,
            w.HBox([self.text_box, self.search_button]),
            w.HBox([self.item_picker, self.modality_menu, self.similar_button]),
            w.HBox([self.words_box, self.alpha_slider, self.compose_button]),
        ]
        if self.filter_menus:
            rows.append(w.HBox([w.HTML("<span style='margin-right:6px'>only:</span>"), *self.filter_menus.values()]))
        self.widget = w.VBox([*rows, self.status, self.results])
        self.widget.add_class("xrec-explorer")
        for control, name in ((self.text_box, "text"), (self.search_button, "search"), (self.item_picker, "item"),
                              (self.similar_button, "similar"), (self.words_box, "words"), (self.compose_button, "compose")):
            control.add_class(f"xrec-explorer-{name}")  # stable hooks for browser tests
        self._draw([], "type a description, pick an item, or compose")

    # -- queries -------------------------------------------------------------------------------

    def where(self) -> dict[str, str] | None:
        """The filter menus as the explorer's ``where`` (``None`` when every menu says any)."""
        chosen = {col: menu.value for col, menu in self.filter_menus.items() if menu.value != _ANY}
        return chosen or None

    def _on_text(self, change: dict) -> None:
        if not self._muted and change["new"].strip():
            self.search()

    def _on_words(self, change: dict) -> None:
        if not self._muted and change["new"].strip():
            self.compose()

    def _on_filter(self, _change: dict) -> None:
        if self._last is not None:
            self._last()

    def search(self, text: str | None = None) -> pd.DataFrame | None:
        """Show the pictures nearest ``text`` (default: the description box); returns the results."""
        if text is not None:
            self._muted = True
            try:
                self.text_box.value = text
            finally:
                self._muted = False
        text = self.text_box.value
        return self._run(
            self.search, lambda: self.explorer.search(text, self.k, where=self.where()), f"pictures for {text!r}", _SEARCH_TITLES
        )

    def similar(self, item: Any = None) -> pd.DataFrame | None:
        """Show the items nearest ``item`` (default: the picked item) by the chosen modality."""
        if item is not None:
            self.item_picker.value = self.explorer.catalog_.item_ids[self.explorer.item_index(item)]
        chosen = self.item_picker.value
        modality = _MODALITY_LABELS[self.modality_menu.value]
        return self._run(
            self.similar,
            lambda: self.explorer.similar(chosen, self.k, modality=modality, where=self.where()),
            f"items like {chosen}",
            _SIMILAR_TITLES,
            item=chosen,
        )

    def compose(self, words: str | None = None, alpha: float | None = None) -> pd.DataFrame | None:
        """Show "the picked item, but ``words``" (default: the words box and the slider)."""
        if alpha is not None:
            self.alpha_slider.value = float(alpha)
        if words is not None:
            self._muted = True
            try:
                self.words_box.value = words
            finally:
                self._muted = False
        chosen, text, weight = self.item_picker.value, self.words_box.value, self.alpha_slider.value
        return self._run(
            self.compose,
            lambda: self.explorer.compose(chosen, text, weight, self.k, where=self.where()),
            f"{chosen}, but {text!r} (words weight {weight:.2f})",
            _COMPOSE_TITLES,
            item=chosen,
        )

    def _run(self, action: Any, query: Any, what: str, titles: dict[str, str], *, item: Any = None) -> pd.DataFrame | None:
        self._last = action
        # shown at once: the first description loads the text encoder (a few seconds)
        self._say(html.escape(f"working: {what} …"))
        try:
            frame = query()
        except XrecError as exc:
            self._say(str(exc), error=True)
            return None
        self.result_ = frame
        self._draw(self._strips(frame, titles, item), what)
        return frame

    # -- drawing -------------------------------------------------------------------------------

    def _strips(self, frame: pd.DataFrame, titles: dict[str, str], item: Any = None) -> list[str]:
        """One strip of tiles per modality, after the query item's own tile when there is one."""
        from xrec.notebook.thumbnails import strip_html, tiles_for

        catalog = self.explorer.catalog_
        strips = []
        if item is not None:
            own = tiles_for(catalog, [self.explorer.item_index(item)], size=self.size, caption=self.explorer.name_column_)
            strips.append(strip_html([dataclasses.replace(own[0], marks=("query",))], title="the item", size=self.size))
        for modality, part in frame.groupby("modality", sort=False):
            positions = catalog.index_of(part["item"])
            tiles = tiles_for(catalog, positions, size=self.size, caption=self.explorer.name_column_)
            tiles = [dataclasses.replace(t, score=float(s)) for t, s in zip(tiles, part["score"], strict=True)]
            strips.append(strip_html(tiles, title=titles.get(str(modality), str(modality)), size=self.size, empty="nothing matches the filters"))
        return strips

    def _draw(self, strips: list[str], what: str) -> None:
        self.revision_ += 1
        body = "".join(strips)
        if self.result_ is not None and self.result_.empty:
            body += '<div style="color:#777;font-size:12px">nothing matches the filters</div>'
        self.results.value = f'<div class="xrec-explorer-results" data-revision="{self.revision_}">{body}</div>'
        where = self.where()
        only = "" if where is None else " · only " + ", ".join(f"{c} = {v}" for c, v in where.items())
        self._say(html.escape(what + only))

    def _say(self, text: str, *, error: bool = False) -> None:
        color = "#b00020" if error else "#555"
        self.status.value = f'<span style="color:{color}">{html.escape(text) if error else text}</span>'

    # -- display -------------------------------------------------------------------------------

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        return self.widget._repr_mimebundle_(**kwargs)

    def __repr__(self) -> str:
        return f"ExplorerWidget({self.explorer!r}, k={self.k})"
