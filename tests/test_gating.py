"""Popularity-gated blends: bands, scoring formula, engine equality, learning, blend-file round trip."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from xrec.blend import Blend
from xrec.blend.engine import BlendEngine
from xrec.blend.gating import BANDS, GatedBlend, PopularityBands, learn_gated_weights
from xrec.blend.normalize import normalize
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.evaluate import evaluate
from xrec.fold import Fold

from _synthetic import argmax_heldout, fixed_sources, pairs_frame, synthetic_fold


def test_bands_from_counts_worked_example():
    # Worked by hand from the definition: counts sorted 10, 5, 3, 1, 1, 0 (total 20).
    counts = np.array([1, 10, 0, 3, 5, 1])
    # 20 % of 20 = 4 interactions: the first item (10) already holds them -> head_min = 10.
    assert PopularityBands.from_counts(counts, 0.2).head_min == 10
    # 60 % = 12: 10 + 5 = 15 >= 12 -> head_min = 5.
    bands = PopularityBands.from_counts(counts, 0.6)
    assert bands.head_min == 5
    np.testing.assert_array_equal(bands.assign(counts), [1, 2, 0, 1, 2, 1])
    table = bands.describe(counts)
    assert table["items"].tolist() == [1, 3, 2] and table["interactions"].tolist() == [0, 5, 15]
    # ties at the edge stay together: both items with 5 are head
    assert PopularityBands.from_counts(np.array([5, 5, 1]), 0.3).head_min == 5
    with pytest.raises(ConfigError, match="head_min"):
        PopularityBands(0)


def banded_problem(n_users=240, n_items=80, seed=0):
    """Items 0-9 never trained (new), a popular head and a tail; the truth uses a different
    source per band: s0 decides among head items, s1 among tail items, s2 among new items."""
    rng = np.random.default_rng(seed)
    weights = np.r_[np.zeros(10), np.linspace(8, 1, n_items - 10) ** 2]
    weights /= weights.sum()
    rows = [(u, int(i)) for u in range(n_users) for i in rng.choice(n_items, 6, replace=False, p=weights)]
    probe = synthetic_fold(n_users, n_items, pairs_frame(rows))
    band = PopularityBands.from_counts(probe.item_train_counts, 0.5).assign(probe.item_train_counts)
    raws = [rng.standard_normal((n_users, n_items)).astype(np.float32) for _ in range(3)]
    z = [normalize(r, "zscore", probe.train_matrix) for r in raws]
    truth = np.select([band == 2, band == 1, band == 0], [z[0], z[1], z[2]]) + 0.05 * rng.standard_normal((n_users, n_items))
    fold = argmax_heldout(probe, truth)
    return fold, fixed_sources(fold, raws)


def test_scores_follow_the_formula():
    fold, sources = banded_problem(n_users=30)
    bw = {"new": {"s0": 0.0, "s1": 0.2, "s2": 1.0}, "tail": {"s0": 0.3, "s1": 0.7, "s2": 0.0}, "head": {"s0": 0.9, "s1": 0.1, "s2": 0.05}}
    gated = GatedBlend(sources, bw, "zscore", head_share=0.5).fit(fold)
    users = np.arange(30)
    band = gated.item_band_
    expected = np.zeros((30, fold.n_items))
    for name, src in sources.items():
        norm = normalize(src.score(users), "zscore", fold.train_matrix[users]).astype(np.float64)
        w = np.array([bw[b][name] for b in BANDS])[band]
        expected += norm * w[None, :]
    np.testing.assert_allclose(gated.score(users), expected, rtol=1e-5, atol=1e-5)
    # one weight vector in every band is the plain blend, to the bit
    same = gated.with_weights({"s0": 0.5, "s1": 0.3, "s2": 0.2})
    plain = Blend(sources, {"s0": 0.5, "s1": 0.3, "s2": 0.2}, "zscore").fit(fold)
    np.testing.assert_array_equal(same.score(users), plain.score(users))


def test_engine_equals_evaluate_for_gated_weights():
    fold, sources = banded_problem(n_users=120, seed=1)
    bw = {"new": {"s0": 0.1, "s1": 0.2, "s2": 0.7}, "tail": {"s0": 0.2, "s1": 0.6, "s2": 0.2}, "head": {"s0": 0.8, "s1": 0.1, "s2": 0.1}}
    gated = GatedBlend(sources, bw, "rank", head_share=0.5).fit(fold)
    card = evaluate(gated, fold, ks=(5, 10), metrics=("hit_rate", "ndcg", "recall", "mrr"))
    engine = BlendEngine(sources, fold, "rank", ks=(5, 10)).prepare()
    mine = engine.per_user(gated)
    for col in card.metric_columns:
        np.testing.assert_array_equal(mine[col].to_numpy(), card.per_user[col].to_numpy(), err_msg=col)


def test_gated_learning_beats_ungated_when_bands_differ():
    fold, sources = banded_problem(seed=2)
    engine = BlendEngine(sources, fold, "zscore", metric="mrr@80", ks=(80,)).prepare()
    bands = PopularityBands.from_counts(fold.item_train_counts, 0.5)
    result = learn_gated_weights(engine, bands, n_restarts=0, refine=1, max_sweeps=3, seed=0)
    ungated = result.best_single[1]
    assert result.valid_score >= ungated
    assert result.valid_score > ungated + 0.05
    bw = result.band_weights
    # each band leans on the source that decides it
    assert max(bw["head"], key=bw["head"].get) == "s0"
    assert max(bw["tail"], key=bw["tail"].get) == "s1"
    assert max(bw["new"], key=bw["new"].get) == "s2"
    # the reported score is what evaluate() gives the exported blend
    gated = GatedBlend(sources, bw, "zscore", head_min=result.details["head_min"]).fit(fold)
    plain = evaluate(gated, fold, ks=(80,), metrics=("mrr",)).means()["mrr@80"]
    assert plain == pytest.approx(result.valid_score, abs=1e-12)


def test_bad_band_weights_are_named():
    fold, sources = banded_problem(n_users=20)
    bw = {b: {"s0": 1.0, "s1": 0.0, "s2": 0.0} for b in BANDS}
    bw["tail"] = {"s0": -1.0, "s1": 0.0, "s2": 0.0}
    with pytest.raises(ConfigError, match="band_weights.tail.s0"):
        GatedBlend(sources, bw)
    with pytest.raises(ConfigError, match="band"):
        GatedBlend(sources, {"head": {"s0": 1.0, "s1": 0, "s2": 0}})


def test_blend_file_round_trip_reproduces_top_k(tmp_path):
    from xrec.blendfile import read_blend, save_blend
    from xrec.data import Dataset, Interactions
    from xrec.evaluate import top_k_items
    from xrec.runtime import load_blend
    from xrec.sources import make_source
    from xrec.split import split_dataset

    rng = np.random.default_rng(11)
    n_users, n_items = 70, 40
    pop = np.r_[np.zeros(6), np.linspace(6, 1, n_items - 6) ** 2]
    pop /= pop.sum()
    rows = []
    for u in range(n_users):
        for t, i in enumerate(rng.choice(n_items, int(rng.integers(4, 12)), replace=False, p=pop)):
            rows.append((f"u{u:03d}", f"i{i:02d}", float(1000 * u + t)))
    catalog = Catalog.from_ids([f"i{j:02d}" for j in range(n_items)])
    frame = pd.DataFrame(rows, columns=["user", "item", "timestamp"])
    dataset = Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name="gated-toy")
    split = split_dataset(dataset, "leave_last", seed=0)
    sources = {"pop": make_source("popularity"), "knn": make_source("item_knn", neighbors=10)}
    bw = {"new": {"pop": 0.0, "knn": 1.0}, "tail": {"pop": 0.2, "knn": 0.8}, "head": {"pop": 0.7, "knn": 0.3}}
    gated = GatedBlend(sources, bw, {"pop": "minmax", "knn": "zscore"}, head_share=0.3).fit(split.test)
    path = save_blend(tmp_path / "gated.toml", gated, dataset=dataset)
    spec = read_blend(path)
    assert spec.method == "gated" and spec.method_params["head_min"] == gated.bands_.head_min
    runtime = load_blend(path, dataset)
    users = np.arange(n_users)
    expected = top_k_items(gated.score(users), split.test.train_matrix, 10)
    np.testing.assert_array_equal(runtime.top_items(users, 10), expected)
    # and the engine's numbers for the exported weights equal the plain evaluation
    card = evaluate(gated, split.test, ks=(10,), metrics=("ndcg", "hit_rate"))
    engine = BlendEngine(gated.sources, split.test, gated.normalizers, ks=(10,), metrics=("ndcg", "hit_rate")).prepare()
    mine = engine.per_user(gated)
    np.testing.assert_array_equal(mine["ndcg@10"].to_numpy(), card.per_user["ndcg@10"].to_numpy())


def test_learn_weights_entry_point_reports_test_score():
    from xrec.blend.learn import learn_weights

    fold, sources = banded_problem(n_users=160, seed=4)
    valid = Fold(fold.catalog, fold.user_ids, fold.train, fold.heldout.iloc[::2])
    test = Fold(fold.catalog, fold.user_ids, fold.train, fold.heldout.iloc[1::2])
    result = learn_weights(sources, valid, "gated", metric="ndcg@10", seed=0, test_fold=test, n_restarts=0, refine=0, max_sweeps=2)
    gated = GatedBlend(sources, result.band_weights, "zscore", head_min=result.details["head_min"]).fit(test)
    plain = evaluate(gated, test, ks=(10,), metrics=("ndcg",)).means()["ndcg@10"]
    assert result.test_score == pytest.approx(plain, abs=1e-12)
    assert result.valid_score >= result.best_single[1]


def test_a_band_with_too_few_validation_rows_is_reported_not_learned():
    fold, sources = banded_problem(seed=2)
    engine = BlendEngine(sources, fold, "zscore", metric="mrr@80", ks=(80,)).prepare()
    bands = PopularityBands.from_counts(fold.item_train_counts, 0.5)
    item_band = bands.assign(fold.item_train_counts)
    held = np.bincount(item_band[fold.heldout["item_idx"].to_numpy()], minlength=3)  # numpy count, not the learner's
    cut = int(held[0]) + 1  # the new band falls short, the others do not
    assert held[1] >= cut and held[2] >= cut
    start = {n: 1.0 for n in sources}
    result = learn_gated_weights(engine, bands, start=start, n_restarts=2, refine=1, max_sweeps=2, seed=0, min_band_heldout=cut)
    assert result.details["band_heldout"] == {"new": int(held[0]), "tail": int(held[1]), "head": int(held[2])}
    assert result.details["unlearned_bands"] == {"new": int(held[0])}
    assert set(result.details["learned_bands"]) == {"tail", "head"}
    new = np.array(list(result.band_weights["new"].values()))
    assert np.allclose(new, new[0]) and new[0] > 0  # the (even) start, up to the common scale of all weights
    learned = learn_gated_weights(engine, bands, start=start, n_restarts=0, refine=1, max_sweeps=2, seed=0)
    assert learned.details["unlearned_bands"] == {} and learned.band_weights["new"] != result.band_weights["new"]
