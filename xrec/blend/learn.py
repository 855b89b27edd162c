"""Learn blend weights on the validation fold: coordinate ascent, TPE, pairwise logistic model.

Every method works on a prepared :class:`~xrec.blend.engine.BlendEngine` of the validation
fold (so one weight vector costs one fast re-ranking) and returns a :class:`LearnResult`
holding the chosen non-negative weights (summing to 1), the validation score they reach
and, when a test fold is given, their test score beside the best single source's, so
over-fitting to the validation users shows.

Methods
-------
``"coordinate_ascent"``
    Metzler & Croft, "Linear feature-based models for information retrieval", Information
    Retrieval 10(3), 2007: optimize the (non-smooth) metric directly, one weight at a time
    by line search with the others fixed, sweeping until no weight improves it, from
    several seeded random starts. The search space is the simplex; a line search moves
    the share ``a`` of one source (``a = 1`` is that source alone), so the corners (each
    source alone) are always tried and the chosen blend never scores below the best
    single source on the validation users.
``"optuna"``
    TPE (Bergstra et al., NeurIPS 2011) through ``optuna`` with a seeded sampler; the
    corners and the uniform blend are enqueued as the first trials.
``"gated"``
    Coordinate ascent over band × source weights (:mod:`xrec.blend.gating`).
``"logistic"``
    A pairwise logistic model: for each held-out item and sampled non-relevant candidates
    of the same user, the difference of the per-source normalized scores is a feature
    vector; logistic regression without intercept on these differences (both orders, so
    the two classes are balanced) gives coefficients whose non-negative part becomes the
    weights (sources with a negative coefficient are dropped and the model refitted).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from xrec.blend.engine import BlendEngine
from xrec.errors import ConfigError
from xrec.fold import Fold

__all__ = ["LEARN_METHODS", "LearnResult", "coordinate_ascent", "learn_weights", "pairwise_logistic", "tpe_search"]

LEARN_METHODS = ("coordinate_ascent", "optuna", "logistic", "gated")

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


def _simplex(w: np.ndarray) -> np.ndarray:
    w = np.maximum(np.asarray(w, dtype=np.float64), 0.0)
    total = w.sum()
    if total <= 0:
        raise ConfigError("weights: all zero")
    return w / total


class _Tracker:
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
        w = _simplex(w)
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


def _ascend(
    track: _Tracker,
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
        w = _simplex(w)
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
        finals.append((score, r, _simplex(w)))
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
        Show a progress bar over evaluations.
    """
    if isinstance(n_restarts, bool) or not isinstance(n_restarts, (int, np.integer)) or n_restarts < 0:
        raise ConfigError(f"n_restarts must be an integer >= 0, got {n_restarts!r}")
    track = _Tracker(engine, progress, "coordinate ascent")
    n = len(engine.names_)
    single_name, single_score, _ = track.corners()
    rng = np.random.default_rng(seed)
    starts = [np.full(n, 1.0 / n)] + [rng.dirichlet(np.ones(n)) for _ in range(n_restarts)]
    finals = _ascend(track, starts, list(range(n)), grid, refine, max_sweeps, tol, rng)
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


def tpe_search(engine: BlendEngine, *, n_trials: int = 100, seed: int = 0, progress: bool = False) -> LearnResult:
    """TPE search with ``optuna`` (seeded ``TPESampler``); corners and uniform weights go first.

    Each trial draws one raw value in ``[0, 1]`` per source; weights are the values over
    their sum (all-zero draws score as the uniform blend).
    """
    import optuna

    if isinstance(n_trials, bool) or not isinstance(n_trials, (int, np.integer)) or n_trials < 1:
        raise ConfigError(f"n_trials must be a positive integer, got {n_trials!r}")
    names = engine.names_
    n = len(names)
    track = _Tracker(engine, progress, "TPE search")
    single_name, single_score, _ = track.corners()
    keys = [f"w{j}" for j in range(n)]

    def objective(trial: Any) -> float:
        raw = np.array([trial.suggest_float(key, 0.0, 1.0) for key in keys])
        w = raw if raw.sum() > 0 else np.ones(n)
        return track(w, "trial")

    previous = optuna.logging.get_verbosity()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    try:
        study = optuna.create_study(direction="maximize", sampler=optuna.samplers.TPESampler(seed=seed))
        for j in range(n):
            study.enqueue_trial({k: float(i == j) for i, k in enumerate(keys)})
        study.enqueue_trial({k: 1.0 for k in keys})
        study.optimize(objective, n_trials=max(n_trials, n + 1), show_progress_bar=False)
    finally:
        optuna.logging.set_verbosity(previous)
    best = study.best_trial
    raw = np.array([best.params[k] for k in keys])
    weights = _simplex(raw if raw.sum() > 0 else np.ones(n))
    return LearnResult(
        method="optuna",
        metric=engine.metric,
        weights=dict(zip(names, weights.tolist(), strict=True)),
        valid_score=float(best.value),
        best_single=(single_name, float(single_score)),
        history=track.history(),
        details={"n_trials": len(study.trials), "seed": seed},
    )


