"""The seeded scale-problem generator: shapes, determinism, and sources that xrec fits the same way."""

from __future__ import annotations

import numpy as np
import pytest

from xrec.errors import ConfigError
from xrec.evaluate._synthetic_scale import SHAPES, GeneratedFactors, make_scale_problem, scale_problem
from xrec.sources.content import user_profiles
from xrec.sources.popularity import PopularitySource


@pytest.fixture(scope="module")
def problem():
    return make_scale_problem(300, 500, 20, heldout_per_user=2, seed=3)


def test_rows_are_disjoint_and_every_user_has_heldout(problem):
    train, held = problem.train, problem.heldout
    assert train.shape == held.shape == (300, 500)
    assert (np.diff(held.indptr) == 2).all()
    assert train.multiply(held).nnz == 0
    per_user = np.diff(train.indptr)
    assert per_user.max() == 20 and per_user.mean() > 19


def test_same_seed_same_problem_other_seed_other_problem(problem):
    again = make_scale_problem(300, 500, 20, heldout_per_user=2, seed=3)
    assert (again.train != problem.train).nnz == 0
    for name, src in problem.sources.items():
        np.testing.assert_array_equal(src.item_factors_, again.sources[name].item_factors_)
    other = make_scale_problem(300, 500, 20, heldout_per_user=2, seed=4)
    assert (other.train != problem.train).nnz > 0


def test_fold_matches_csr_and_sources_match_what_xrec_fits(problem):
    fold = problem.fold
    assert (fold.train_matrix != problem.train).nnz == 0
    assert (fold.heldout_matrix != problem.heldout).nnz == 0
    fitted = PopularitySource().fit(fold)
    np.testing.assert_array_equal(problem.sources["popularity"].item_factors_, fitted.item_factors_)
    for label in ("text", "image"):
        src = problem.sources[label]
        np.testing.assert_allclose(src.user_factors_, user_profiles(fold, src.item_factors_), atol=1e-6)
        # fit keeps the generated state
        assert src.fit(fold) is src
    # unit-norm item vectors, as the content sources make them
    np.testing.assert_allclose(np.linalg.norm(problem.sources["text"].item_factors_, axis=1), 1.0, atol=1e-5)


def test_bad_settings_are_refused():
    with pytest.raises(ConfigError, match="train_per_user"):
        make_scale_problem(10, 20, 0)
    with pytest.raises(ConfigError, match="at most half"):
        make_scale_problem(10, 20, 15)
    with pytest.raises(ConfigError, match="shape"):
        scale_problem("ml-100")
    src = GeneratedFactors.from_factors("x", np.ones((3, 2)), np.ones((4, 2)))
    with pytest.raises(ConfigError, match="3 users × 4 items"):
        src.fit(make_scale_problem(5, 20, 2).fold)


def test_named_shapes():
    # GroupLens ML-20M README: 20,000,263 ratings by 138,493 users (from memory)
    assert SHAPES["ml-20m"][0] == 138_493
    assert SHAPES["ml-20m"][0] * SHAPES["ml-20m"][2] == pytest.approx(20_000_263, rel=0.01)
    small = scale_problem("ml-1m", n_users=50)
    assert small.train.shape == (50, 3706)
