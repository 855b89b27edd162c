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
from typing import Any

import numpy as np

from xrec._validation import check_int, parse_metric_column
from xrec.blend._search import DEFAULT_GRID, LearnResult, Tracker, coordinate_ascent, simplex
from xrec.blend.engine import BlendEngine
from xrec.blend.gating import learn_gated_weights
from xrec.errors import ConfigError
from xrec.fold import Fold

__all__ = ["DEFAULT_GRID", "LEARN_METHODS", "LearnResult", "coordinate_ascent", "learn_weights", "pairwise_logistic", "tpe_search"]

LEARN_METHODS = ("coordinate_ascent", "optuna", "logistic", "gated")


def tpe_search(engine: BlendEngine, *, n_trials: int = 100, seed: int = 0, progress: bool = False) -> LearnResult:
    """TPE search with ``optuna`` (seeded ``TPESampler``); corners and uniform weights go first.

    Each trial draws one raw value in ``[0, 1]`` per source; weights are the values over
    their sum (all-zero draws score as the uniform blend).
    """
    import optuna

    check_int(n_trials, "n_trials", low=1)
    names = engine.names_
    n = len(names)
    track = Tracker(engine, progress, "TPE search")
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
    weights = simplex(raw if raw.sum() > 0 else np.ones(n))
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
    seen, truth, n_items = engine.seen_, engine.truth_, engine.fold.n_items
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

    check_int(n_negatives, "n_negatives", low=1)
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
    track = Tracker(engine, False, "logistic")
    single_name, single_score, _ = track.corners()
    if coef.sum() <= 0:
        weights = np.eye(len(names))[names.index(single_name)]
    else:
        weights = simplex(coef)
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
        src_map, normalizers = engine.sources, engine.normalizers
        ks_used = engine.ks
        metric = engine.metric
    else:
        if valid_fold is None:
            raise ConfigError("valid_fold: required when sources are given")
        k = parse_metric_column(metric)[1]
        ks_used = tuple(ks) if ks is not None else (k,)
        engine = BlendEngine(sources, valid_fold, normalizers, users=users, ks=ks_used, metric=metric).prepare(progress=progress)
        src_map = sources
    if method == "gated":
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
