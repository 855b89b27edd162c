"""Per-user normalizers over candidate items, checked against scipy.stats."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.stats import rankdata, zscore

from xrec.blend.normalize import NORMALIZERS, normalize
from xrec.errors import ConfigError, DataError


def _block(seed: int = 0, n_users: int = 40, n_items: int = 30, *, ties: bool = False):
    rng = np.random.default_rng(seed)
    scores = rng.normal(size=(n_users, n_items)).astype(np.float32)
    if ties:
        scores = np.round(scores * 2) / 2  # many exact ties
    seen = sp.random(n_users, n_items, density=0.3, format="csr", random_state=seed, dtype=np.float32)
    seen.data[:] = 1.0
    return scores, seen


def _candidates(seen: sp.csr_matrix, u: int, n_items: int) -> np.ndarray:
    return np.setdiff1d(np.arange(n_items), seen[u].indices)


def test_zscore_matches_scipy_on_candidates():
    scores, seen = _block(1)
    out = normalize(scores, "zscore", seen)
    assert out.dtype == np.float32
    for u in range(scores.shape[0]):
        cand = _candidates(seen, u, scores.shape[1])
        # Reference: scipy.stats.zscore with ddof=0 (population std), on the candidate subset.
        ref = zscore(scores[u, cand].astype(np.float64), ddof=0)
        np.testing.assert_allclose(out[u, cand], ref, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("ties", [False, True])
def test_rank_matches_scipy_rankdata_average(ties):
    scores, seen = _block(2, ties=ties)
    out = normalize(scores, "rank", seen)
    for u in range(scores.shape[0]):
        cand = _candidates(seen, u, scores.shape[1])
        # Reference: scipy.stats.rankdata(method="average"), ascending, rescaled (r-1)/(c-1).
        r = rankdata(scores[u, cand], method="average")
        c = len(cand)
        ref = (r - 1) / (c - 1) if np.ptp(scores[u, cand]) > 0 else np.zeros(c)
        np.testing.assert_allclose(out[u, cand], ref, rtol=1e-6, atol=1e-7)
        if (scores[u, cand] == scores[u, cand].max()).sum() == 1:
            assert out[u, cand].max() == pytest.approx(1.0)  # a unique best candidate gets 1


def test_minmax_on_candidates_ignores_seen_extremes():
    # The seen item (index 0) has the largest raw score, as item-kNN gives seen items;
    # it must not set the scale. Arithmetic: candidates 1, 2, 4 → (x-1)/(4-1) = 0, 1/3, 1.
    scores = np.array([[100.0, 1.0, 2.0, 4.0]], dtype=np.float32)
    seen = sp.csr_matrix(np.array([[1, 0, 0, 0]], dtype=np.float32))
    out = normalize(scores, "minmax", seen)
    np.testing.assert_allclose(out[0, 1:], [0.0, 1 / 3, 1.0], rtol=1e-6)
    assert out[0, 0] == 0.0  # seen item: the row's smallest normalized value


def test_minmax_matches_reference_formula():
    scores, seen = _block(3)
    out = normalize(scores, "minmax", seen)
    for u in range(scores.shape[0]):
        cand = _candidates(seen, u, scores.shape[1])
        x = scores[u, cand].astype(np.float64)
        # Min-max scaling (common practice, no source): (x - min) / (max - min).
        np.testing.assert_allclose(out[u, cand], (x - x.min()) / (x.max() - x.min()), rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("method", NORMALIZERS)
def test_seen_items_never_above_candidates(method):
    scores, seen = _block(4)
    scores = scores + 10 * seen.toarray()  # seen items score highest in raw terms
    out = normalize(scores, method, seen)
    mask = seen.toarray() == 0
    for u in range(scores.shape[0]):
        assert out[u, ~mask[u]].max(initial=-np.inf) <= out[u, mask[u]].min()


@pytest.mark.parametrize("method", ["minmax", "zscore", "rank"])
def test_constant_rows_map_to_zero(method):
    scores = np.array([[3.0, 3.0, 3.0, 9.0], [0.1, 0.1, 0.1, 0.1], [5.0, 1.0, 2.0, 3.0]], dtype=np.float32)
    seen = sp.csr_matrix(np.array([[0, 0, 0, 1], [0, 0, 0, 0], [1, 1, 1, 0]], dtype=np.float32))
    out = normalize(scores, method, seen)
    assert np.isfinite(out).all()
    assert (out[0] == 0).all()  # candidates all 3.0
    assert (out[1] == 0).all()  # every item 0.1
    assert (out[2] == 0).all()  # a single candidate


def test_user_without_candidates_gets_zeros():
    scores = np.array([[1.0, 2.0]], dtype=np.float32)
    seen = sp.csr_matrix(np.ones((1, 2), dtype=np.float32))
    for method in NORMALIZERS:
        out = normalize(scores, method, seen)
        assert (out == 0).all() and np.isfinite(out).all()


def test_none_passes_candidates_through_and_no_seen_means_all_candidates():
    scores, seen = _block(5)
    out = normalize(scores, "none", seen)
    mask = seen.toarray() == 0
    np.testing.assert_array_equal(out[mask], scores[mask])
    full = normalize(scores, "zscore")
    # Reference: scipy.stats.zscore over whole rows when nothing is seen.
    np.testing.assert_allclose(full, zscore(scores.astype(np.float64), axis=1, ddof=0), rtol=1e-5, atol=1e-5)


def test_unknown_method_is_a_config_error():
    with pytest.raises(ConfigError, match="unknown normalizer 'softmax'"):
        normalize(np.zeros((1, 2), dtype=np.float32), "softmax")


@pytest.mark.parametrize("method", ["none", "minmax", "zscore", "rank"])
def test_non_finite_scores_are_refused(method):
    scores = np.array([[0.1, np.nan, 0.3], [0.5, 0.2, np.inf]])
    seen = sp.csr_matrix(np.array([[0, 1, 0], [0, 0, 1]]))
    # refused even where the items are seen: a NaN would leak into the row statistics
    for mask in (None, seen):
        with pytest.raises(DataError, match="2 non-finite values .* first at row 0, item 1"):
            normalize(scores, method, mask)
