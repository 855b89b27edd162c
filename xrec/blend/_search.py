"""The search core shared by weight learning and gated weight learning.

:func:`coordinate_ascent` (Metzler & Croft, "Linear feature-based models for information
retrieval", Information Retrieval 10(3), 2007) moves one source's share of the simplex at a
time by line search with the others fixed. :func:`ascend` is its loop over any coordinates,
used as-is by :func:`xrec.blend.gating.learn_gated_weights` over (band, source) pairs.
This module sits below both :mod:`xrec.blend.gating` and :mod:`xrec.blend.learn`, so the
import order is ``engine, _result -> _search -> gating -> learn`` (the fast search,
``_fast_search``, depends on ``_result`` only).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from xrec._validation import check_int
from xrec.blend._result import DEFAULT_GRID, LearnResult
from xrec.errors import ConfigError

if TYPE_CHECKING:
    from xrec.blend.engine import BlendEngine

__all__ = ["DEFAULT_GRID", "LearnResult", "Tracker", "ascend", "coordinate_ascent", "simplex"]


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

    def __init__(self, engine: BlendEngine, progress: bool, desc: str, *, to_weights: Any = None, labels: Sequence[str] | None = None,
                 objective: Any = None) -> None:
        self.engine = engine
        # objective(engine weights) -> float; default the engine's main metric
        self.objective = objective or engine.score
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
        score = float(self.objective(self.to_weights(w)))
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
    check_int(n_restarts, "n_restarts", low=0)
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
