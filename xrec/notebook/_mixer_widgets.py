"""The weight mixer's controls, laid out (no behaviour: :mod:`xrec.notebook.mixer` wires the handlers)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from types import SimpleNamespace

# Description column of the menus; the sliders get one width for all, from the longest name,
# so that their tracks start at the same x.
_MENU_LABEL = "80px"
_TRACK_PX = 300


def build_controls(
    weights: Mapping[str, float], normalizers: Sequence[str], normalizer: str, ks: Sequence[int], export_path: str, header_html: str
) -> SimpleNamespace:
    """Sliders, menus, buttons, the chart output (class ``xrec-mixer-chart``), the numbers table and the panel."""
    import ipywidgets as w

    label_px = 12 + 8 * max(len(n) for n in weights)
    sliders = {
        name: w.FloatSlider(
            value=float(value), min=0.0, max=1.0, step=0.01, description=name, continuous_update=True, readout_format=".2f",
            style={"description_width": f"{label_px}px"}, layout=w.Layout(width=f"{label_px + _TRACK_PX}px"),
        )
        for name, value in weights.items()
    }  # fmt: skip
    menu_style, menu_layout = {"description_width": _MENU_LABEL}, w.Layout(width="230px")
    c = SimpleNamespace(
        sliders=sliders,
        normalizer_menu=w.Dropdown(options=list(normalizers), value=normalizer, description="normalizer", style=menu_style, layout=menu_layout),
        k_menu=w.Dropdown(options=list(ks), value=ks[0], description="K", style=menu_style, layout=menu_layout),
        path_box=w.Text(value=export_path, description="blend file", style={"description_width": _MENU_LABEL}, layout=w.Layout(width="420px")),
        export_button=w.Button(description="Export blend file", icon="download", button_style="primary"),
        bundle_button=w.Button(description="Export bundle", icon="archive", tooltip="blend file + learned artifacts, for xrec serve"),
        pin_button=w.Button(description="Pin as baseline", icon="thumb-tack", layout=w.Layout(width="140px")),
        unpin_button=w.Button(description="Unpin", icon="undo", tooltip="back to the original baseline", layout=w.Layout(width="86px")),
        status=w.HTML(),
        output=w.Output(),
        table=w.HTML(),
    )
    c.output.add_class("xrec-mixer-chart")  # DOM hook for browser tests and page styling
    c.table.add_class("xrec-mixer-numbers")
    menus = w.VBox([c.normalizer_menu, c.k_menu, w.HBox([c.pin_button, c.unpin_button])])
    c.widget = w.VBox(
        [
            w.HTML(header_html),
            w.HBox([w.VBox(list(sliders.values())), menus]),
            c.output,
            c.table,
            w.HBox([c.path_box, c.export_button, c.bundle_button]),
            c.status,
        ]
    )
    c.widget.add_class("xrec-mixer")
    return c
