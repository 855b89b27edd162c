"""The search core shared by weight learning and gated weight learning.

:func:`coordinate_ascent` (Metzler & Croft, "Linear feature-based models for information
retrieval", Information Retrieval 10(3), 2007) moves one source's share of the simplex at a
time by line search with the others fixed. :func:`ascend` is its loop over any coordinates,
used as-is by :func:`xrec.blend.gating.learn_gated_weights` over (band, source) pairs.
This module sits below both :mod:`xrec.blend.gating` and :mod:`xrec.blend.learn`, so the
import order is ``engine -> _search -> gating -> learn``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from xrec.errors import ConfigError

if TYPE_CHECKING:
    from xrec.blend.engine import BlendEngine

__all__ = ["DEFAULT_GRID", "LearnResult", "Tracker", "ascend", "coordinate_ascent", "simplex"]

#: Shares tried for one source in a coordinate line search (0 = source off, 1 = source alone).
DEFAULT_GRID = (0.0, 0.02, 0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45, 0.5, 0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95, 0.98, 1.0)


@dataclass
class LearnResult:
    """Outcome of a weight search.

    Attributes
    ----------
    method
        Search method name.
    metric
        The metric maximized, ``"<name>@<k>"``.
    weights
        Chosen weights, non-negative, summing to 1, in source order.
    valid_score
        Metric of ``weights`` on the validation users.
    test_score
        Metric of ``weights`` on the test fold, when one was given.
    best_single
        ``(source, validation score)`` of the best source alone.
    best_single_test
        Test score of that source alone, when a test fold was given.
    history
        One row per evaluated weight vector: the weights, the validation score and the phase.
    details
        Method-specific extras (restarts, coefficients, trials).
    band_weights
        Gated blends only (:func:`~xrec.blend.gating.learn_gated_weights`): ``{band: {source: weight}}``.
    """

    method: str
    metric: str
    weights: dict[str, float]
    valid_score: float
    test_score: float | None = None
    best_single: tuple[str, float] | None = None
    best_single_test: float | None = None
    history: pd.DataFrame = field(default_factory=pd.DataFrame)
    details: dict = field(default_factory=dict)
    band_weights: dict[str, dict[str, float]] | None = None

    def summary(self) -> pd.DataFrame:
        """Validation and test score of the chosen blend and of the best single source, side by side."""
        rows = [{"blend": f"{self.method} blend", "validation": self.valid_score, "test": self.test_score}]
        if self.best_single is not None:
            rows.append({"blend": f"{self.best_single[0]} alone", "validation": self.best_single[1], "test": self.best_single_test})
        return pd.DataFrame(rows).set_index("blend")

    def __repr__(self) -> str:
        w = ", ".join(f"{k}={v:.3f}" for k, v in self.weights.items())
        test = "" if self.test_score is None else f", test {self.metric}={self.test_score:.4f}"
        return f"LearnResult({self.method}: {w}; validation {self.metric}={self.valid_score:.4f}{test})"


def simplex(w: np.ndarray) -> np.ndarray:
    w = np.maximum(np.asarray(w, dtype=np.float64), 0.0)
    total = w.sum()
    if total <= 0:
        raise ConfigError("weights: all zero")
    return w / total


class Tracker:
    """Evaluates weight vectors on the engine, remembers every result.

    ``to_weights`` maps a point of the search space (a flat non-negative vector) to the
    engine's weights; ``labels`` name its coordinates in the history.
    """

    def __init__(self, engine: BlendEngine, progress: bool, desc: str, *, to_weights: Any = None, labels: Sequence[str] | None = None) -> None:
        self.engine = engine
        self.labels = list(labels) if labels is not None else list(engine.names_)
        self.to_weights = to_weights or (lambda w: dict(zip(engine.names_, w.tolist(), strict=True)))
        self.rows: list[dict] = []
        self.cache: dict[tuple, float] = {}
        self.bar = tqdm(desc=desc, unit="eval", disable=not progress)

    def __call__(self, w: np.ndarray, phase: str) -> float:
        w = simplex(w)
        key = tuple(np.round(w, 12))
        if key in self.cache:
            return self.cache[key]
        score = float(self.engine.score(self.to_weights(w)))
        self.cache[key] = score
        self.rows.append({**dict(zip(self.labels, w.tolist(), strict=True)), "score": score, "phase": phase})
        self.bar.update()
        return score

    def corners(self) -> tuple[str, float, list[float]]:
        names = self.engine.names_
        scores = [self(np.eye(len(names))[j], "corner") for j in range(len(names))]
        j = int(np.argmax(scores))
        return names[j], scores[j], scores

    def history(self) -> pd.DataFrame:
        self.bar.close()
        return pd.DataFrame(self.rows)


def _best_plateau(shares: Sequence[float], scores: Sequence[float], tol: float) -> int:
    """Index of the middle of the best-scoring shares (a metric of ranks is flat in places)."""
    scores = np.asarray(scores)
    best = np.flatnonzero(scores >= scores.max() - tol)
    return int(best[len(best) // 2])


def _with_share(w: np.ndarray, j: int, share: float) -> np.ndarray:
    """``w`` with source ``j`` given ``share`` of the total and the others rescaled."""
    others = w.copy()
    others[j] = 0.0
    rest = others.sum()
    if rest <= 0:
        # Only source j is on: spread the remaining share evenly over the others.
        others = np.ones_like(w)
        others[j] = 0.0
        rest = others.sum()
    out = others * ((1.0 - share) / rest)
    out[j] = share
    return out


def ascend(
    track: Tracker,
    starts: Sequence[np.ndarray],
    coords: Sequence[int],
    grid: Sequence[float],
    refine: int,
    max_sweeps: int,
    tol: float,
    rng: np.random.Generator,
) -> list[tuple[float, int, np.ndarray]]:
    """Coordinate ascent from each start over ``coords``; ``(score, start index, weights)`` per start."""
    grid = sorted({float(g) for g in grid})
    if not grid or grid[0] < 0 or grid[-1] > 1:
        raise ConfigError(f"grid: shares must lie in [0, 1], got {grid}")
    coords = list(coords)
    finals = []
    for r, w in enumerate(starts):
        w = simplex(w)
        phase = f"start {r}"
        score = track(w, phase)
        for _ in range(max_sweeps):
            improved = False
            for j in rng.permutation(coords) if len(coords) > 1 else coords:
                shares = list(grid)
                scores = [track(_with_share(w, j, a), phase) for a in shares]
                # Finer shares around the best one, halving the spacing each time.
                for _level in range(refine):
                    k = _best_plateau(shares, scores, tol)
                    lo = shares[k - 1] if k > 0 else shares[k]
                    hi = shares[k + 1] if k + 1 < len(shares) else shares[k]
                    for a in ((lo + shares[k]) / 2, (shares[k] + hi) / 2):
                        if a not in shares:
                            shares.append(a)
                            scores.append(track(_with_share(w, j, a), phase))
                    order = np.argsort(shares)
                    shares = [shares[i] for i in order]
                    scores = [scores[i] for i in order]
                k = _best_plateau(shares, scores, tol)
                if scores[k] > score + tol:
                    w, score, improved = _with_share(w, j, shares[k]), scores[k], True
                elif abs(scores[k] - score) <= tol:
                    # Equal score: move to the middle of the flat stretch (better-centred weights).
                    w = _with_share(w, j, shares[k])
            if not improved:
                break
        finals.append((score, r, simplex(w)))
    return finals


def coordinate_ascent(
    engine: BlendEngine,
    *,
    n_restarts: int = 4,
    grid: Sequence[float] = DEFAULT_GRID,
    refine: int = 3,
    max_sweeps: int = 10,
    tol: float = 1e-12,
    seed: int = 0,
    progress: bool = False,
    search: str = "fast",
    **fast_options: Any,
) -> LearnResult:
    """Coordinate ascent on the simplex (Metzler & Croft, Information Retrieval 2007).

    Parameters
    ----------
    engine
        Prepared engine of the validation fold; its ``metric`` is maximized.
    n_restarts
        Random starts (Dirichlet(1), seeded) after the first start at uniform weights.
    grid
        Shares tried for the moving source in each line search, in ``[0, 1]``.
    refine
        After the coarse line search, halve the spacing around the best share this many
        times (a finer search where it matters).
    max_sweeps
        Most passes over all sources per start.
    tol
        Smallest improvement that counts.
    seed
        Seed of the random starts.
    progress
        Show a progress bar.
    search
        ``"fast"`` (default): every share of a line in one pass over the blocks, starts
        screened on stratified user samples by successive halving, sweeps stopped when the
        gain is within the sample's noise (:func:`xrec.blend._fast_search.fast_coordinate_ascent`;
        ``fast_options``: ``sample``, ``min_users``, ``stop_z``). ``"exhaustive"``: every
        start climbs on all users, one engine evaluation per share, until nothing improves.
    """
    if search == "fast":
        from xrec.blend._fast_search import fast_coordinate_ascent

        return fast_coordinate_ascent(engine, n_restarts=n_restarts, grid=grid, refine=refine, max_sweeps=max_sweeps, tol=tol,
                                      seed=seed, progress=progress, **fast_options)
    if search != "exhaustive":
        raise ConfigError(f"search must be 'fast' or 'exhaustive', got {search!r}")
    if fast_options:
        raise ConfigError(f"options {sorted(fast_options)} apply to search='fast' only")
    if isinstance(n_restarts, bool) or not isinstance(n_restarts, (int, np.integer)) or n_restarts < 0:
        raise ConfigError(f"n_restarts must be an integer >= 0, got {n_restarts!r}")
    track = Tracker(engine, progress, "coordinate ascent")
    n = len(engine.names_)
    single_name, single_score, _ = track.corners()
    rng = np.random.default_rng(seed)
    starts = [np.full(n, 1.0 / n)] + [rng.dirichlet(np.ones(n)) for _ in range(n_restarts)]
    finals = ascend(track, starts, list(range(n)), grid, refine, max_sweeps, tol, rng)
    history = track.history()
    best = max(finals, key=lambda t: (t[0], -t[1]))
    weights, score = best[2], best[0]
    if score < single_score:
        weights, score = np.eye(n)[engine.names_.index(single_name)], single_score
    return LearnResult(
        method="coordinate_ascent",
        metric=engine.metric,
        weights=dict(zip(engine.names_, weights.tolist(), strict=True)),
        valid_score=float(score),
        best_single=(single_name, float(single_score)),
        history=history,
        details={"starts": [{"start": r, "score": s, "weights": w.tolist()} for s, r, w in finals], "seed": seed},
    )
