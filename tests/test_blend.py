"""Weighted blends: arithmetic, weight checks, sharing fitted sources, and use with evaluate()."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.stats import zscore

from xrec.blend import Blend
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources.base import Source


class TableSource(Source):
    """Scores read from a fixed users × items table (unregistered: kind left empty)."""

    def __init__(self, table: np.ndarray) -> None:
        self.table = table
        self.fit_calls = 0
        self.score_calls = 0

    def fit(self, fold: Fold) -> TableSource:
        self.fit_calls += 1
        self.fitted_ = True
        return self

    def score(self, users: np.ndarray) -> np.ndarray:
        self._check_fitted()
        self.score_calls += 1
        return self.table[np.asarray(users)].astype(np.float32)


def make_fold(n_users: int, n_items: int, seen: list[tuple[int, int]], heldout: list[tuple[int, int]] = ()) -> Fold:
    def rows(pairs):
        pairs = list(pairs)
        return pd.DataFrame(
            {
                "user_idx": np.array([p[0] for p in pairs], dtype=np.int64),
                "item_idx": np.array([p[1] for p in pairs], dtype=np.int64),
                "timestamp": np.zeros(len(pairs)),
                "weight": np.ones(len(pairs), dtype=np.float32),
            }
        )

    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    return Fold(catalog, np.array([f"u{u}" for u in range(n_users)]), rows(seen), rows(heldout))


def test_minmax_blend_worked_example():
    # One user, four items, item 0 seen in training.
    # a = [9, 1, 2, 3] → candidates 1, 2, 3 min-max: (x-1)/(3-1) = 0, 0.5, 1
    # b = [0, 4, 0, 2] → candidates 4, 0, 2 min-max: (x-0)/(4-0) = 1, 0, 0.5
    # 1.0·a + 0.5·b = 0.5, 0.5, 1.25; the seen item gets 0 + 0 = 0 (each source's row minimum).
    fold = make_fold(1, 4, [(0, 0)])
    a = TableSource(np.array([[9.0, 1, 2, 3]]))
    b = TableSource(np.array([[0.0, 4, 0, 2]]))
    blend = Blend({"a": a, "b": b}, {"a": 1.0, "b": 0.5}, normalizers="minmax").fit(fold)
    out = blend.score(np.array([0]))
    assert out.dtype == np.float32
    np.testing.assert_allclose(out[0], [0.0, 0.5, 0.5, 1.25], rtol=1e-6)


def test_zscore_blend_matches_scipy_per_source():
    rng = np.random.default_rng(0)
    n_users, n_items = 6, 12
    ta, tb = rng.normal(size=(2, n_users, n_items))
    seen = [(u, j) for u in range(n_users) for j in rng.choice(n_items, 3, replace=False)]
    fold = make_fold(n_users, n_items, seen)
    blend = Blend({"a": TableSource(ta), "b": TableSource(tb)}, {"a": 0.7, "b": 2.0}).fit(fold)
    out = blend.score(np.arange(n_users))
    train = fold.train_matrix.toarray() > 0
    for u in range(n_users):
        cand = ~train[u]
        # Reference: scipy.stats.zscore (ddof=0) of each source over the user's candidates.
        ref = 0.7 * zscore(ta[u, cand].astype(np.float32), ddof=0) + 2.0 * zscore(tb[u, cand].astype(np.float32), ddof=0)
        np.testing.assert_allclose(out[u, cand], ref, rtol=1e-5, atol=1e-5)
        assert out[u, ~cand].max() <= out[u, cand].min()


def test_per_source_normalizers():
    fold = make_fold(1, 4, [(0, 0)])
    a = TableSource(np.array([[9.0, 1, 2, 3]]))
    b = TableSource(np.array([[0.0, 4, 0, 2]]))
    blend = Blend({"a": a, "b": b}, {"a": 1.0, "b": 1.0}, normalizers={"a": "rank", "b": "none"}).fit(fold)
    # a ranks over candidates 1, 2, 3 → (r-1)/(c-1) = 0, 0.5, 1; b raw = 4, 0, 2 → sums 4, 0.5, 3.
    np.testing.assert_allclose(blend.score(np.array([0]))[0, 1:], [4.0, 0.5, 3.0], rtol=1e-6)


def test_zero_weight_source_is_never_scored():
    fold = make_fold(2, 3, [])
    a, b = TableSource(np.ones((2, 3))), TableSource(np.ones((2, 3)))
    blend = Blend({"a": a, "b": b}, {"a": 1.0, "b": 0.0}).fit(fold)
    blend.score(np.arange(2))
    assert a.score_calls == 1 and b.score_calls == 0


@pytest.mark.parametrize(
    ("weights", "message"),
    [
        ({"a": 1.0, "b": math.nan}, r"weights\.b: must be a finite number"),
        ({"a": 1.0, "b": math.inf}, r"weights\.b: must be a finite number"),
        ({"a": 1.0, "b": -1}, r"weights\.b: must be >= 0, got -1"),
        ({"a": 0.0, "b": 0}, r"all weights are zero"),
        ({"a": 1.0, "b": 1.0, "c": 1.0}, r"\['c'\] are not sources"),
        ({"a": 1.0}, r"no weight for source\(s\) \['b'\]"),
        ({"a": 1.0, "b": "heavy"}, r"weights\.b: must be a number"),
        ({"a": 1.0, "b": True}, r"weights\.b: must be a number"),
    ],
)
def test_invalid_weights_name_the_source(weights, message):
    sources = {"a": TableSource(np.ones((1, 2))), "b": TableSource(np.ones((1, 2)))}
    with pytest.raises(ConfigError, match=message):
        Blend(sources, weights)


def test_invalid_normalizers():
    sources = {"a": TableSource(np.ones((1, 2))), "b": TableSource(np.ones((1, 2)))}
    with pytest.raises(ConfigError, match=r"normalizers\.b: unknown normalizer 'softmax'"):
        Blend(sources, {"a": 1, "b": 1}, normalizers={"a": "zscore", "b": "softmax"})
    with pytest.raises(ConfigError, match=r"no normalizer for source\(s\) \['b'\]"):
        Blend(sources, {"a": 1, "b": 1}, normalizers={"a": "zscore"})
    with pytest.raises(ConfigError, match="sources"):
        Blend({}, {})


def test_with_weights_shares_fitted_sources():
    rng = np.random.default_rng(1)
    fold = make_fold(4, 9, [(0, 1), (2, 3), (2, 4)])
    a, b = TableSource(rng.normal(size=(4, 9))), TableSource(rng.normal(size=(4, 9)))
    blend = Blend({"a": a, "b": b}, {"a": 1.0, "b": 0.0}).fit(fold)
    before = blend.score(np.arange(4))
    other = blend.with_weights({"a": 0.2, "b": 0.8})
    assert other.sources["a"] is a and other.sources["b"] is b
    fresh = Blend({"a": a, "b": b}, {"a": 0.2, "b": 0.8}).fit(fold)
    np.testing.assert_array_equal(other.score(np.arange(4)), fresh.score(np.arange(4)))
    assert a.fit_calls == 1 and b.fit_calls == 1  # neither with_weights nor fit refits fitted sources
    other.fit(fold, refit=True)
    assert a.fit_calls == 2 and b.fit_calls == 2
    np.testing.assert_array_equal(blend.score(np.arange(4)), before)  # the original is untouched
    assert blend.weights == {"a": 1.0, "b": 0.0}
    with pytest.raises(ConfigError, match=r"weights\.a: must be >= 0"):
        blend.with_weights({"a": -0.5, "b": 1.0})


def test_non_finite_source_scores_are_a_data_error():
    from xrec.errors import DataError

    table = np.ones((3, 4))
    table[2, 1] = np.nan
    blend = Blend({"a": TableSource(table)}, {"a": 1.0}).fit(make_fold(3, 4, []))
    with pytest.raises(DataError, match=r"source 'a' returned 1 non-finite scores .* user index 2"):
        blend.score(np.arange(3))


def test_score_before_fit_is_an_error():
    blend = Blend({"a": TableSource(np.ones((1, 2)))}, {"a": 1.0})
    with pytest.raises(RuntimeError, match="not fitted"):
        blend.score(np.array([0]))


def test_single_source_blend_keeps_the_source_ranking_in_evaluate():
    from xrec.evaluate import evaluate
    from xrec.sources import make_source

    rng = np.random.default_rng(3)
    n_users, n_items = 30, 25
    seen = [(u, int(j)) for u in range(n_users) for j in rng.choice(n_items, 4, replace=False)]
    held = [(u, int(next(j for j in rng.permutation(n_items) if (u, j) not in seen))) for u in range(n_users)]
    fold = make_fold(n_users, n_items, seen, held)
    knn = make_source("item_knn", neighbors=10).fit(fold)
    for normalizer in ("none", "minmax", "zscore", "rank"):
        blend = Blend({"knn": knn}, {"knn": 2.0}, normalizers=normalizer).fit(fold)
        # A positive multiple of a per-user monotone transform keeps each user's order, so
        # every rank-based metric must be unchanged (common practice, no source).
        card_blend = evaluate(blend, fold, ks=(5,), metrics=("hit_rate", "ndcg")).to_dict()["per_user"]
        card_src = evaluate(knn, fold, ks=(5,), metrics=("hit_rate", "ndcg")).to_dict()["per_user"]
        assert card_blend == card_src, normalizer
