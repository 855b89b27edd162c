"""Coordinate ascent with one-pass line searches, user samples and successive halving.

The search space and the moves are those of :func:`xrec.blend.learn.coordinate_ascent`
(Metzler & Croft, Information Retrieval 10(3), 2007): non-negative weights on the simplex,
one coordinate's share moved at a time over a grid (share 1 = that coordinate alone), then
refined around the best share by halving the spacing. What changes is the cost:

* **one pass per line**: every share of a line is evaluated by one
  :class:`~xrec.blend._line.LineEvaluator` line (fixed parts of the sum once per chunk,
  cells decided for the whole line counted once), and the refinement reuses the same line;
* **successive halving over user samples**: every start (the uniform weights and the
  seeded random ones) climbs on a stratified sample of the users
  (:func:`~xrec.blend.engine.sample_users`); the better half moves on to a sample twice as
  large, and so on, until one start climbs on all users;
* **stop inside the noise**: a start stops sweeping when a whole sweep's gain is within
  ``stop_z`` standard errors of the per-user paired difference on its sample;
* **shared work**: evaluators (with their sample copies and per-row bounds) are kept per
  engine, so the gated search and a second search on the same engine reuse them.

The chosen weights are scored on all of the engine's users with the engine's own float32
operations, so the reported validation score is exactly ``engine.score(weights)``.
"""

from __future__ import annotations

import math
import weakref
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from tqdm.auto import tqdm

from xrec.blend._line import LineEvaluator
from xrec.blend._result import DEFAULT_GRID, LearnResult
from xrec.blend.engine import sample_users
from xrec.errors import ConfigError

# Evaluators per engine and user set, so later searches on the same engine reuse them.
_EVALUATORS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()


def evaluator_for(engine: Any, size: int | None, seed: int) -> tuple[LineEvaluator, Any]:
    """A :class:`LineEvaluator` on a stratified sample of ``size`` users (``None``: all), and the sample."""
    store = _EVALUATORS.setdefault(engine, {})
    key = (size, seed if size is not None else None)
    if key not in store:
        if size is None:
            weights = None
            users = engine.users
            if hasattr(users, "estimate"):  # a UserSample: its stratified weights
                weights = _strata_weights(users.stratum, users.population)
            store[key] = (LineEvaluator(engine, None, weights), users if hasattr(users, "estimate") else None)
        else:
            sample = sample_users(engine.fold, size, seed=seed)
            rows = np.searchsorted(engine.users_, sample.users)
            store[key] = (LineEvaluator(engine, rows, _strata_weights(sample.stratum, sample.population)), sample)
    return store[key]


def _strata_weights(stratum: np.ndarray, population: np.ndarray) -> np.ndarray:
    """Row weights of the stratified mean: ``W_h / n_h`` (Cochran 1977, eq. 5.1; from memory)."""
    n_h = np.bincount(stratum, minlength=len(population)).astype(np.float64)
    share = population / population.sum()
    return share[stratum] / n_h[stratum]


def paired_se(ev: LineEvaluator, sample: Any, diff: np.ndarray) -> float:
    """Standard error of the (stratified) mean of per-user differences, without the finite-population factor."""
    if sample is None:
        return float(diff.std(ddof=1) / math.sqrt(len(diff))) if len(diff) > 1 else 0.0
    share = sample.population / sample.population.sum()
    var = 0.0
    for h in range(len(sample.population)):
        d = diff[sample.stratum == h]
        if len(d) > 1:
            var += share[h] ** 2 * float(d.var(ddof=1)) / len(d)
    return math.sqrt(var)


