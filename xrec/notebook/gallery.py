"""See what a blend recommends: one user's history and two top-K lists as thumbnails.

:class:`Gallery` shows, for one user, the items they interacted with in training, the items
held out, and the top-K of a baseline and of the current blend side by side. Held-out hits,
the items the blend added or dropped against the baseline and new items are marked; under
each recommended item a small bar per source shows its weighted contribution (weight ×
normalized score, the same normalization :class:`~xrec.blend.Blend` uses; the bars add up
to the item's score). :meth:`Gallery.follow` makes it redraw after every move of a
:class:`~xrec.notebook.WeightMixer`. :func:`report_gallery` renders a few users chosen by a
stated rule as self-contained HTML for a report page.

Only the shown user is scored (each source once per user and normalizer, then kept), so a
slider move costs a weighted sum over one row and a few HTML tiles.
"""

from __future__ import annotations

import html
import re
import threading
import time
from collections.abc import Mapping
from typing import Any, Self

import numpy as np

from xrec._validation import check_int
from xrec.errors import ConfigError, DataError, XrecError
from xrec.fold import Fold
from xrec.notebook._gallery_html import PanelStyle, view_html
from xrec.notebook._gallery_pick import PICKS, REPORT_RULE, choose_report_users, find_user, pick_by_outcome, segment_groups
from xrec.notebook._gallery_rank import RowCache, UserView, user_view
from xrec.notebook._still import StillPicture
from xrec.notebook.thumbnails import source_colors

__all__ = ["Gallery", "choose_report_users", "report_gallery"]

_BY_ID = "user id"


