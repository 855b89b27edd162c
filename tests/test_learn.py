"""Weight learning: recovery of a known blend, never worse than one source, test scores beside validation."""

from __future__ import annotations

import numpy as np
import pytest

from xrec.blend import Blend
from xrec.blend.engine import BlendEngine
from xrec.blend.learn import LearnResult, learn_weights
from xrec.blend.normalize import normalize
from xrec.errors import ConfigError
from xrec.evaluate import evaluate
from xrec.fold import Fold

from _synthetic import FixedScores, argmax_heldout, fixed_sources, pairs_frame, synthetic_fold

TRUE = (0.6, 0.3, 0.1)


def known_blend_problem(n_users=300, n_items=120, weights=TRUE, noise=0.05, seed=0):
    """Held-out item of each user = argmax over candidates of Σ w_s zscore_s + small noise.

    Sources are iid normal scores, so the generating weights are the only structure.
    """
    rng = np.random.default_rng(seed)
    rows = [(u, int(i)) for u in range(n_users) for i in rng.choice(n_items, 5, replace=False)]
    probe = synthetic_fold(n_users, n_items, pairs_frame(rows))
    seen = probe.train_matrix
    raws = [rng.standard_normal((n_users, n_items)).astype(np.float32) for _ in weights]
    truth = sum(w * normalize(r, "zscore", seen).astype(np.float64) for w, r in zip(weights, raws))
    truth = truth + noise * rng.standard_normal(truth.shape)
    fold = argmax_heldout(probe, truth)
    return fold, fixed_sources(fold, raws)


@pytest.fixture(scope="module")
def problem():
    return known_blend_problem()


@pytest.mark.parametrize("method, options", [("coordinate_ascent", {"n_restarts": 1}), ("logistic", {"n_negatives": 20})])
def test_recovers_known_weights(problem, method, options):
    fold, sources = problem
    result = learn_weights(sources, fold, method, metric="mrr@120", seed=0, **options)
    w = np.array([result.weights[f"s{j}"] for j in range(3)])
    assert w.sum() == pytest.approx(1.0) and (w >= 0).all()
    # Tolerance from runs on 4 seeds of a smaller problem (200 × 100): worst error 0.034
    # (coordinate ascent) and 0.022 (logistic) per weight; ratios to s0 within 12 % and 35 %.
    np.testing.assert_allclose(w, TRUE, atol=0.05)
    assert w[1] / w[0] == pytest.approx(0.5, rel=0.15)


def test_never_below_best_single_source():
    # s0 is the truth; s1 is its negation plus noise, s2 is noise: any mix with s1 hurts.
    fold, sources = known_blend_problem(n_users=150, n_items=60, weights=(1.0, 0.0, 0.0), seed=3)
    m = sources["s0"].matrix
    sources["s1"] = FixedScores(-m + 0.3 * np.random.default_rng(1).standard_normal(m.shape).astype(np.float32)).fit(fold)
    singles = {}
    for name, src in sources.items():
        # the plain path, independent of the engine
        singles[name] = evaluate(Blend({name: src}, {name: 1.0}).fit(fold), fold, ks=(10,), metrics=("ndcg",)).means()["ndcg@10"]
    best = max(singles.values())
    for method, options in [("coordinate_ascent", {"n_restarts": 0, "refine": 0}), ("optuna", {"n_trials": 8})]:
        result = learn_weights(sources, fold, method, metric="ndcg@10", seed=0, **options)
        assert result.best_single == ("s0", pytest.approx(best))
        assert result.valid_score >= best


def test_optuna_is_seeded(problem):
    fold, sources = problem
    engine = BlendEngine(sources, fold, metric="ndcg@10").prepare()
    a = learn_weights(engine, method="optuna", n_trials=12, seed=5)
    b = learn_weights(engine, method="optuna", n_trials=12, seed=5)
    assert a.weights == b.weights and a.valid_score == b.valid_score
    assert len(a.history) <= 12


def test_test_score_side_by_side(problem):
    fold, sources = problem
    valid = Fold(fold.catalog, fold.user_ids, fold.train, fold.heldout.iloc[::2])
    test = Fold(fold.catalog, fold.user_ids, fold.train, fold.heldout.iloc[1::2])
    result = learn_weights(sources, valid, "logistic", metric="ndcg@10", seed=0, test_fold=test)
    assert isinstance(result, LearnResult)
    plain = evaluate(Blend(sources, result.weights).fit(test), test, ks=(10,), metrics=("ndcg",)).means()["ndcg@10"]
    assert result.test_score == pytest.approx(plain, abs=1e-12)
    name = result.best_single[0]
    plain_single = evaluate(Blend({name: sources[name]}, {name: 1.0}).fit(test), test, ks=(10,), metrics=("ndcg",)).means()["ndcg@10"]
    assert result.best_single_test == pytest.approx(plain_single, abs=1e-12)
    table = result.summary()
    assert list(table.columns) == ["validation", "test"] and len(table) == 2


def test_bad_method_is_named(problem):
    fold, sources = problem
    with pytest.raises(ConfigError, match="method"):
        learn_weights(sources, fold, "grid")
