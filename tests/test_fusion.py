"""Tuning-free fusion: reciprocal rank fusion, CombSUM and CombMNZ on hand-computed examples."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from xrec.blend import CombMNZ, CombSum, ReciprocalRankFusion, make_fusion
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources.base import Source


class TableSource(Source):
    """Scores read from a fixed users × items table (unregistered)."""

    def __init__(self, table: np.ndarray) -> None:
        self.table = np.asarray(table, dtype=np.float32)

    def fit(self, fold: Fold) -> TableSource:
        self.fitted_ = True
        return self

    def score(self, users: np.ndarray) -> np.ndarray:
        return self.table[np.asarray(users)]


def make_fold(n_users: int, n_items: int, seen: list[tuple[int, int]]) -> Fold:
    frame = pd.DataFrame(
        {
            "user_idx": np.array([p[0] for p in seen], dtype=np.int64),
            "item_idx": np.array([p[1] for p in seen], dtype=np.int64),
            "timestamp": np.zeros(len(seen)),
            "weight": np.ones(len(seen), dtype=np.float32),
        }
    )
    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    return Fold(catalog, np.array([f"u{u}" for u in range(n_users)]), frame, frame.iloc[:0])


# One user, five items; item 4 is seen in training (its huge score under A must not matter).
# Candidates are items 0..3.
#   A = [0.9, 0.5, 0.5, 0.1, 5.0]  → descending ranks 1, 2.5, 2.5, 4 (items 1 and 2 tie on 2 and 3)
#   B = [1,   3,   2,   4,   0  ]  → descending ranks 4, 2, 3, 1
A = [[0.9, 0.5, 0.5, 0.1, 5.0]]
B = [[1.0, 3.0, 2.0, 4.0, 0.0]]


@pytest.fixture()
def pair():
    fold = make_fold(1, 5, [(0, 4)])
    return {"a": TableSource(A), "b": TableSource(B)}, fold


def test_rrf_worked_example(pair):
    sources, fold = pair
    out = ReciprocalRankFusion(sources).fit(fold).score(np.array([0]))[0]
    # Reciprocal rank fusion, Cormack, Clarke & Büttcher (SIGIR 2009): Σ 1/(k + rank), k = 60.
    # item 0: 1/61 + 1/64   = 0.0163934 + 0.0156250 = 0.0320184
    # item 1: 1/62.5 + 1/62 = 0.0160000 + 0.0161290 = 0.0321290
    # item 2: 1/62.5 + 1/63 = 0.0160000 + 0.0158730 = 0.0318730
    # item 3: 1/64 + 1/61   = 0.0320184
    # item 4 (seen): the row's lowest value, 0.0318730
    expected = [1 / 61 + 1 / 64, 1 / 62.5 + 1 / 62, 1 / 62.5 + 1 / 63, 1 / 64 + 1 / 61, 1 / 62.5 + 1 / 63]
    np.testing.assert_allclose(out, expected, rtol=1e-6)
    np.testing.assert_allclose(out[:4], [0.0320184, 0.0321290, 0.0318730, 0.0320184], atol=1e-7)


def test_rrf_depth_keeps_ties_at_the_cut(pair):
    sources, fold = pair
    out = ReciprocalRankFusion(sources, k=60, depth=2).fit(fold).score(np.array([0]))[0]
    # depth 2: A retrieves items 0 (none above), 1 and 2 (one above each: tied at the cut);
    # B retrieves items 3 and 1. Contributions outside a source's top 2 are 0.
    # item 0: 1/61; item 1: 1/62.5 + 1/62; item 2: 1/62.5; item 3: 1/61.
    np.testing.assert_allclose(out[:4], [1 / 61, 1 / 62.5 + 1 / 62, 1 / 62.5, 1 / 61], rtol=1e-6)


def test_combsum_worked_example(pair):
    sources, fold = pair
    out = CombSum(sources).fit(fold).score(np.array([0]))[0]
    # CombSUM (Fox & Shaw, TREC-2 1994) on per-user min-max over candidates:
    #   A: (x - 0.1) / 0.8 = 1, 0.5, 0.5, 0      B: (x - 1) / 3 = 0, 2/3, 1/3, 1
    #   sum = 1, 7/6, 5/6, 1; the seen item gets the row minimum 5/6.
    np.testing.assert_allclose(out, [1.0, 7 / 6, 5 / 6, 1.0, 5 / 6], rtol=1e-6)


def test_combmnz_worked_example(pair):
    sources, fold = pair
    out = CombMNZ(sources, depth=2).fit(fold).score(np.array([0]))[0]
    # CombMNZ (Fox & Shaw, TREC-2 1994) = CombSUM × number of sources retrieving the item.
    # Top-2 (ties at the cut kept): A → {0, 1, 2}, B → {3, 1}; counts 1, 2, 1, 1.
    #   1·1, (7/6)·2, (5/6)·1, 1·1 = 1, 7/3, 5/6, 1; the seen item gets the row minimum 5/6.
    np.testing.assert_allclose(out, [1.0, 7 / 3, 5 / 6, 1.0, 5 / 6], rtol=1e-6)
    # With the default depth 100 every candidate is retrieved by both: 2 × CombSUM.
    full = CombMNZ(sources).fit(fold).score(np.array([0]))[0]
    np.testing.assert_allclose(full[:4], [2.0, 7 / 3, 5 / 3, 2.0], rtol=1e-6)


def test_rank_fusion_on_many_users_matches_a_loop():
    rng = np.random.default_rng(0)
    n_users, n_items = 7, 15
    ta = rng.integers(0, 4, size=(n_users, n_items)).astype(float)  # many ties
    tb = rng.normal(size=(n_users, n_items))
    seen = [(u, int(j)) for u in range(n_users) for j in rng.choice(n_items, 3, replace=False)]
    fold = make_fold(n_users, n_items, seen)
    out = ReciprocalRankFusion({"a": TableSource(ta), "b": TableSource(tb)}, k=10).fit(fold).score(np.arange(n_users))
    train = fold.train_matrix.toarray() > 0
    for u in range(n_users):
        cand = np.flatnonzero(~train[u])
        ref = np.zeros(len(cand))
        for t in (ta, tb):
            x = t[u, cand].astype(np.float32)
            # 1-based descending rank with ties sharing the mean: 1 + #higher + (#equal - 1)/2.
            ranks = np.array([1 + (x > v).sum() + ((x == v).sum() - 1) / 2 for v in x])
            ref += 1 / (10 + ranks)
        np.testing.assert_allclose(out[u, cand], ref, rtol=1e-6)


def test_fusion_settings_are_checked():
    sources = {"a": TableSource(A)}
    with pytest.raises(ConfigError, match="k: must be a finite number > 0"):
        ReciprocalRankFusion(sources, k=0)
    with pytest.raises(ConfigError, match="depth: must be a positive integer"):
        ReciprocalRankFusion(sources, depth=0)
    with pytest.raises(ConfigError, match="non-negative normalizer"):
        CombMNZ(sources, normalizer="zscore")
    with pytest.raises(ConfigError, match="unknown fusion rule 'borda'"):
        make_fusion("borda", sources)
    with pytest.raises(ConfigError, match=r"unknown setting\(s\) \['depth'\]"):
        make_fusion("combsum", sources, depth=3)
    assert make_fusion("rrf", sources, k=10).get_params() == {"k": 10.0, "depth": None}


def test_fusion_runs_in_evaluate():
    from xrec.evaluate import evaluate
    from xrec.sources import make_source

    rng = np.random.default_rng(5)
    n_users, n_items = 20, 30
    seen = [(u, int(j)) for u in range(n_users) for j in rng.choice(n_items, 5, replace=False)]
    train = pd.DataFrame(
        {"user_idx": [s[0] for s in seen], "item_idx": [s[1] for s in seen], "timestamp": 0.0, "weight": np.float32(1)}
    )
    held = pd.DataFrame({"user_idx": np.arange(n_users), "item_idx": rng.integers(0, n_items, n_users), "timestamp": 1.0,
                         "weight": np.float32(1)})
    held = held[~held.set_index(["user_idx", "item_idx"]).index.isin(list(map(tuple, seen)))]
    fold = Fold(Catalog.from_ids([f"i{j}" for j in range(n_items)]), np.array([f"u{u}" for u in range(n_users)]), train, held)
    sources = {"pop": make_source("popularity"), "knn": make_source("item_knn", neighbors=5)}
    for rule in (ReciprocalRankFusion(sources), CombSum(sources), CombMNZ(sources, depth=10)):
        card = evaluate(rule.fit(fold), fold, ks=(10,), metrics=("hit_rate",))
        values = np.asarray(card.to_dict()["per_user"]["hit_rate@10"])
        assert len(values) == len(held) and set(np.unique(values)) <= {0.0, 1.0}