def _best_plateau(scores: np.ndarray, tol: float) -> int:
    best = np.flatnonzero(scores >= scores.max() - tol)
    return int(best[len(best) // 2])


class HalvingAscent:
    """Coordinate ascent over a flat non-negative vector ``v`` (see the module docstring).

    Parameters
    ----------
    engine
        Prepared engine of the validation fold.
    to_weights
        Maps ``v`` to the engine's weights (name -> number or per-item vector).
    moves
        Per coordinate of ``v``: ``(source name, item mask or None)`` — what the coordinate
        weighs (the source everywhere, or the source on the masked items).
    labels
        Coordinate names, for the history.
    """

    def __init__(self, engine: Any, to_weights: Callable, moves: Sequence[tuple[str, np.ndarray | None]], labels: Sequence[str], *,
                 grid: Sequence[float], refine: int, max_sweeps: int, tol: float, stop_z: float, min_users: int,
                 sample: bool, seed: int, progress: bool, desc: str, objective: Callable | None = None) -> None:
        grid = sorted({float(g) for g in grid})
        if not grid or grid[0] < 0 or grid[-1] > 1:
            raise ConfigError(f"grid: shares must lie in [0, 1], got {grid}")
        for name, value, low in (("refine", refine, 0), ("max_sweeps", max_sweeps, 1), ("min_users", min_users, 1)):
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
                raise ConfigError(f"{name} must be an integer >= {low}, got {value!r}")
        if isinstance(stop_z, bool) or not isinstance(stop_z, (int, float)) or not math.isfinite(stop_z) or stop_z < 0:
            raise ConfigError(f"stop_z must be a finite number >= 0, got {stop_z!r}")
        self.engine, self.to_weights, self.moves, self.labels = engine, to_weights, list(moves), list(labels)
        self.grid, self.refine, self.max_sweeps, self.tol = grid, int(refine), int(max_sweeps), float(tol)
        self.stop_z, self.seed = float(stop_z), int(seed)
        # objective(evaluator, per-user values) -> score per row of values; default the weighted mean
        self.objective = objective or (lambda ev, values: ev.mean(values))
        self.rows: list[dict] = []
        self.bar = tqdm(desc=desc, unit="line", disable=not progress)
        n = len(engine.users_)
        sizes: list[int | None] = []
        if sample and engine.users is None:
            # Halving rounds on a half and a quarter of the users, none below min_users.
            size = n // 2
            while size >= min_users and len(sizes) < 2:
                sizes.insert(0, size)
                size //= 2
        self.sizes = sizes + [None]
        self.full, self.full_sample = evaluator_for(engine, None, self.seed)

    # ------------------------------------------------------------------ pieces
    def _record(self, v: np.ndarray, score: float, phase: str, n_users: int) -> None:
        self.rows.append({**dict(zip(self.labels, v.tolist(), strict=True)), "score": float(score), "phase": phase, "users": n_users})

    def point(self, ev: LineEvaluator, v: np.ndarray, phase: str) -> np.ndarray:
        values = ev.point(self.to_weights(v))
        self._record(v, float(self.objective(ev, values)), phase, len(ev.rows))
        return values

    def _line(self, ev: LineEvaluator, v: np.ndarray, c: int, phase: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Shares tried along coordinate ``c`` from ``v`` (on the simplex), their scores and per-user values."""
        rest = float(v.sum() - v[c])
        if rest <= 0:
            # Only this coordinate is on: spread the remaining share evenly over the others.
            v = np.ones_like(v)
            v[c] = 0.0
            v /= v.sum()
            rest = 1.0
        base = v.copy()
        base[c] = 0.0
        below_one = [a for a in self.grid if a < 1.0]
        top = 1.0 - (1.0 - below_one[-1]) / 2**self.refine if below_one else 0.0
        to_t = lambda a: a / (1.0 - a) * rest  # noqa: E731
        name, band = self.moves[c]
        line = ev.line(self.to_weights(v), name, to_t(below_one[0]) if below_one else 0.0, to_t(top), band=band) if below_one else None

        def evaluate(shares: list[float]) -> np.ndarray:
            out = np.empty((len(shares), len(ev.rows)))
            inner = [i for i, a in enumerate(shares) if a < 1.0]
            if inner:
                out[inner] = line.values([to_t(shares[i]) for i in inner])
            for i, a in enumerate(shares):
                if a >= 1.0:
                    out[i] = ev.point(self.to_weights(np.eye(len(v))[c]))
            return out

        shares = list(self.grid)
        values = evaluate(shares)
        scores = self.objective(ev, values)
        for _level in range(self.refine):
            k = _best_plateau(scores, self.tol)
            lo = shares[k - 1] if k > 0 else shares[k]
            hi = shares[k + 1] if k + 1 < len(shares) else shares[k]
            new = [a for a in ((lo + shares[k]) / 2, (shares[k] + hi) / 2) if a not in shares]
            if not new:
                break
            new_values = evaluate(new)
            shares += new
            values = np.vstack([values, new_values])
            scores = np.concatenate([scores, self.objective(ev, new_values)])
            order = np.argsort(shares, kind="stable")
            shares = [shares[i] for i in order]
            values, scores = values[order], scores[order]
        for a, s in zip(shares, scores, strict=True):
            self._record(self._with_share(base, c, a), s, phase, len(ev.rows))
        self.bar.update()
        return np.asarray(shares), scores, values

    @staticmethod
    def _with_share(base: np.ndarray, c: int, share: float) -> np.ndarray:
        """``base`` (coordinate ``c`` zero) rescaled to ``1 - share``, with ``share`` at ``c``."""
        rest = base.sum()
        out = base * ((1.0 - share) / rest) if rest > 0 else np.zeros_like(base)
        out[c] = share
        return out

    def climb(self, ev: LineEvaluator, sample: Any, v: np.ndarray, coords: Sequence[int], rng: np.random.Generator, phase: str,
              stop_z: float) -> tuple[np.ndarray, float, np.ndarray]:
        """Sweeps of line searches from ``v`` on one user set; ``(v, score, per-user values)``."""
        v = v / v.sum()
        values = self.point(ev, v, phase)
        score = float(self.objective(ev, values))
        for _ in range(self.max_sweeps):
            start_values, start_score, improved = values, score, False
            for c in rng.permutation(coords) if len(coords) > 1 else coords:
                shares, scores, vals = self._line(ev, v, int(c), phase)
                k = _best_plateau(scores, self.tol)
                rest = v.copy()
                rest[c] = 0.0
                if rest.sum() <= 0:
                    rest = np.ones_like(v)
                    rest[c] = 0.0
                if scores[k] > score + self.tol:
                    v, score, values, improved = self._with_share(rest, int(c), float(shares[k])), float(scores[k]), vals[k], True
                elif abs(scores[k] - score) <= self.tol:
                    # Equal score: move to the middle of the flat stretch (better-centred weights).
                    v, values = self._with_share(rest, int(c), float(shares[k])), vals[k]
            if not improved:
                break
            se = paired_se(ev, sample, values - start_values)
            if stop_z > 0 and score - start_score <= stop_z * se:
                break  # the sweep's gain is within the sample's noise
        return v, score, values

    def run(self, starts: Sequence[np.ndarray], coords: Sequence[int]) -> tuple[list[tuple[float, int, np.ndarray]], dict]:
        """Successive halving of ``starts`` over the user samples; finals ``(score, start, v)`` on all users."""
        rng = np.random.default_rng(self.seed)
        alive = [(r, np.asarray(s, dtype=np.float64)) for r, s in enumerate(starts)]
        plan = []
        for i, size in enumerate(self.sizes):
            ev, sample = evaluator_for(self.engine, size, self.seed + i) if size is not None else (self.full, self.full_sample)
            if i > 0:
                last = i == len(self.sizes) - 1
                keep = 1 if last else max(1, math.ceil(len(alive) / 2))
                ranked = sorted(alive, key=lambda item: (-float(self.objective(ev, self.point(ev, item[1], "screen"))), item[0]))
                alive = ranked[:keep]
            plan.append({"users": len(ev.rows), "starts": [r for r, _ in alive]})
            finals = []
            for r, v in alive:
                v, score, _ = self.climb(ev, sample, v, coords, rng, f"start {r}", self.stop_z)
                finals.append((score, r, v))
            alive = [(r, v) for _, r, v in finals]
        self.bar.close()
        return finals, {"rungs": plan}


def fast_coordinate_ascent(
    engine: Any,
    *,
    n_restarts: int = 4,
    grid: Sequence[float] | None = None,
    refine: int = 3,
    max_sweeps: int = 10,
    tol: float = 1e-12,
    seed: int = 0,
    sample: bool = True,
    min_users: int = 300,
    stop_z: float = 2.0,
    progress: bool = False,
) -> Any:
    """Coordinate ascent on the simplex, fast (see the module docstring).

    Parameters
    ----------
    engine
        Prepared :class:`~xrec.blend.engine.BlendEngine` of the validation fold; its
        ``metric`` is maximized.
    n_restarts
        Random starts (Dirichlet(1), seeded) after the first start at uniform weights.
    grid, refine, max_sweeps, tol
        As for :func:`xrec.blend.learn.coordinate_ascent` (default grid: its ``DEFAULT_GRID``).
    seed
        Seed of the starts, the coordinate order and the user samples.
    sample
        Screen the starts on stratified user samples (a quarter, then half of the users,
        at least ``min_users``) before the survivor climbs on all users; ``False`` climbs
        from every start on all users. Only when the engine holds all evaluation users.
    min_users
        Smallest screening sample.
    stop_z
        A start stops sweeping when a sweep gains at most ``stop_z`` standard errors of the
        per-user paired difference; ``0`` sweeps until nothing improves.
    progress
        Show a progress bar over line searches.

    Returns
    -------
    LearnResult
        ``method="coordinate_ascent"``; ``details["rungs"]`` lists the users and starts of
        each halving round.
    """
    if isinstance(n_restarts, bool) or not isinstance(n_restarts, (int, np.integer)) or n_restarts < 0:
        raise ConfigError(f"n_restarts must be an integer >= 0, got {n_restarts!r}")
    names = list(engine.names_)
    n = len(names)
    search = HalvingAscent(
        engine, lambda v: dict(zip(names, v.tolist(), strict=True)), [(s, None) for s in names], names,
        grid=DEFAULT_GRID if grid is None else grid, refine=refine, max_sweeps=max_sweeps, tol=tol, stop_z=stop_z, min_users=min_users,
        sample=sample, seed=seed, progress=progress, desc="coordinate ascent",
    )
    corners = [float(search.full.mean(search.point(search.full, np.eye(n)[j], "corner"))) for j in range(n)]
    j = int(np.argmax(corners))
    rng = np.random.default_rng(seed)
    starts = [np.full(n, 1.0 / n)] + [rng.dirichlet(np.ones(n)) for _ in range(n_restarts)]
    finals, plan = search.run(starts, list(range(n)))
    score, r, v = max(finals, key=lambda t: (t[0], -t[1]))
    if score < corners[j]:
        v, score = np.eye(n)[j], corners[j]
    v = v / v.sum()
    score = float(search.full.mean(search.full.point(dict(zip(names, v.tolist(), strict=True)))))
    return LearnResult(
        method="coordinate_ascent",
        metric=engine.metric,
        weights=dict(zip(names, v.tolist(), strict=True)),
        valid_score=score,
        best_single=(names[j], corners[j]),
        history=_history(search.rows),
        details={"starts": [{"start": r, "score": s, "weights": w.tolist()} for s, r, w in finals], "seed": seed, **plan},
    )


def gated_climb(
    engine: Any,
    to_weights: Callable,
    moves: Sequence[tuple[str, np.ndarray | None]],
    labels: Sequence[str],
    starts: Sequence[np.ndarray],
    coords: Sequence[int],
    *,
    grid: Sequence[float],
    refine: int,
    max_sweeps: int,
    seed: int,
    progress: bool,
    sample: bool = True,
    min_users: int = 300,
    stop_z: float = 2.0,
    objective: Callable | None = None,
) -> tuple[np.ndarray, float, float, Any, dict]:
    """The fast search behind :func:`xrec.blend.gating.learn_gated_weights`.

    ``starts[0]`` is the ungated start; it is scored on all users and kept when no climb
    beats it there. ``objective(evaluator, per-user values)`` replaces the weighted mean as
    what is maximized (e.g. :class:`xrec.blend._sides.SideObjective`). Returns
    ``(v, score, start score, history, details)`` with ``v`` on the simplex and the scores
    in the objective's units.
    """
    search = HalvingAscent(
        engine, to_weights, moves, labels, grid=grid, refine=refine, max_sweeps=max_sweeps, tol=1e-12, stop_z=stop_z,
        min_users=min_users, sample=sample, seed=seed, progress=progress, desc="gated coordinate ascent", objective=objective,
    )
    first = np.asarray(starts[0], dtype=np.float64)
    first = first / first.sum()
    start_score = float(search.objective(search.full, search.point(search.full, first, "ungated start")))
    finals, plan = search.run(starts, coords)
    score, _, v = max(finals, key=lambda t: (t[0], -t[1]))
    if score < start_score:
        v = first
    v = v / v.sum()
    score = float(search.objective(search.full, search.full.point(to_weights(v))))
    return v, score, start_score, _history(search.rows), plan


def _history(rows: list[dict]) -> Any:
    import pandas as pd

    return pd.DataFrame(rows)