def _pairs(engine: BlendEngine, n_negatives: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """(positive, negative) per-source score rows: each reachable held-out item vs sampled candidates."""
    seen, truth, n_items = engine._seen, engine._truth, engine._n_items
    pos_rows, pos_items, neg_items = [], [], []
    for r in range(len(engine.users_)):
        rel = truth.indices[truth.indptr[r] : truth.indptr[r + 1]]
        saw = seen.indices[seen.indptr[r] : seen.indptr[r + 1]]
        rel = np.setdiff1d(rel, saw)
        if len(rel) == 0:
            continue
        free = np.setdiff1d(np.arange(n_items), np.union1d(saw, rel))
        if len(free) == 0:
            continue
        for item in rel:
            picks = rng.choice(free, size=min(n_negatives, len(free)), replace=False)
            pos_rows.append(np.full(len(picks), r))
            pos_items.append(np.full(len(picks), item))
            neg_items.append(picks)
    if not pos_rows:
        raise ConfigError("the validation fold has no held-out item that is a candidate; nothing to learn from")
    rows = np.concatenate(pos_rows)
    return engine.pair_values(rows, np.concatenate(pos_items)), engine.pair_values(rows, np.concatenate(neg_items))


def pairwise_logistic(engine: BlendEngine, *, n_negatives: int = 20, C: float = 1.0, seed: int = 0) -> LearnResult:
    """Weights from a pairwise logistic model of held-out items against sampled candidates.

    Parameters
    ----------
    engine
        Prepared engine of the validation fold (supplies the normalized scores).
    n_negatives
        Sampled non-relevant candidates per held-out item (seeded).
    C
        Inverse L2 strength of ``sklearn.linear_model.LogisticRegression``.
    seed
        Seed of the negative sampling.
    """
    from sklearn.linear_model import LogisticRegression

    if isinstance(n_negatives, bool) or not isinstance(n_negatives, (int, np.integer)) or n_negatives < 1:
        raise ConfigError(f"n_negatives must be a positive integer, got {n_negatives!r}")
    if not (isinstance(C, (int, float)) and math.isfinite(C) and C > 0):
        raise ConfigError(f"C must be a positive number, got {C!r}")
    names = engine.names_
    pos, neg = _pairs(engine, int(n_negatives), np.random.default_rng(seed))
    diff = (pos - neg).astype(np.float64)
    x = np.vstack([diff, -diff])
    y = np.r_[np.ones(len(diff)), np.zeros(len(diff))]
    active = np.ones(len(names), dtype=bool)
    coef = np.zeros(len(names))
    # Non-negative projection by elimination: drop sources whose coefficient is negative, refit.
    while active.any():
        model = LogisticRegression(fit_intercept=False, C=float(C), max_iter=1000)
        model.fit(x[:, active], y)
        c = model.coef_.ravel()
        if (c >= 0).all():
            coef[active] = c
            break
        active[np.flatnonzero(active)[c < 0]] = False
    track = _Tracker(engine, False, "logistic")
    single_name, single_score, _ = track.corners()
    if coef.sum() <= 0:
        weights = np.eye(len(names))[names.index(single_name)]
    else:
        weights = _simplex(coef)
    score = track(weights, "logistic")
    return LearnResult(
        method="logistic",
        metric=engine.metric,
        weights=dict(zip(names, weights.tolist(), strict=True)),
        valid_score=float(score),
        best_single=(single_name, float(single_score)),
        history=track.history(),
        details={"coefficients": dict(zip(names, coef.tolist(), strict=True)), "n_pairs": len(diff), "seed": seed},
    )


def learn_weights(
    sources: Mapping[str, Any] | BlendEngine,
    valid_fold: Fold | None = None,
    method: str = "coordinate_ascent",
    *,
    normalizers: str | Mapping[str, str] = "zscore",
    metric: str = "ndcg@10",
    ks: Sequence[int] | None = None,
    seed: int = 0,
    users: Any = None,
    test_fold: Fold | None = None,
    test_sources: Mapping[str, Any] | None = None,
    progress: bool = False,
    **options: Any,
) -> LearnResult:
    """Learn non-negative blend weights on the validation fold; optionally score them on test.

    Parameters
    ----------
    sources
        Name -> source fitted on ``valid_fold.train``, or an already prepared
        :class:`BlendEngine` of the validation fold (then ``valid_fold`` may be ``None``).
    valid_fold
        The validation fold.
    method
        ``"coordinate_ascent"``, ``"optuna"``, ``"logistic"``, or ``"gated"`` (one weight
        vector per item popularity band, :func:`~xrec.blend.gating.learn_gated_weights`).
    normalizers
        Normalizer per source (as for :class:`~xrec.blend.Blend`).
    metric
        Metric to maximize, ``"<name>@<k>"`` with name in hit_rate, ndcg, recall, mrr.
    ks
        Cut-offs to compute (default: the metric's).
    seed
        Seed of every random choice.
    users
        Validation users (indices or :func:`~xrec.blend.engine.sample_users`); default all.
    test_fold
        When given, the chosen weights and the best single source are also scored on it.
    test_sources
        Sources fitted on ``test_fold.train`` (default: ``sources``, which is only right if
        they were fitted on the test fold's training rows).
    progress
        Show progress bars.
    **options
        Passed to the method: :func:`coordinate_ascent` (``n_restarts``, ``grid``,
        ``refine``, ``max_sweeps``), :func:`tpe_search` (``n_trials``),
        :func:`pairwise_logistic` (``n_negatives``, ``C``), ``learn_gated_weights``
        (``bands``, ``start``, ``head_share``, ``n_restarts``, ...).

    Returns
    -------
    LearnResult
    """
    if method not in LEARN_METHODS:
        raise ConfigError(f"method: unknown {method!r}; choose one of {list(LEARN_METHODS)}")
    if isinstance(sources, BlendEngine):
        engine = sources
        if not getattr(engine, "prepared_", False):
            engine.prepare(progress=progress)
        src_map, normalizers = engine._sources, engine._normalizers
        ks_used = engine._ks
        metric = engine.metric
    else:
        if valid_fold is None:
            raise ConfigError("valid_fold: required when sources are given")
        kstr = str(metric).rpartition("@")[2]
        if not kstr.isdigit():
            raise ConfigError(f"metric: expected '<name>@<k>', got {metric!r}")
        ks_used = tuple(ks) if ks is not None else (int(kstr),)
        engine = BlendEngine(sources, valid_fold, normalizers, users=users, ks=ks_used, metric=metric).prepare(progress=progress)
        src_map = sources
    if method == "gated":
        from xrec.blend.gating import learn_gated_weights

        test_engine = None
        if test_fold is not None:
            test_engine = BlendEngine(test_sources or src_map, test_fold, normalizers, ks=ks_used, metric=metric).prepare(progress=progress)
        return learn_gated_weights(engine, seed=seed, progress=progress, test_engine=test_engine, **options)
    if method == "coordinate_ascent":
        result = coordinate_ascent(engine, seed=seed, progress=progress, **options)
    elif method == "optuna":
        result = tpe_search(engine, seed=seed, progress=progress, **options)
    else:
        result = pairwise_logistic(engine, seed=seed, **options)
    if test_fold is not None:
        test_engine = BlendEngine(test_sources or src_map, test_fold, normalizers, ks=ks_used, metric=metric).prepare(progress=progress)
        result.test_score = float(test_engine.score(result.weights))
        if result.best_single is not None:
            alone = {n: float(n == result.best_single[0]) for n in test_engine.names_}
            result.best_single_test = float(test_engine.score(alone))
    return result