class Gallery:
    """Thumbnails of one user's history and of the baseline's and the blend's top-K, side by side.

    Parameters
    ----------
    sources
        Name -> source fitted on ``fold.train``.
    fold
        The fold whose training rows are the history and whose held-out rows are the hits.
    dataset
        The dataset the fold was split from; its catalog's images and names are drawn
        (default: the fold's catalog). Its item ids must be the fold's.
    baseline
        What the blend is compared with: the name of one of ``sources`` (that source alone),
        a weight mapping over ``sources``, any fitted scorer with ``score(users)`` (a
        :class:`~xrec.blend.Blend` also shows its contributions), or ``None`` to keep the
        starting weights and normalizer.
    weights
        Weight per source (default 0.5 each); at least one positive.
    normalizer
        ``"none"``, ``"minmax"``, ``"zscore"`` or ``"rank"``, for every source.
    k
        Length of the top-K lists.
    user
        External id of the first user shown; default a user picked by ``pick``.
    pick
        How the first user is picked when ``user`` is not given: ``"random"``, ``"a hit"``,
        ``"a miss"`` or a segment label from :attr:`segments`.
    seed
        Seed of every random pick (each pick draws from the same generator).
    history
        Most recent training items shown.
    size
        Side of the top-K thumbnails in pixels (history thumbnails are two thirds of it).

    Attributes
    ----------
    user_
        Index of the user shown (position in ``fold.user_ids``).
    view_
        The :class:`~xrec.notebook._gallery_rank.UserView` drawn last (item positions, scores,
        contributions, added / dropped items).
    revision_
        Number of redraws so far; the panel's root element carries it as ``data-revision``.
    last_seconds_
        Seconds the last redraw took (scoring, top-K, HTML).
    segments
        Picker label -> evaluated users (held-out item new / tail / head, history length).
    new_items
        Boolean per catalog item: no training interaction in ``fold`` (marked "new item").

    Notes
    -----
    Lists hold unseen items only, best first; tied scores are ordered by catalog position.
    The evaluator counts a tie against the held-out item, so with tied scores (popularity,
    say) a held-out item can appear in a list while the metric counts it as a miss.

    Examples
    --------
    >>> gallery = Gallery(valid_sources, valid, dataset=dataset, baseline="als")  # doctest: +SKIP
    >>> gallery.follow(mixer)                                                      # doctest: +SKIP
    >>> gallery                                                                    # doctest: +SKIP
    """

    def __init__(
        self,
        sources: Mapping[str, Any],
        fold: Fold,
        *,
        dataset: Any = None,
        baseline: Any = None,
        weights: Mapping[str, float] | None = None,
        normalizer: str = "zscore",
        k: int = 10,
        user: Any = None,
        pick: str = "random",
        seed: int = 0,
        history: int = 12,
        size: int = 72,
    ) -> None:
        from xrec.blend import Blend
        from xrec.blend.normalize import check_normalizer

        if not isinstance(fold, Fold):
            raise ConfigError(f"fold must be an xrec Fold, got {type(fold).__name__}")
        normalizer = check_normalizer(normalizer, "normalizer")
        if weights is None:
            weights = {n: 0.5 for n in sources} if isinstance(sources, Mapping) else {}
        # A Blend checks the sources, the weights and the normalizer exactly as the blend shown will.
        checked = Blend(sources, weights, normalizer)
        self.sources = checked.sources
        unfitted = [n for n, s in self.sources.items() if not getattr(s, "fitted_", False)]
        if unfitted:
            raise ConfigError(f"sources {unfitted} are not fitted: fit them on the fold's training rows first")
        self.fold = fold
        self.catalog = fold.catalog if dataset is None else dataset.catalog
        if not np.array_equal(self.catalog.item_ids, fold.catalog.item_ids):
            raise DataError("dataset: its catalog's items differ from the fold's; pass the dataset the fold was split from")
        self.weights = checked.weights
        self.normalizer = normalizer
        self.k = check_int(k, "k", low=1)
        self.style = PanelStyle(
            size=check_int(size, "size", low=16, high=512),
            history_size=max(16, round(size * 2 / 3)),
            history_max=check_int(history, "history", low=0),
        )
        self.colors = source_colors(list(self.sources))
        self._own_baseline = self._resolve_baseline(baseline)
        self._baseline = self._own_baseline
        self._cache = RowCache(self.sources, fold)
        self.new_items = fold.item_train_counts == 0
        self._rng = np.random.default_rng(check_int(seed, "seed", low=0))
        self.segments = segment_groups(fold)
        # Held while the shown state changes: a followed mixer calls back on its update thread
        # while the picker's handlers run on the kernel's main thread.
        self._lock = threading.RLock()
        self.revision_ = 0
        self.last_seconds_ = 0.0
        self._note = ""
        self._widget: Any = None
        self._picture = StillPicture(lambda: self.static_html_, lambda: repr(self))
        self._muted = False  # set while the user box is filled from code
        self._html = ""
        if user is not None:
            self.user_ = find_user(fold, user)
            self._note = "chosen by id"
        else:
            self.user_ = self._pick_index(pick)
        self._redraw()

    # ------------------------------------------------------------------ state
    def _resolve_baseline(self, baseline: Any) -> tuple[str, Any, str | None]:
        """``(label, weights mapping or scorer, normalizer or None = follow the blend's)``."""
        from xrec.blend.blend import check_weights

        if baseline is None:
            return "start blend", dict(self.weights), self.normalizer
        if isinstance(baseline, str):
            if baseline not in self.sources:
                raise ConfigError(f"baseline {baseline!r} is not a source; sources are {list(self.sources)}")
            return baseline, {n: (1.0 if n == baseline else 0.0) for n in self.sources}, None
        if isinstance(baseline, Mapping):
            return "baseline blend", check_weights(baseline, self.sources), self.normalizer
        if callable(getattr(baseline, "score", None)):
            if callable(getattr(baseline, "fit", None)) and not getattr(baseline, "fitted_", False):
                raise ConfigError("baseline is not fitted: fit it on the fold's training rows first")
            return str(getattr(baseline, "name", None) or type(baseline).__name__), baseline, None
        raise ConfigError(f"baseline must be a source name, a weight mapping, a fitted scorer or None, got {type(baseline).__name__}")

    @property
    def baseline_name(self) -> str:
        """Label of the baseline shown."""
        return self._baseline[0]

    @property
    def user_id(self) -> Any:
        """External id of the user shown."""
        return self.fold.user_ids[self.user_]

    def view(self, user: int | None = None) -> UserView:
        """What the panel shows for user index ``user`` (default the current user), with the current settings."""
        _, base, base_norm = self._baseline
        return user_view(self._cache, self.user_ if user is None else int(user), self.weights, self.normalizer, self.k, base, base_norm)

    # ------------------------------------------------------------------ picking
    def _pick_index(self, how: str) -> int:
        users = self.fold.eval_users
        if len(users) == 0:
            raise DataError("the fold has no user with a held-out interaction to pick from")
        if how == "random":
            self._note = "picked at random"
            return int(self._rng.choice(users))
        if how in ("a hit", "a miss"):
            found = pick_by_outcome(self._cache, self.weights, self.normalizer, self.k, hit=how == "a hit", rng=self._rng)
            if found is None:
                raise DataError(f"no user is {how} for the blend at K={self.k}")
            self._note = f"{how} for the blend at K={self.k}"
            return found
        if how in self.segments:
            self._note = how
            return int(self._rng.choice(self.segments[how]))
        raise ConfigError(f"pick must be one of {[*PICKS, *self.segments]}, got {how!r}")

    def pick(self, how: str = "random") -> Self:
        """Show another user: ``"random"``, ``"a hit"`` / ``"a miss"`` (for the blend at the current K),
        or a segment label from :attr:`segments`; returns ``self``."""
        with self._lock:
            self.user_ = self._pick_index(how)
            self._redraw()
        self._refresh_picture()
        return self

    # ------------------------------------------------------------------ drawing
    def show(
        self,
        user: Any = None,
        *,
        weights: Mapping[str, float] | None = None,
        normalizer: str | None = None,
        k: int | None = None,
    ) -> Self:
        """Redraw with another user (external id) and/or other settings; returns ``self``.

        ``weights`` may name only the sources that change.
        """
        with self._lock:
            self._show(user, weights, normalizer, k)
        self._refresh_picture()
        return self

    def _show(self, user: Any, weights: Mapping[str, float] | None, normalizer: str | None, k: int | None) -> None:
        from xrec.blend.blend import check_weights
        from xrec.blend.normalize import check_normalizer

        if weights is not None:
            unknown = [n for n in weights if n not in self.sources]
            if unknown:
                raise ConfigError(f"weights: {unknown} are not sources; sources are {list(self.sources)}")
            new_weights = check_weights({**self.weights, **weights}, self.sources)
        else:
            new_weights = self.weights
        new_norm = self.normalizer if normalizer is None else check_normalizer(normalizer, "normalizer")
        new_k = self.k if k is None else check_int(k, "k", low=1)
        new_user = self.user_ if user is None else find_user(self.fold, user)
        self.weights, self.normalizer, self.k = new_weights, new_norm, new_k
        if new_user != self.user_:
            self.user_, self._note = new_user, "chosen by id"
        self._redraw()

    def html(self) -> str:
        """The panel last drawn, as HTML (``<div class="xrec-gallery" data-revision=...>``)."""
        return self._html

    def _redraw(self) -> None:
        started = time.perf_counter()
        view = self.view()
        self.view_ = view
        self.revision_ += 1
        label, _, base_norm = self._baseline
        self._html = view_html(
            view, self.catalog, weights=self.weights, normalizer=self.normalizer, colors=self.colors,
            baseline_name=label if base_norm is None or base_norm == self.normalizer else f"{label} ({base_norm})",
            new_items=self.new_items, revision=self.revision_, note=self._note, style=self.style,
        )  # fmt: skip
        if self._widget is not None:
            self._panel.value = self._html
        self.last_seconds_ = time.perf_counter() - started

    # ------------------------------------------------------------------ following a mixer
    def follow(self, mixer: Any) -> Self:
        """Redraw after every redraw of ``mixer`` (a :class:`~xrec.notebook.WeightMixer`); returns ``self``.

        The gallery takes the mixer's weights, normalizer and K, and its baseline when that
        is a pinned blend or one of the sources; with any other mixer baseline (a scorecard,
        the start blend) the gallery keeps its own. The mixer calls back after its chart is
        redrawn, so the gallery moves at the chart's pace. The sources must have the same names.
        """
        if not callable(getattr(mixer, "on_change", None)):
            raise ConfigError(f"follow needs a WeightMixer with on_change(callback), got {type(mixer).__name__}")
        if list(mixer.sources) != list(self.sources):
            raise ConfigError(f"the mixer's sources {list(mixer.sources)} are not the gallery's {list(self.sources)}")
        if mixer.fold is not self.fold:
            raise ConfigError("the mixer works on another fold; build the gallery on the mixer's fold")
        mixer.on_change(self._on_mixer)
        self._on_mixer(mixer)
        return self

    def _on_mixer(self, mixer: Any) -> None:
        pinned = getattr(mixer, "pinned_weights_", None)
        with self._lock:
            if pinned:
                self._baseline = ("pinned blend", dict(pinned), getattr(mixer, "pinned_normalizer_", None) or mixer.normalizer)
            elif mixer.baseline_name_ in self.sources:
                self._baseline = self._resolve_baseline(mixer.baseline_name_)
            else:
                self._baseline = self._own_baseline
            try:
                self._show(None, mixer.weights, mixer.normalizer, mixer.k)
            except XrecError as exc:
                self._say(str(exc))

    # ------------------------------------------------------------------ widget
    @property
    def widget(self) -> Any:
        """The panel as ipywidgets: a picker row (how to choose the user, a user id box, a button) over the gallery."""
        if self._widget is None:
            self._widget = self._build_widget()
        return self._widget

    def _build_widget(self) -> Any:
        import ipywidgets as w

        self.picker = w.Dropdown(options=[_BY_ID, *PICKS, *self.segments], value="random", description="user")
        # Sent when Enter is pressed or the box loses focus, not on every key.
        self.user_box = w.Text(value=str(self.user_id), placeholder="a user id", continuous_update=False, layout=w.Layout(width="160px"))
        self.next_button = w.Button(description="Show", icon="refresh", tooltip="show a user chosen as the menu says")
        self.status = w.HTML()
        self._panel = w.HTML(value=self._html)
        self.next_button.on_click(lambda _b: self._clicked())
        self.user_box.observe(lambda _change: self._muted or self._clicked(by_id=True), names="value")
        self.picker.observe(lambda change: change["new"] != _BY_ID and self._clicked(), names="value")
        box = w.VBox([w.HBox([self.picker, self.user_box, self.next_button]), self.status, self._panel])
        box.add_class("xrec-gallery-panel")
        return box

    def _clicked(self, *, by_id: bool = False) -> None:
        try:
            if by_id or self.picker.value == _BY_ID:
                self.show(self.user_box.value)
            else:
                self.pick(self.picker.value)
        except XrecError as exc:
            self._say(str(exc))
            return
        self._muted = True
        try:
            self.user_box.value = str(self.user_id)
        finally:
            self._muted = False
        self._say("")

    def _say(self, text: str) -> None:
        if self._widget is not None:
            self.status.value = f'<span style="color:#b00020">{html.escape(text)}</span>' if text else ""

    @property
    def static_html_(self) -> str:
        """The last panel as a still picture (no ``data-revision``: it does not follow the mixer)."""
        with self._lock:
            panel = re.sub(r' data-revision="\d+"', "", self._html, count=1)
        return (
            '<div class="xrec-gallery-static"><small style="color:#666">A still picture of the gallery\'s last '
            f"state, kept in the notebook: run the cell again to pick users and follow the mixer.</small>{panel}</div>"
        )

    def _ipython_display_(self) -> None:
        """Show the live panel, then a still picture that front ends without the widget show instead."""
        self._picture.show(self.widget)

    def _refresh_picture(self) -> None:
        # From code run in a cell (show, pick) the front end routes the update to the picture's
        # cell at once; redraws that follow moves made in the page refresh it once they pause.
        # Before the gallery is shown, both do nothing.
        if threading.current_thread() is threading.main_thread():
            self._picture.refresh()
        else:
            self._picture.refresh_later()

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        try:
            bundle = dict(self.widget._repr_mimebundle_(**kwargs))
        except ImportError:  # no ipywidgets: the still panel
            bundle = {"text/plain": repr(self)}
        bundle["text/html"] = self.static_html_  # for front ends without a widget manager
        return bundle

    def __repr__(self) -> str:
        return f"Gallery(user={self.user_id!r}, k={self.k}, baseline={self.baseline_name!r}, normalizer={self.normalizer!r})"

    # ------------------------------------------------------------------ report
    def report_html(self, blend_card: Any = None, baseline_card: Any = None, **rule: Any) -> str:
        """:func:`report_gallery` of this gallery's current settings."""
        return report_gallery(self, blend_card, baseline_card, **rule)

    def scorers(self) -> tuple[Any, Any]:
        """The current blend and the baseline as fitted scorers (for :func:`xrec.evaluate.evaluate`)."""
        from xrec.blend import Blend

        blend = Blend(self.sources, self.weights, self.normalizer).fit(self.fold)
        _, base, base_norm = self._baseline
        if isinstance(base, Mapping):
            base = Blend(self.sources, base, base_norm or self.normalizer).fit(self.fold)
        return blend, base


