"""An ipywidgets panel to mix blend weights by hand and see the metrics move at once.

One slider per source, a normalizer menu, a cut-off menu, a live chart of the blend's
metrics against a pinned baseline (with intervals) and a button that writes the current
blend as a blend file. Each slider move is re-evaluated by :class:`~xrec.blend.engine.BlendEngine`
(one block add and a re-count when a single weight changes) on a fixed set of users: a
stratified sample of the fold's evaluation users when they are many, all of them otherwise.

Sliders send values while they are dragged. Their handlers only record the newest value; one
worker thread per mixer re-evaluates and redraws, and values that arrive while it works are
merged into one pending update (:mod:`xrec.notebook._latest`), so the kernel never falls behind
the mouse. Code that reads the mixer (:meth:`WeightMixer.values`, ``chart_data_``, ...) first
waits for that update.
"""

from __future__ import annotations

import html
import os
import threading
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from xrec._validation import check_number
from xrec.errors import ConfigError, XrecError
from xrec.fold import Fold
from xrec.notebook._latest import LatestOnly, Listeners
from xrec.notebook._mixer_chart import baseline_frame, chart_output, chart_template, filled_spec, mixer_frames
from xrec.notebook._mixer_export import baseline_record, data_hints, write_blend
from xrec.notebook._mixer_settings import WaitedValue, check_metrics, pick_users, start_weights
from xrec.notebook._mixer_widgets import build_controls
from xrec.notebook._mixer_table import numbers_table, static_picture, weights_text
from xrec.notebook._still import StillPicture
from xrec.notebook.frames import interval_frame

__all__ = ["WeightMixer", "interval_frame"]

