"""Popularity-gated blends: one weight vector per item popularity band.

Collaborative sources know popular items well and new items not at all, while content
sources (image, text, attributes) score every item alike. A single weight vector has to
compromise; a gated blend picks the weights by the *item's* training popularity:

    score(u, i) = Σ_s w[s, band(i)] · normalize_s(u, i)

with three bands computed from training interaction counts:

``"new"``
    items with no training interaction;
``"head"``
    the most popular items, which together hold ``head_share`` of the training
    interactions (items tied with the last one are included, so the band is
    ``count >= head_min``); 20 % by default (common practice, no source);
``"tail"``
    everything else.

The band rule is stored as the single count ``head_min``, so a blend file reproduces the
bands exactly from the same training rows. Weights of all bands × sources are learned
jointly by coordinate ascent on the validation metric (:func:`learn_gated_weights`),
starting from the best ungated blend, so the gated blend never scores below it on the
validation users.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Self

import numpy as np
import pandas as pd

from xrec._validation import check_int, check_number
from xrec.blend._base import check_sources
from xrec.blend._sides import OBJECTIVES, SideObjective, check_objective
from xrec.blend._search import DEFAULT_GRID, LearnResult, Tracker, ascend, coordinate_ascent, simplex
from xrec.blend.blend import Blend, check_normalizers, check_one_per_source, check_weight
from xrec.errors import ConfigError
from xrec.fold import Fold

__all__ = ["BANDS", "OBJECTIVES", "GatedBlend", "PopularityBands", "band_provenance", "band_weights_text", "learn_gated_weights"]

#: Band names, in order of their index in :meth:`PopularityBands.assign`.
BANDS: tuple[str, ...] = ("new", "tail", "head")


@dataclass(frozen=True)
class PopularityBands:
    """Item popularity bands from training counts: new (0), tail, head (``count >= head_min``).

    Parameters
    ----------
    head_min
        Fewest training interactions of a head item (>= 1).
    """

    head_min: int

    def __post_init__(self) -> None:
        check_int(self.head_min, "head_min:", low=1, expected="an integer >= 1")

    @classmethod
    def from_counts(cls, counts: np.ndarray, head_share: float = 0.2) -> PopularityBands:
        """Bands whose head holds ``head_share`` of the interactions (ties at the edge included).

        Parameters
        ----------
        counts
            Training interactions per item.
        head_share
            Share of all training interactions held by the head items, in ``(0, 1]``.
        """
        check_number(head_share, "head_share:", low=0, low_open=True, high=1, expected="a number in (0, 1]")
        counts = np.sort(np.asarray(counts, dtype=np.int64))[::-1]
        total = int(counts.sum())
        if total == 0:
            return cls(1)
        k = int(np.searchsorted(np.cumsum(counts), head_share * total, side="left"))
        return cls(max(1, int(counts[min(k, len(counts) - 1)])))

    def assign(self, counts: np.ndarray) -> np.ndarray:
        """Band index of each item (0 = new, 1 = tail, 2 = head), int64."""
        counts = np.asarray(counts)
        return np.where(counts <= 0, 0, np.where(counts >= self.head_min, 2, 1)).astype(np.int64)

    def describe(self, counts: np.ndarray) -> pd.DataFrame:
        """Items and training interactions per band."""
        counts = np.asarray(counts, dtype=np.int64)
        band = self.assign(counts)
        return pd.DataFrame(
            {
                "items": np.bincount(band, minlength=3),
                "interactions": np.bincount(band, weights=counts, minlength=3).astype(np.int64),
            },
            index=pd.Index(BANDS, name="band"),
        )


def check_band_weights(band_weights: Mapping[str, Mapping[str, object]], sources: Mapping[str, Any]) -> dict[str, dict[str, float]]:
    """``{band: {source: weight}}`` complete for every band and source, non-negative, some positive."""
    if not isinstance(band_weights, Mapping):
        raise ConfigError(f"band_weights: give a mapping band -> (source -> weight), got {type(band_weights).__name__}")
    unknown = [b for b in band_weights if b not in BANDS]
    if unknown:
        raise ConfigError(f"band_weights: unknown band(s) {unknown}; bands are {list(BANDS)}")
    missing = [b for b in BANDS if b not in band_weights]
    if missing:
        raise ConfigError(f"band_weights: no weights for band(s) {missing}")
    out: dict[str, dict[str, float]] = {}
    for band in BANDS:
        table = band_weights[band]
        if not isinstance(table, Mapping):
            raise ConfigError(f"band_weights.{band}: give a mapping source -> weight, got {type(table).__name__}")
        check_one_per_source(table, sources, f"band_weights.{band}", "weight", hint=" (give 0 to leave a source out)")
        out[band] = {n: check_weight(table[n], f"band_weights.{band}.{n}") for n in sources}
    if not any(w > 0 for table in out.values() for w in table.values()):
        raise ConfigError("band_weights: all weights are zero; at least one needs to be positive")
    return out


class GatedBlend(Blend):
    """A blend whose source weights depend on the item's popularity band.

    ``score(u, i) = Σ_s band_weights[band(i)][s] · normalize_s(u, i)``; bands come from
    the training counts of the fold it is fitted on (see :class:`PopularityBands`).

    Parameters
    ----------
    sources
        Name -> source (fitted or not, as for :class:`~xrec.blend.Blend`).
    band_weights
        ``{"new": {...}, "tail": {...}, "head": {...}}``, each a weight >= 0 per source.
    normalizers
        As for :class:`~xrec.blend.Blend`.
    head_min
        Fixed head edge (training count); ``None`` derives it from ``head_share`` at fit.
    head_share
        Share of the training interactions the head items hold, when ``head_min`` is ``None``.

    Attributes
    ----------
    bands_
        The :class:`PopularityBands` used.
    item_band_
        Band index (0 new, 1 tail, 2 head) of every item.
    """

    method = "gated"

    def __init__(
        self,
        sources: Mapping[str, Any],
        band_weights: Mapping[str, Mapping[str, float]],
        normalizers: str | Mapping[str, str] = "zscore",
        *,
        head_min: int | None = None,
        head_share: float = 0.2,
    ) -> None:
        self.sources = check_sources(sources)
        self.band_weights = check_band_weights(band_weights, self.sources)
        self.normalizers = check_normalizers(normalizers, self.sources)
        self.head_min = head_min
        self.head_share = head_share
        # Largest weight per source: what code written for plain blends reads.
        self.weights = {n: max(self.band_weights[b][n] for b in BANDS) for n in self.sources}

    def fit(self, fold: Fold, *, progress: bool = False) -> Self:
        """Fit the sources (see ``Blend.fit``) and assign every item its band; returns ``self``."""
        super().fit(fold, progress=progress)
        counts = fold.item_train_counts
        self.bands_ = PopularityBands(int(self.head_min)) if self.head_min is not None else PopularityBands.from_counts(counts, self.head_share)
        self.item_band_ = self.bands_.assign(counts)
        return self

    def weight_table(self) -> np.ndarray:
        """``(n_bands, n_sources)`` float32 weights, rows in :data:`BANDS` order."""
        return np.array([[self.band_weights[b][n] for n in self.sources] for b in BANDS], dtype=np.float32)

    def item_weights(self) -> dict[str, float | np.ndarray]:
        """Per-item ``(n_items,)`` float32 weight vector of every source with a positive weight somewhere."""
        self._check_fitted()
        table = self.weight_table()
        out: dict[str, float | np.ndarray] = {}
        for j, name in enumerate(self.sources):
            if (table[:, j] > 0).any():
                out[name] = table[self.item_band_, j]
        return out

    def with_band_weights(self, band_weights: Mapping[str, Mapping[str, float]]) -> GatedBlend:
        """A new gated blend with other weights, sharing sources, bands and fitted state."""
        other = type(self).__new__(type(self))
        other.sources = self.sources
        other.band_weights = check_band_weights(band_weights, self.sources)
        other.normalizers = dict(self.normalizers)
        other.head_min = self.head_min
        other.head_share = self.head_share
        other.weights = {n: max(other.band_weights[b][n] for b in BANDS) for n in self.sources}
        self._copy_fitted_state(other)
        for attr in ("bands_", "item_band_"):
            if hasattr(self, attr):
                setattr(other, attr, getattr(self, attr))
        return other

    def with_weights(self, weights: Mapping[str, float]) -> GatedBlend:
        """The same weights in every band."""
        return self.with_band_weights({b: dict(weights) for b in BANDS})

    def get_params(self) -> dict[str, Any]:
        """Band weights, normalizers and the band rule."""
        head_min = self.bands_.head_min if hasattr(self, "bands_") else self.head_min
        return {
            "band_weights": {b: dict(t) for b, t in self.band_weights.items()},
            "normalizers": dict(self.normalizers),
            "head_min": head_min,
            "head_share": self.head_share,
        }

    def __repr__(self) -> str:
        parts = "; ".join(f"{b}: " + ", ".join(f"{n}={w:g}" for n, w in t.items()) for b, t in self.band_weights.items())
        return f"GatedBlend({parts})"


_PROVENANCE = ("band_heldout", "learned_bands", "unlearned_bands", "min_band_heldout", "head_min", "objective", "objective_used",
               "reason", "side_users", "side_reference", "side_scores", "objective_value")


def band_provenance(result: LearnResult) -> dict[str, Any]:
    """Where a gated result's weights come from: validation held-out rows per band, learned and
    not learned bands (with counts), the objective used and, for ``"sides"``, its side sizes,
    references and scores. Plain values, ready for JSON."""
    return {k: result.details[k] for k in _PROVENANCE if k in result.details}


def band_weights_text(band_weights: Mapping[str, Mapping[str, float]], provenance: Mapping[str, Any]) -> list[str]:
    """One line per band: its weights, and the validation rows it was learned on or
    ``not learned (n=..)`` when it had fewer than ``min_band_heldout``."""
    lines = []
    for band in BANDS:
        n = provenance["band_heldout"][band]
        how = f"learned on {n} validation rows" if band in provenance["learned_bands"] else \
            f"not learned (n={n} < {provenance['min_band_heldout']}): start weights"
        weights = ", ".join(f"{s}={w:.3f}" for s, w in band_weights[band].items())
        lines.append(f"  {band:<5} {how}: {weights}")
    return lines


def _flat_to_band_weights(v: np.ndarray, names: Sequence[str]) -> dict[str, dict[str, float]]:
    table = np.asarray(v, dtype=np.float64).reshape(len(BANDS), len(names))
    return {b: dict(zip(names, table[i].tolist(), strict=True)) for i, b in enumerate(BANDS)}


def learn_gated_weights(
    engine: Any,
    bands: PopularityBands | None = None,
    *,
    start: Mapping[str, float] | None = None,
    head_share: float = 0.2,
    n_restarts: int = 2,
    grid: Sequence[float] | None = None,
    refine: int = 2,
    max_sweeps: int = 6,
    seed: int = 0,
    test_engine: Any = None,
    progress: bool = False,
    search: str = "fast",
    min_band_heldout: int = 20,
    objective: str = "overall",
    side_baselines: Mapping[str, Sequence[str]] | None = None,
    **fast_options: Any,
) -> Any:
    """Learn band × source weights jointly by coordinate ascent on the validation metric.

    Parameters
    ----------
    engine
        Prepared :class:`~xrec.blend.engine.BlendEngine` of the validation fold.
    bands
        Band rule; default :meth:`PopularityBands.from_counts` on the validation fold's
        training counts with ``head_share``.
    start
        Ungated weights to start from (every band the same); default: the result of
        ungated :func:`~xrec.blend.learn.coordinate_ascent` on ``engine``. The start is
        evaluated, so the gated result is never below it on the validation users.
    head_share
        See :class:`PopularityBands`.
    n_restarts, grid, refine, max_sweeps, seed, progress, search
        As for :func:`~xrec.blend.learn.coordinate_ascent`; coordinates are the
        (band, source) pairs of the bands that are learned (see ``min_band_heldout``). The
        fast search moves a (band, source) weight over that band's items in one pass per line.
    min_band_heldout
        Fewest validation held-out interactions on a band's items for its weights to be
        learned. A band with fewer keeps the start weights (the ungated blend's) and is
        reported in ``details["unlearned_bands"]`` with its count, never silently. On a
        leave-last validation split the new band is usually empty; on a mixed split
        (``split_dataset(..., "mixed_last")``) it holds ``new_share`` of the rows.
    objective
        What the search maximizes. ``"overall"``: the metric's mean over all validation
        users (every user counts once, so on a mixed split the known-item users, usually
        most of them, decide the weights). ``"sides"``: the maximin relative gain over the
        two sides of a mixed split, known-item users and new-item users, each measured
        against the best single source on that side (:mod:`xrec.blend._sides`), so one
        blend is chosen to do well on both; every user still ranks the whole catalog. Falls
        back to ``"overall"`` (reported in ``details["objective_used"]`` with the reason)
        when a side has fewer than ``min_band_heldout`` validation users.
    side_baselines
        ``objective="sides"`` only: the sources each side's reference is chosen among, e.g.
        ``{"new": ["attributes", "text", "image"]}`` to judge the new side against the best
        content-only source; a side not named uses every source.
    **fast_options
        ``sample``, ``min_users``, ``stop_z`` of the fast search.
    test_engine
        Prepared engine of the test fold, to report the test score beside the validation one.

    Returns
    -------
    LearnResult
        ``weights`` keyed ``"band.source"``; ``band_weights`` nested; ``details["head_min"]``,
        ``details["band_heldout"]`` (validation held-out interactions per band),
        ``details["learned_bands"]`` and ``details["unlearned_bands"]`` (band -> count);
        ``best_single`` holds ``("ungated start", its validation score)`` and
        ``best_single_test`` its test score, so the gain of gating shows on both folds.
        ``valid_score`` is always the overall metric; with ``objective="sides"``,
        ``details`` also hold ``objective_value`` (``J``, start and chosen),
        ``side_users``, ``side_reference`` and ``side_scores`` (the chosen blend's metric
        per side on validation).
    """
    names = list(engine.names_)
    n_src = len(names)
    counts = engine.fold.item_train_counts
    bands = bands or PopularityBands.from_counts(counts, head_share)
    item_band = bands.assign(counts)
    check_int(min_band_heldout, "min_band_heldout", low=1, expected="an integer >= 1")
    held_per_band = np.bincount(item_band[engine.fold.heldout["item_idx"].to_numpy()], minlength=len(BANDS))
    present = (np.bincount(item_band, minlength=len(BANDS)) > 0) & (held_per_band >= min_band_heldout)

    def to_weights(v: np.ndarray) -> dict[str, np.ndarray]:
        table = v.reshape(len(BANDS), n_src).astype(np.float32)
        return {n: table[item_band, j] for j, n in enumerate(names)}

    if search not in ("fast", "exhaustive"):
        raise ConfigError(f"search must be 'fast' or 'exhaustive', got {search!r}")
    sides, side_details = None, {}
    if check_objective(objective) == "sides":
        sides, side_details = SideObjective.build(engine, int(min_band_heldout), side_baselines)
    elif side_baselines is not None:
        raise ConfigError("side_baselines: only with objective='sides'")
    if start is None:
        base = coordinate_ascent(engine, n_restarts=1, seed=seed, progress=progress, search=search, **fast_options)
        start_w = np.array([base.weights[n] for n in names])
    else:
        start_w = simplex([start[n] for n in names])
    labels = [f"{b}.{n}" for b in BANDS for n in names]
    coords = [i for i in range(len(labels)) if present[i // n_src]]
    rng = np.random.default_rng(seed)
    first = np.tile(start_w, len(BANDS))
    starts = [first] + [np.tile(rng.dirichlet(np.ones(n_src)), len(BANDS)) * rng.uniform(0.5, 1.5, len(BANDS)).repeat(n_src) for _ in range(n_restarts)]
    fixed = np.repeat(~present, n_src)  # bands not learned keep the start weights in every restart
    for v0 in starts[1:]:
        v0[fixed] = first[fixed]
    details = {
        "head_min": bands.head_min, "band_sizes": np.bincount(item_band, minlength=3).tolist(), "seed": seed,
        "band_heldout": {b: int(held_per_band[i]) for i, b in enumerate(BANDS)}, "min_band_heldout": int(min_band_heldout),
        "learned_bands": {b: int(held_per_band[i]) for i, b in enumerate(BANDS) if present[i]},
        "unlearned_bands": {b: int(held_per_band[i]) for i, b in enumerate(BANDS) if not present[i]},
        "objective": objective, "objective_used": "sides" if sides is not None else "overall", **side_details,
    }  # fmt: skip
    judge = sides if sides is not None else engine.score
    if search == "fast":
        from xrec.blend._fast_search import gated_climb

        moves = [(names[i % n_src], item_band == i // n_src) for i in range(len(labels))]
        v, score, start_score, history, plan = gated_climb(
            engine, to_weights, moves, labels, starts, coords, grid=DEFAULT_GRID if grid is None else grid, refine=refine,
            max_sweeps=max_sweeps, seed=seed, progress=progress, objective=sides.of_values if sides is not None else None,
            **fast_options,
        )
        details.update(plan)
        # the engine's own sum order, so the reported score is exactly what a re-evaluation gives
        score = float(judge(to_weights(np.asarray(v))))
        if score < start_score:  # only by rounding: keep the start
            v, score = simplex(first), start_score
    else:
        if fast_options:
            raise ConfigError(f"options {sorted(fast_options)} apply to search='fast' only")
        track = Tracker(engine, progress, "gated coordinate ascent", to_weights=to_weights, labels=labels, objective=sides)
        start_score = track(first, "ungated start")
        finals = ascend(track, starts, coords, DEFAULT_GRID if grid is None else grid, refine, max_sweeps, 1e-12, rng)
        best = max(finals, key=lambda t: (t[0], -t[1]))
        v, score = best[2], best[0]
        if score < start_score:
            v, score = simplex(first), start_score
        history = track.history()
    if sides is not None:
        details["objective_value"] = {"start": float(start_score), "chosen": float(score)}
        details["side_scores"] = sides.per_side(to_weights(np.asarray(v)))
        score = float(engine.score(to_weights(np.asarray(v))))
        start_score = float(engine.score(to_weights(np.asarray(first))))
    result = LearnResult(
        method="gated_coordinate_ascent",
        metric=engine.metric,
        weights=dict(zip(labels, np.asarray(v).tolist(), strict=True)),
        valid_score=float(score),
        best_single=("ungated start", float(start_score)),
        history=history,
        band_weights=_flat_to_band_weights(v, names),
        details=details,
    )
    if test_engine is not None:
        titem = bands.assign(test_engine.fold.item_train_counts)
        table = np.asarray(v).reshape(len(BANDS), n_src).astype(np.float32)
        result.test_score = float(test_engine.score({n: table[titem, j] for j, n in enumerate(names)}))
        result.best_single_test = float(test_engine.score(dict(zip(names, start_w.tolist(), strict=True))))
    return result
