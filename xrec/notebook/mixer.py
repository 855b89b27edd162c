"""An ipywidgets panel to mix blend weights by hand and see the metrics move at once.

One slider per source, a normalizer menu, a cut-off menu, a live chart of the blend's
metrics against a pinned baseline (with intervals) and a button that writes the current
blend as a blend file. Each slider move is re-evaluated by :class:`~xrec.blend.engine.BlendEngine`
(one block add and a re-count when a single weight changes) on a fixed set of users: a
stratified sample of the fold's evaluation users when they are many, all of them otherwise.
"""

from __future__ import annotations

import html
import os
import time
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from xrec._validation import check_number
from xrec.errors import ConfigError, DataError, XrecError
from xrec.fold import Fold
from xrec.notebook._mixer_chart import chart_output, chart_template, filled_spec, mixer_frames
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
    normalizer_menu, k_menu, path_box, export_button, bundle_button, pin_button, unpin_button, status, output
        The other controls; ``output`` holds the chart.
    widget
        The whole panel (an ``ipywidgets.VBox``); a notebook cell displays it.
    users_
        User indices evaluated.
    baseline_name_
        Label of the pinned baseline.
    chart_data_
        Tidy frame behind the metric bars (``scorer, metric, mean, ci_low, ci_high, n_users``).
    difference_data_
        Tidy frame behind the difference panel (``candidate, metric, difference, ci_low, ci_high, verdict``).
    chart_spec_
        The Vega-Lite spec last drawn (data included); :meth:`chart` turns it into an altair chart.
    updates_
        Number of redraws so far (increases by one per slider move that re-evaluated).
    last_seconds_
        Seconds the last re-evaluation and redraw took.

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
        export_path: str | os.PathLike = "blend.toml",
        threads: int = 1,
        progress: bool = False,
    ) -> None:
        import ipywidgets as w

        from xrec.blend._base import check_sources
        from xrec.blend.normalize import NORMALIZERS, check_normalizer
        from xrec.evaluate._metrics import RANK_METRICS
        from xrec.evaluate._metrics import check_ks

        if not isinstance(fold, Fold):
            raise ConfigError(f"fold must be an xrec Fold, got {type(fold).__name__}")
        self._sources = check_sources(sources)
        unfitted = [n for n, s in self._sources.items() if not getattr(s, "fitted_", False)]
        if unfitted:
            raise ConfigError(f"sources {unfitted} are not fitted: fit them on the fold's training rows first")
        self._fold = fold
        self.ks = check_ks(ks)
        metrics = [metrics] if isinstance(metrics, str) else list(metrics)
        bad = [m for m in metrics if m not in RANK_METRICS]
        if bad or not metrics:
            raise ConfigError(f"metrics: choose among {list(RANK_METRICS)}, got {metrics}")
        self.metrics = tuple(dict.fromkeys(metrics))
        self.normalizer = check_normalizer(normalizer, "normalizer")
        if not 0 < confidence < 1:
            raise ConfigError(f"confidence must be in (0, 1), got {confidence!r}")
        self.confidence = float(confidence)
        self._dataset = dataset
        self._listeners: list[Any] = []
        self.threads = threads
        self.progress = progress
        start = {n: 0.5 for n in self._sources} if weights is None else dict(weights)
        unknown = [n for n in start if n not in self._sources]
        missing = [n for n in self._sources if n not in start]
        if unknown or missing:
            raise ConfigError(f"weights: unknown source(s) {unknown}, missing source(s) {missing}; sources are {list(self._sources)}")
        for n, v in start.items():
            check_number(v, f"weights.{n}:", low=0, high=1, expected="a number in [0, 1] (slider range)")
        if not any(float(v) > 0 for v in start.values()):
            raise ConfigError("weights: at least one starting weight must be positive")

        self.users_ = self._pick_users(users, sample_size, seed)
        self._engines: dict[str, Any] = {}
        self._columns = [f"{m}@{k}" for m in self.metrics for k in self.ks]
        self._weights = {n: float(v) for n, v in start.items()}
        self._in_sync = False  # whether the engine's current weights equal self._weights
        self._muted = False  # set while set_weights moves several sliders
        self._templates: dict[tuple, dict] = {}

        engine = self._engine(self.normalizer)
        engine.evaluate(self._weights)
        self._in_sync = True
        self._baseline_frame, self.baseline_name_ = self._resolve_baseline(baseline, engine)
        self._original_baseline = (self._baseline_frame, self.baseline_name_)
        self.pinned_weights_: dict[str, float] | None = None
        self.pinned_normalizer_: str | None = None

        # -- controls -------------------------------------------------------------------------
        self.sliders = {
            name: w.FloatSlider(
                value=self._weights[name], min=0.0, max=1.0, step=0.01, description=name,
                continuous_update=False, readout_format=".2f", style={"description_width": "initial"},
            )
            for name in self._sources
        }  # fmt: skip
        for name, slider in self.sliders.items():
            slider.observe(self._on_slider(name), names="value")
        self.normalizer_menu = w.Dropdown(options=list(NORMALIZERS), value=self.normalizer, description="normalizer")
        self.normalizer_menu.observe(self._on_normalizer, names="value")
        self.k_menu = w.Dropdown(options=list(self.ks), value=self.ks[0], description="K")
        self.k_menu.observe(lambda _change: self._redraw(), names="value")
        self.path_box = w.Text(value=str(export_path), description="blend file", layout=w.Layout(width="420px"))
        self.export_button = w.Button(description="Export blend file", icon="download", button_style="primary")
        self.export_button.on_click(lambda _b: self._export_clicked())
        self.bundle_button = w.Button(description="Export bundle", icon="archive", tooltip="blend file + learned artifacts, for xrec serve")
        self.bundle_button.on_click(lambda _b: self._export_clicked(bundle=True))
        self.pin_button = w.Button(description="Pin as baseline", icon="thumb-tack")
        self.pin_button.on_click(lambda _b: self.pin_baseline())
        self.unpin_button = w.Button(description="Unpin", icon="undo", tooltip="back to the original baseline")
        self.unpin_button.on_click(lambda _b: self.unpin_baseline())
        self.status = w.HTML()
        self.output = w.Output()
        self.output.add_class("xrec-mixer-chart")  # DOM hook for browser tests and page styling
        header = w.HTML(
            f"<b>Weight mixer</b>: {len(self.users_)} users"
            f"{' (stratified sample)' if len(self.users_) < len(fold.eval_users) else ''}, "
            f"{fold.n_items} items, normal {self.confidence:.0%} intervals over users"
        )
        self.widget = w.VBox(
            [
                header,
                w.HBox([w.VBox(list(self.sliders.values())), w.VBox([self.normalizer_menu, self.k_menu, w.HBox([self.pin_button, self.unpin_button])])]),
                self.output,
                w.HBox([self.path_box, self.export_button, self.bundle_button]),
                self.status,
            ]
        )
        self.updates_ = 0
        self.last_seconds_ = 0.0
        self._redraw()

    # ------------------------------------------------------------------ setup helpers
    def _pick_users(self, users: np.ndarray | None, sample_size: int, seed: int) -> np.ndarray:
        from xrec.blend.engine import sample_users

        if users is not None:
            users = np.unique(np.asarray(users, dtype=np.int64))
            if users.size == 0:
                raise DataError("users is empty")
            return users
        return sample_users(self._fold, n=sample_size, seed=seed).users

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

    def _resolve_baseline(self, baseline: Any, engine: Any) -> tuple[pd.DataFrame, str]:
        from xrec.evaluate.scorecard import Scorecard

        if baseline is None:
            return self._current_per_user(), "start blend"
        if isinstance(baseline, str):
            if baseline not in self._sources:
                raise ConfigError(f"baseline {baseline!r} is not a source; sources are {list(self._sources)}")
            alone = {n: (1.0 if n == baseline else 0.0) for n in self._sources}
            frame = engine.per_user(alone)[["user", *self._columns]].reset_index(drop=True)
            engine.evaluate(self._weights)  # back to the mixer's weights
            return frame, baseline
        if isinstance(baseline, Scorecard):
            missing = [c for c in self._columns if c not in baseline.per_user.columns]
            if missing:
                raise ConfigError(f"baseline scorecard {baseline.name!r} lacks metric(s) {missing}; evaluate it with ks={list(self.ks)}")
            indexed = baseline.per_user.set_index("user")
            absent = np.setdiff1d(self.users_, indexed.index.to_numpy())
            if absent.size:
                raise DataError(
                    f"baseline scorecard {baseline.name!r} does not cover {absent.size} of the mixer's users "
                    f"(first {absent[:5].tolist()}); evaluate it on the same fold's evaluation users"
                )
            frame = indexed.loc[self.users_, self._columns].reset_index()
            return frame, str(baseline.name)
        raise ConfigError(f"baseline must be a Scorecard, a source name or None, got {type(baseline).__name__}")

    # ------------------------------------------------------------------ state
    @property
    def weights(self) -> dict[str, float]:
        """Current weight per source (the slider values)."""
        return dict(self._weights)

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

    def on_change(self, callback: Any) -> None:
        """Call ``callback(mixer)`` after every successful redraw.

        A redraw follows a slider move, a normalizer or K switch, :meth:`set_weights`,
        :meth:`pin_baseline` and :meth:`unpin_baseline`; moves that leave nothing to draw (all
        weights zero, an engine error) call nobody. Callbacks run in the order registered; one
        that raises is reported in the status line and the others still run.
        """
        if not callable(callback):
            raise ConfigError(f"on_change needs a callable, got {type(callback).__name__}")
        self._listeners.append(callback)

    def _notify(self) -> None:
        for callback in list(self._listeners):
            try:
                callback(self)
            except Exception as exc:  # a listener's bug must not break the mixer
                name = getattr(callback, "__qualname__", repr(callback))
                self._say(f"on_change callback {name} failed: {type(exc).__name__}: {exc}", error=True)

    def _current_per_user(self) -> pd.DataFrame:
        engine = self._engines[self.normalizer]
        return engine.per_user()[["user", *self._columns]].reset_index(drop=True)

    def per_user(self) -> pd.DataFrame:
        """Per-user metrics of the current blend: ``user`` then one column per ``"metric@K"``."""
        return self._current_per_user()

    def scorecard(self, name: str = "mixer blend") -> Any:
        """The current blend's :class:`~xrec.evaluate.Scorecard` on the mixer's users (rank metrics)."""
        from xrec.evaluate.scorecard import Scorecard

        return Scorecard(
            name=name,
            per_user=self._current_per_user(),
            ks=self.ks,
            protocol={"kind": "full_ranking"},
            fold_settings=dict(self._fold.settings),
            n_items=self._fold.n_items,
        )

    def values(self) -> dict[str, float]:
        """Mean of every computed metric for the current weights, over the mixer's users."""
        frame = self._current_per_user()
        return {c: float(frame[c].mean()) for c in self._columns}

    def blend(self) -> Any:
        """The current weights and normalizer as a fitted :class:`~xrec.blend.Blend`."""
        from xrec.blend import Blend

        return Blend(self._sources, self._weights, self.normalizer).fit(self._fold)

    # ------------------------------------------------------------------ updates
    def _update_engine(self, changed: str | None) -> None:
        engine = self._engine(self.normalizer)
        value = self._weights.get(changed) if changed else None
        if changed is not None and self._in_sync and engine.weights_ is not None:
            before = dict(engine.weights_)
            before[changed] = value
            # One weight moved from a state the engine holds: add Δw × block. A weight set to 0
            # is recomputed in full so the source leaves the sum exactly, as in Blend.score.
            if before == self._weights and value > 0:
                engine.set_weight(changed, value)
                return
        engine.evaluate(self._weights)

    def _refresh(self, changed: str | None) -> None:
        started = time.perf_counter()
        if not any(v > 0 for v in self._weights.values()):
            self._in_sync = False
            self._say("All weights are 0: raise one slider (the chart shows the last valid blend).", error=True)
            return
        try:
            self._update_engine(changed)
        except XrecError as exc:
            self._in_sync = False
            self._say(str(exc), error=True)
            return
        self._in_sync = True
        self._redraw()
        self.last_seconds_ = time.perf_counter() - started

    def _on_slider(self, name: str):
        def handler(change: dict) -> None:
            if self._muted:
                return
            self._weights[name] = float(change["new"])
            self._refresh(name)

        return handler

    def _on_normalizer(self, change: dict) -> None:
        self.normalizer = change["new"]
        if self.normalizer not in self._engines:
            self._say(f"Preparing normalizer {self.normalizer!r} (scoring every source once)...")
        self._in_sync = False
        self._refresh(None)

    def set_weights(self, weights: Mapping[str, float]) -> None:
        """Move several sliders at once (one re-evaluation)."""
        unknown = [n for n in weights if n not in self._sources]
        if unknown:
            raise ConfigError(f"weights: {unknown} are not sources; sources are {list(self._sources)}")
        for name, value in weights.items():
            check_number(value, f"weights.{name}:", low=0, high=1, expected="a number in [0, 1]")
        self._weights.update({n: float(v) for n, v in weights.items()})
        self._muted = True
        try:
            for name, value in weights.items():
                self.sliders[name].value = float(value)
        finally:
            self._muted = False
        self._in_sync = False
        self._refresh(None)

    def pin_baseline(self) -> None:
        """Make the current blend the baseline the chart compares against (:meth:`unpin_baseline` undoes it)."""
        self._baseline_frame = self._current_per_user()
        self.baseline_name_ = "pinned blend"
        self.pinned_weights_ = dict(self._weights)
        self.pinned_normalizer_ = self.normalizer
        self._redraw()

    def unpin_baseline(self) -> None:
        """Go back to the baseline the mixer was built with."""
        self._baseline_frame, self.baseline_name_ = self._original_baseline
        self.pinned_weights_ = None
        self.pinned_normalizer_ = None
        self._redraw()

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
        summary, diffs = self._frames()
        self.chart_data_ = summary
        self.difference_data_ = diffs
        self.chart_spec_ = filled_spec(self._template(), summary, diffs, self.baseline_name_)
        self.output.outputs = (chart_output(self.chart_spec_),)
        self.updates_ += 1
        w = ", ".join(f"{n} {v:.2f}" for n, v in self._weights.items())
        self._say(f"weights: {html.escape(w)} · normalizer {html.escape(self.normalizer)}")
        self._notify()

    def _say(self, text: str, *, error: bool = False) -> None:
        color = "#b00020" if error else "#555"
        self.status.value = f'<span style="color:{color}">{text if not error else html.escape(text)}</span>'

    # ------------------------------------------------------------------ export
    def export(self, path: str | os.PathLike | None = None, *, bundle: bool = False) -> Path:
        """Write the current blend as a blend file (default: the path box) and return its path.

        The evidence table records the mixer's users, metrics and baseline. With ``bundle``,
        write a bundle folder instead (:func:`xrec.bundle.save_bundle`: the blend file plus
        every learned artifact), named as the path without its ``.toml`` suffix.
        """
        from xrec.blendfile import save_blend
        from xrec.bundle import save_bundle

        if self._dataset is None:
            raise ConfigError("export needs the dataset the fold was split from: WeightMixer(..., dataset=dataset)")
        if not any(v > 0 for v in self._weights.values()):
            raise ConfigError("weights: all weights are zero; raise one slider before exporting")
        path = Path(self.path_box.value if path is None else path).expanduser()
        current = self.values()
        base = self._baseline_frame
        evidence = {
            "chosen_with": "xrec weight mixer",
            "users": int(len(self.users_)),
            "sampled": bool(len(self.users_) < len(self._fold.eval_users)),
            "metrics": current,
            "baseline": self.baseline_name_,
            "baseline_metrics": {c: float(base[c].mean()) for c in self._columns},
        }
        if bundle:
            path = path.with_suffix("") if path.suffix == ".toml" else path
        save = save_bundle if bundle else save_blend
        return save(path, self.blend(), dataset=self._dataset, split_settings=self._fold.settings, evidence=evidence)

    def _export_clicked(self, *, bundle: bool = False) -> None:
        try:
            written = self.export(bundle=bundle)
        except (XrecError, OSError) as exc:
            self._say(f"export failed: {exc}", error=True)
            return
        self._say(f"wrote {html.escape(str(written))}")

    # ------------------------------------------------------------------ display
    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        return self.widget._repr_mimebundle_(**kwargs)

    def __repr__(self) -> str:
        w = ", ".join(f"{n}={v:.2f}" for n, v in self._weights.items())
        return f"WeightMixer({w}; normalizer={self.normalizer!r}, {len(self.users_)} users)"