class WeightMixer:
    """Interactive weight mixer for a set of fitted sources on one fold.

    Parameters
    ----------
    sources
        Name -> source fitted on ``fold.train``.
    fold
        The fold to evaluate on (usually the validation fold while choosing weights).
    baseline
        What the blend is compared with: a :class:`~xrec.evaluate.Scorecard` evaluated on
        ``fold`` (it must cover the mixer's users), the name of one of ``sources`` (that
        source alone), or ``None`` to pin the starting weights.
    ks
        Cut-offs computed; the K menu picks the one shown.
    weights
        Starting weight per source (0..1); default 0.5 each.
    normalizer
        Starting normalizer for every source: ``"none"``, ``"minmax"``, ``"zscore"`` or ``"rank"``.
    metrics
        Per-user metrics shown (any of ``hit_rate, ndcg, recall, mrr``).
    sample_size
        Users evaluated: a sample stratified by training activity
        (:func:`xrec.blend.engine.sample_users`) when the fold has more evaluation users.
    users
        Explicit user indices to evaluate instead of a sample.
    seed
        Seed of the user sample.
    confidence
        Level of the intervals drawn.
    dataset
        The dataset the fold was split from; needed by the export button (its fingerprint
        goes into the blend file).
    data_location
        Where ``dataset`` lives, written as the blend file's ``[dataset.load]`` so that
        ``xrec recommend`` can load it: a :class:`~xrec.data.location.DataLocation` or a
        ``[data]``-style table. Default: found for the demo shop
        (:func:`~xrec.data.demo.load_demo_shop`); otherwise the file records none.
    export_path
        Starting text of the path box.
    threads
        Threads the engine may use.
    progress
        Progress bars while preparing the engine (scoring every source once).

    Attributes
    ----------
    sliders
        Source name -> ``ipywidgets.FloatSlider``.
    normalizer_menu, k_menu, path_box, export_button, bundle_button, pin_button, unpin_button, status, output, table
        The other controls; ``output`` holds the chart (CSS class ``xrec-mixer-chart``),
        ``table`` the same numbers as text.
    widget
        The whole panel (an ``ipywidgets.VBox``); a notebook cell displays it.
    users_
        User indices evaluated.
    baseline_name_
        Label of the baseline the chart compares with.
    pinned_weights_, pinned_normalizer_
        The weights and normalizer of the pinned baseline (``None`` while none is pinned).
    chart_data_
        Tidy frame behind the metric bars (``scorer, metric, mean, ci_low, ci_high, n_users``).
    difference_data_
        Tidy frame behind the difference panel (``candidate, metric, difference, ci_low, ci_high, verdict``).
    chart_spec_
        The Vega-Lite spec last drawn (data included); :meth:`chart` turns it into an altair chart.
    updates_
        Number of redraws so far (a burst of slider values makes one or a few).
    last_seconds_
        Seconds the last re-evaluation and redraw took.
    static_html_
        HTML of the static picture of the last state (see :meth:`_repr_mimebundle_`).

    Examples
    --------
    >>> mixer = WeightMixer({"als": als, "text": text}, split.validation, dataset=ds)  # doctest: +SKIP
    >>> mixer                                                                          # doctest: +SKIP
    """

    def __init__(
        self,
        sources: Mapping[str, Any],
        fold: Fold,
        baseline: Any = None,
        ks: Sequence[int] | int = (10,),
        *,
        weights: Mapping[str, float] | None = None,
        normalizer: str = "zscore",
        metrics: Sequence[str] = ("hit_rate", "ndcg"),
        sample_size: int = 2000,
        users: np.ndarray | None = None,
        seed: int = 0,
        confidence: float = 0.95,
        dataset: Any = None,
        data_location: Any = None,
        export_path: str | os.PathLike = "blend.toml",
        threads: int = 1,
        progress: bool = False,
    ) -> None:
        from xrec.blend._base import check_sources
        from xrec.blend.normalize import NORMALIZERS, check_normalizer
        from xrec.evaluate._metrics import check_ks

        if not isinstance(fold, Fold):
            raise ConfigError(f"fold must be an xrec Fold, got {type(fold).__name__}")
        self._sources = check_sources(sources)
        unfitted = [n for n, s in self._sources.items() if not getattr(s, "fitted_", False)]
        if unfitted:
            raise ConfigError(f"sources {unfitted} are not fitted: fit them on the fold's training rows first")
        self._fold = fold
        self.ks = check_ks(ks)
        self.metrics = check_metrics(metrics)
        self.normalizer = check_normalizer(normalizer, "normalizer")
        if not 0 < confidence < 1:
            raise ConfigError(f"confidence must be in (0, 1), got {confidence!r}")
        self.confidence = float(confidence)
        self._dataset = dataset
        self._data_location = data_location
        if data_location is not None:
            data_hints(dataset, data_location)  # checked now, not at the first export
        self._listeners = Listeners(lambda text: self._say(text, error=True))
        self.threads = threads
        self.progress = progress
        start = start_weights(weights, list(self._sources))

        self.users_ = pick_users(fold, users, sample_size, seed)
        self._engines: dict[str, Any] = {}
        self._columns = [f"{m}@{k}" for m in self.metrics for k in self.ks]
        self._weights = {n: float(v) for n, v in start.items()}  # the weights drawn
        self._wanted = dict(self._weights)  # the newest slider values (written by the handlers)
        self._wanted_normalizer = self.normalizer
        self._in_sync = False  # whether the engine's current weights equal self._weights
        self._muted = False  # set while set_weights moves several sliders
        self._templates: dict[tuple, dict] = {}
        self._lock = threading.RLock()  # held while the engine or the drawn state changes
        self._worker = LatestOnly(self._apply, self._worker_failed, name="xrec-weight-mixer")

        engine = self._engine(self.normalizer)
        engine.evaluate(self._weights)
        self._in_sync = True
        self._baseline_frame, self.baseline_name_ = baseline_frame(baseline, engine, self.users_, self._columns, self._weights)
        self._original_baseline = (self._baseline_frame, self.baseline_name_)
        self.pinned_weights_: dict[str, float] | None = None
        self.pinned_normalizer_: str | None = None

        # -- controls (built in _mixer_widgets; handlers wired here) ------------------------------
        sampled = " (stratified sample)" if len(self.users_) < len(fold.eval_users) else ""
        header = f"<b>Weight mixer</b>: {len(self.users_)} users{sampled}, {fold.n_items} items, normal {self.confidence:.0%} intervals over users"
        c = build_controls(self._weights, list(NORMALIZERS), self.normalizer, self.ks, str(export_path), header)
        self.sliders, self.normalizer_menu, self.k_menu, self.path_box = c.sliders, c.normalizer_menu, c.k_menu, c.path_box
        self.export_button, self.bundle_button, self.pin_button, self.unpin_button = c.export_button, c.bundle_button, c.pin_button, c.unpin_button
        self.status, self.output, self.table, self.widget = c.status, c.output, c.table, c.widget
        for name, slider in self.sliders.items():
            slider.observe(self._on_slider(name), names="value")
        self.normalizer_menu.observe(self._on_normalizer, names="value")
        self.k_menu.observe(self._on_k, names="value")
        self.export_button.on_click(lambda _b: self._export_clicked())
        self.bundle_button.on_click(lambda _b: self._export_clicked(bundle=True))
        self.pin_button.on_click(lambda _b: self.pin_baseline())
        self.unpin_button.on_click(lambda _b: self.unpin_baseline())
        self._updates = 0
        self._last_seconds = 0.0
        self._picture = StillPicture(lambda: self.static_html_, lambda: repr(self))
        self._redraw()

    # ------------------------------------------------------------------ setup helpers
    def _engine(self, normalizer: str) -> Any:
        from xrec.blend.engine import BlendEngine

        engine = self._engines.get(normalizer)
        if engine is None:
            engine = BlendEngine(
                self._sources, self._fold, normalizer, users=self.users_, ks=self.ks, metrics=self.metrics,
                metric=f"{self.metrics[0]}@{self.ks[0]}", threads=self.threads,
            ).prepare(progress=self.progress)  # fmt: skip
            self._engines[normalizer] = engine
        return engine

    # ------------------------------------------------------------------ state
    @property
    def weights(self) -> dict[str, float]:
        """Current weight per source (the slider values)."""
        self._worker.wait()
        return dict(self._wanted)

    @property
    def k(self) -> int:
        """Cut-off shown."""
        return int(self.k_menu.value)

    @property
    def sources(self) -> dict[str, Any]:
        """Name -> fitted source, in slider order (a copy; the mixer's own mapping is fixed)."""
        return dict(self._sources)

    @property
    def fold(self) -> Fold:
        """The fold the mixer evaluates on."""
        return self._fold

    @property
    def dataset(self) -> Any:
        """The dataset given at construction (``None`` when none was given)."""
        return self._dataset

    updates_ = WaitedValue("_updates", "Redraws so far (after any pending update has run).")
    last_seconds_ = WaitedValue("_last_seconds", "Seconds the last re-evaluation and redraw took.")
    chart_data_ = WaitedValue("_chart_data", "Tidy frame behind the metric bars (``scorer, metric, mean, ci_low, ci_high, n_users``).")
    difference_data_ = WaitedValue("_difference_data", "Tidy frame behind the difference panel (``candidate, metric, difference, ci_low, ci_high, verdict``).")
    chart_spec_ = WaitedValue("_chart_spec", "The Vega-Lite spec last drawn (data included); :meth:`chart` turns it into an altair chart.")

    def on_change(self, callback: Any) -> None:
        """Call ``callback(mixer)`` after every successful redraw.

        A redraw follows a slider move (a burst of values while dragging makes one or a few),
        a normalizer or K switch, :meth:`set_weights`, :meth:`pin_baseline` and
        :meth:`unpin_baseline`; moves that leave nothing to draw (all weights zero, an engine
        error) call nobody. Callbacks run in the order registered, on the thread that redrew
        (the mixer's update thread for slider moves); one that raises is reported in the
        status line and the others still run.
        """
        self._listeners.add(callback)

    def _current_per_user(self) -> pd.DataFrame:
        with self._lock:
            engine = self._engines[self.normalizer]
            return engine.per_user()[["user", *self._columns]].reset_index(drop=True)

    def per_user(self) -> pd.DataFrame:
        """Per-user metrics of the current blend: ``user`` then one column per ``"metric@K"``."""
        self._worker.wait()
        return self._current_per_user()

    def scorecard(self, name: str = "mixer blend") -> Any:
        """The current blend's :class:`~xrec.evaluate.Scorecard` on the mixer's users (rank metrics)."""
        from xrec.evaluate.scorecard import Scorecard

        return Scorecard(
            name=name,
            per_user=self.per_user(),
            ks=self.ks,
            protocol={"kind": "full_ranking"},
            fold_settings=dict(self._fold.settings),
            n_items=self._fold.n_items,
        )

    def values(self) -> dict[str, float]:
        """Mean of every computed metric for the current weights, over the mixer's users."""
        frame = self.per_user()
        return {c: float(frame[c].mean()) for c in self._columns}

    def blend(self) -> Any:
        """The current weights and normalizer as a fitted :class:`~xrec.blend.Blend`."""
        from xrec.blend import Blend

        self._worker.wait()
        with self._lock:
            return Blend(self._sources, dict(self._weights), self.normalizer).fit(self._fold)

    def wait(self, timeout: float | None = None) -> bool:
        """Block until the update for the latest slider values has been drawn (``False`` on timeout)."""
        return self._worker.wait(timeout)

    # ------------------------------------------------------------------ updates
    def _update_engine(self) -> None:
        engine = self._engine(self.normalizer)
        if self._in_sync and engine.weights_ is not None:
            moved = [n for n, v in self._weights.items() if engine.weights_.get(n) != v]
            if not moved:
                return
            # One weight moved from a state the engine holds: add Δw × block. A weight set to 0
            # is recomputed in full so the source leaves the sum exactly, as in Blend.score.
            if len(moved) == 1 and self._weights[moved[0]] > 0:
                engine.set_weight(moved[0], self._weights[moved[0]])
                return
        engine.evaluate(self._weights)

    def _apply(self) -> None:
        """Bring the drawn state to the newest wanted one (weights, normalizer) and redraw."""
        with self._lock:
            started = time.perf_counter()
            weights, normalizer = dict(self._wanted), self._wanted_normalizer
            if not any(v > 0 for v in weights.values()):
                self._in_sync = False
                self._say("All weights are 0: raise one slider (the chart shows the last valid blend).", error=True)
                return
            if normalizer != self.normalizer:
                self.normalizer, self._in_sync = normalizer, False
            self._weights = weights
            try:
                self._update_engine()
            except XrecError as exc:
                self._in_sync = False
                self._say(str(exc), error=True)
                return
            self._in_sync = True
            self._redraw()
            self._last_seconds = time.perf_counter() - started

    def _worker_failed(self, exc: BaseException) -> None:
        self._in_sync = False
        self._say(f"update failed: {type(exc).__name__}: {exc}", error=True)

    def _on_slider(self, name: str):
        def handler(change: dict) -> None:
            self._wanted[name] = float(change["new"])
            if not self._muted:
                self._worker.request()

        return handler

    def _on_normalizer(self, change: dict) -> None:
        self._wanted_normalizer = change["new"]
        if change["new"] not in self._engines:
            self._say(f"Preparing normalizer {change['new']!r}: scoring every source once (a few seconds)...")
        self._worker.request()

    def _on_k(self, _change: dict) -> None:
        if (self.k, self.baseline_name_) not in self._templates:
            self._say(f"Drawing the K={self.k} chart for the first time (about a second)...")
        self._worker.request()

    def set_weights(self, weights: Mapping[str, float]) -> None:
        """Move several sliders at once (one re-evaluation; returns once it is drawn)."""
        unknown = [n for n in weights if n not in self._sources]
        if unknown:
            raise ConfigError(f"weights: {unknown} are not sources; sources are {list(self._sources)}")
        for name, value in weights.items():
            check_number(value, f"weights.{name}:", low=0, high=1, expected="a number in [0, 1]")
        self._muted = True
        try:
            for name, value in weights.items():
                self._wanted[name] = float(value)
                self.sliders[name].value = float(value)
        finally:
            self._muted = False
        self._worker.request()
        self._worker.wait()
        self._picture.refresh()

    def pin_baseline(self) -> None:
        """Make the current blend the baseline the chart compares against (:meth:`unpin_baseline` undoes it)."""
        self._worker.wait()
        with self._lock:
            if (self.k, "pinned blend") not in self._templates:
                self._say("Pinning: drawing the chart for the new baseline (about a second)...")
            self._baseline_frame = self._current_per_user()
            self.baseline_name_ = "pinned blend"
            self.pinned_weights_ = dict(self._weights)
            self.pinned_normalizer_ = self.normalizer
            self._redraw()
        self._picture.refresh()

    def unpin_baseline(self) -> None:
        """Go back to the baseline the mixer was built with."""
        self._worker.wait()
        with self._lock:
            self._baseline_frame, self.baseline_name_ = self._original_baseline
            self.pinned_weights_ = None
            self.pinned_normalizer_ = None
            self._redraw()
        self._picture.refresh()

    def baseline_record(self) -> dict[str, Any]:
        """What the baseline is, for the blend file's evidence: a name, or the pinned weights spelled out."""
        return baseline_record(self.baseline_name_, self.pinned_weights_, self.pinned_normalizer_)

    # ------------------------------------------------------------------ drawing
    def _frames(self) -> tuple[pd.DataFrame, pd.DataFrame]:
        cols = [f"{m}@{self.k}" for m in self.metrics]
        return mixer_frames(self._baseline_frame, self._current_per_user(), self.baseline_name_, cols, self.confidence)

    def _template(self) -> dict:
        """Vega-Lite spec of the live chart with named, empty data (built once per K and baseline)."""
        key = (self.k, self.baseline_name_)
        if key not in self._templates:
            self._templates[key] = chart_template([f"{m}@{self.k}" for m in self.metrics], self.baseline_name_)
        return self._templates[key]

    def chart(self) -> Any:
        """The live chart as an altair chart (built on demand; the panel draws from :attr:`chart_spec_`)."""
        import altair as alt

        return alt.VConcatChart.from_dict(self.chart_spec_, validate=False)

    def _redraw(self) -> None:
        with self._lock:
            summary, diffs = self._frames()
            self._chart_data, self._difference_data = summary, diffs
            self._chart_spec = filled_spec(self._template(), summary, diffs, self.baseline_name_)
            self.output.outputs = (chart_output(self._chart_spec),)
            self.table.value = numbers_table(summary, diffs, self.baseline_name_, self.confidence)
            self._updates += 1
            self._say(f"weights: {html.escape(weights_text(self._weights))} · normalizer {html.escape(self.normalizer)} · K {self.k}")
        self._listeners.call(self)
        self._picture.refresh_later()

    def _say(self, text: str, *, error: bool = False) -> None:
        color = "#b00020" if error else "#555"
        self.status.value = f'<span style="color:{color}">{text if not error else html.escape(text)}</span>'

    @property
    def static_html_(self) -> str:
        """HTML of the last drawn state for a page without a kernel: settings, weights, chart and numbers."""
        self._worker.wait()
        with self._lock:
            table = numbers_table(self._chart_data, self._difference_data, self.baseline_name_, self.confidence)
            return static_picture(table, self._weights, self.normalizer, self.k, len(self.users_), self.baseline_name_, self._chart_spec)

    # ------------------------------------------------------------------ export
    def export(self, path: str | os.PathLike | None = None, *, bundle: bool = False) -> Path:
        """Write the current blend as a blend file (default: the path box) and return its path.

        Missing folders on the way are created; errors name the path as typed. The file's
        ``[dataset.load]`` records where the data lives (see ``data_location``), so
        ``xrec recommend`` can serve it. The evidence table records the mixer's users, metrics
        and the baseline (a source or scorecard name, or the pinned weights spelled out). With
        ``bundle``, write a bundle folder instead (:func:`xrec.bundle.save_bundle`: the blend
        file plus every learned artifact), named as the path without its ``.toml`` suffix.
        """
        if self._dataset is None:
            raise ConfigError("export needs the dataset the fold was split from: WeightMixer(..., dataset=dataset)")
        self._worker.wait()
        if not any(v > 0 for v in self._wanted.values()):
            raise ConfigError("weights: all weights are zero; raise one slider before exporting")
        evidence = {
            "chosen_with": "xrec weight mixer",
            "users": int(len(self.users_)),
            "sampled": bool(len(self.users_) < len(self._fold.eval_users)),
            "metrics": self.values(),
            **self.baseline_record(),
            "baseline_metrics": {c: float(self._baseline_frame[c].mean()) for c in self._columns},
        }
        typed = os.fspath(self.path_box.value if path is None else path)
        hints = data_hints(self._dataset, self._data_location)
        return write_blend(self.blend(), self._dataset, self._fold.settings, typed, bundle=bundle, evidence=evidence, hints=hints)

    def _export_clicked(self, *, bundle: bool = False) -> None:
        try:
            written = self.export(bundle=bundle)
        except (XrecError, OSError) as exc:
            self._say(f"export failed: {exc}", error=True)
            return
        note = "" if data_hints(self._dataset, self._data_location) else " (no data location recorded: pass data_location= for xrec recommend)"
        self._say(f"wrote {html.escape(str(written))}{html.escape(note)}")
        self._picture.refresh()

    # ------------------------------------------------------------------ display
    def _ipython_display_(self) -> None:
        """Show the live panel, then a still picture of the last state (see :class:`~xrec.notebook._still.StillPicture`)."""
        self._picture.show(self.widget)

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        """The live panel, with the still picture as ``text/html`` for front ends without widgets."""
        return {**self.widget._repr_mimebundle_(**kwargs), "text/html": self.static_html_}

    def __repr__(self) -> str:
        w = ", ".join(f"{n}={v:.2f}" for n, v in self._wanted.items())
        return f"WeightMixer({w}; normalizer={self.normalizer!r}, {len(self.users_)} users)"