def report_gallery(
    gallery: Gallery,
    blend_card: Any = None,
    baseline_card: Any = None,
    *,
    metric: str | None = None,
    wins: int = 2,
    losses: int = 2,
    new: int = 2,
) -> str:
    """A few users' gallery panels as self-contained HTML (thumbnails embedded, no script).

    Users are chosen by :func:`choose_report_users` (the rule is written above the panels):
    the biggest per-user wins and losses of the blend over the baseline in ``metric`` and
    new-item cases, ties broken by user id.

    Parameters
    ----------
    gallery
        Its sources, fold, blend settings and baseline are drawn.
    blend_card, baseline_card
        Scorecards of the gallery's blend and baseline on its fold; evaluated here when not given
        (full ranking, the gallery's K).
    metric
        Per-user column the rule compares; default ``"ndcg@K"`` with the gallery's K.
    wins, losses, new
        Users of each kind.

    Returns
    -------
    str
        One ``<div class="xrec-gallery-report">`` (pass it to :func:`~xrec.notebook.charts_to_html` as a section).
    """
    metric = f"ndcg@{gallery.k}" if metric is None else metric
    if blend_card is None or baseline_card is None:
        from xrec.evaluate import evaluate

        blend, base = gallery.scorers()
        _, k = metric.rsplit("@", 1) if "@" in metric else (metric, str(gallery.k))
        ks = tuple(sorted({gallery.k, int(k)}))
        blend_card = blend_card or evaluate(blend, gallery.fold, ks=ks, name="blend")
        baseline_card = baseline_card or evaluate(base, gallery.fold, ks=ks, name=gallery.baseline_name)
    chosen = choose_report_users(gallery.fold, blend_card, baseline_card, metric=metric, wins=wins, losses=losses, new=new)
    rule = REPORT_RULE.format(wins=wins, losses=losses, new=new, metric=metric)
    weights = ", ".join(f"{n} {w:.2f}" for n, w in gallery.weights.items())
    panels = []
    for row in chosen.itertuples(index=False):
        view = gallery.view(int(row.user))
        note = f"{row.reason}: {metric} {row.baseline:.3f} → {row.blend:.3f} ({row.difference:+.3f})"
        panels.append(
            view_html(view, gallery.catalog, weights=gallery.weights, normalizer=gallery.normalizer, colors=gallery.colors,
                      baseline_name=gallery.baseline_name, new_items=gallery.new_items, note=note, style=gallery.style)
        )  # fmt: skip
    intro = (
        f"<p>Blend ({html.escape(weights)}; {html.escape(gallery.normalizer)}) against {html.escape(gallery.baseline_name)}, "
        f"top {gallery.k} per user. Users shown: {html.escape(rule)}. Under each recommended item, one bar per source is its "
        "weight × normalized score (they add up to the score); a green frame marks a held-out item.</p>"
    )
    if not panels:
        panels.append("<p>No user qualifies under this rule.</p>")
    sep = '<hr style="border:none;border-top:1px solid #ddd;margin:14px 0">'
    return f'<div class="xrec-gallery-report">{intro}{sep.join(panels)}</div>'
