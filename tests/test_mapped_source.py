"""The content → collaborative mapping source (``mapped_factors``) and its maps.

Outside references: scikit-learn's ``Ridge`` (same objective, ``fit_intercept=True``) for the
linear map, scikit-learn's ``NearestNeighbors`` (cosine) for the k-NN map's neighbour sets,
and planted data (factors an exact linear function of content plus known noise).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import Ridge
from sklearn.neighbors import NearestNeighbors

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources import make_source
from xrec.sources._factor_map import choose_map, fit_knn_map, fit_ridge_map, score_error
from xrec.sources.mapped import choose_new_item_scale


@pytest.mark.parametrize(("n", "d"), [(200, 30), (40, 90)])  # primal and dual forms
@pytest.mark.parametrize("alpha", [0.1, 10.0])
def test_ridge_map_equals_scikit_learn_ridge(n, d, alpha):
    rng = np.random.default_rng(n + d)
    x, y = rng.standard_normal((n, d)) + 0.5, rng.standard_normal((n, 6)) - 1.0
    ours = fit_ridge_map(x, y, alpha)
    ref = Ridge(alpha=alpha, fit_intercept=True, solver="cholesky").fit(x, y)  # scikit-learn's Ridge
    np.testing.assert_allclose(ours.coef, ref.coef_.T, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(ours.intercept, ref.intercept_, rtol=1e-6, atol=1e-8)
    new = rng.standard_normal((7, d))
    np.testing.assert_allclose(ours.predict(new), ref.predict(new), rtol=1e-4, atol=1e-5)


def test_knn_map_uses_the_cosine_nearest_known_items():
    rng = np.random.default_rng(1)
    x, y, q = rng.standard_normal((60, 5)), rng.standard_normal((60, 3)), rng.standard_normal((9, 5))
    pred = fit_knn_map(x, y, 4).predict(q)
    dist, idx = NearestNeighbors(n_neighbors=4, metric="cosine").fit(x).kneighbors(q)  # scikit-learn
    w = np.clip(1.0 - dist, 0.0, None)
    w[w.sum(axis=1) <= 0] = 1.0
    expected = np.einsum("nk,nkf->nf", w, y[idx]) / w.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(pred, expected, rtol=1e-5, atol=1e-6)


def test_planted_linear_factors_are_recovered_within_noise():
    # factors = content @ W + b + noise: the map's error on unseen items is the noise level
    rng = np.random.default_rng(7)
    n, d, f, noise = 2000, 20, 8, 0.05
    x = rng.standard_normal((n, d))
    w, b = rng.standard_normal((d, f)) * 0.3, rng.standard_normal(f)
    clean = x @ w + b
    y = clean + noise * rng.standard_normal((n, f))
    users = rng.standard_normal((300, f))
    chosen, rows = choose_map(x[:1500], y[:1500], users, methods=["ridge", "knn"], alphas=[0.01, 1.0, 100.0],
                              neighbors=[5, 20], validation_share=0.2, seed=0)
    assert chosen.method == "ridge"  # a linear truth: the linear map validates better than k-NN
    pred = chosen.predict(x[1500:])
    rmse = np.sqrt(((pred - clean[1500:]) ** 2).mean())
    assert rmse < noise  # closer to the clean factors than the noisy targets are
    assert np.sqrt(((pred - y[1500:]) ** 2).mean()) == pytest.approx(noise, rel=0.1)
    gram = users.T @ users / len(users)
    e = pred - clean[1500:]
    assert score_error(pred, clean[1500:], users) == pytest.approx(np.mean(np.sum((e @ gram) * e, axis=1)), rel=1e-5)


def _fold(n_users=80, n_items=60, seed=0) -> Fold:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "item": [f"i{j}" for j in range(n_items)],
        "colour": np.array(["red", "blue", "green", "black"])[rng.integers(0, 4, n_items)],
        "size": rng.lognormal(1.0, 0.5, n_items),
    })  # fmt: skip
    catalog = Catalog.from_frame(frame, categorical=["colour"], numeric=["size"])
    rows = [(u, int(i), 1.0, 1.0) for u in range(n_users) for i in rng.choice(n_items - 10, 6, replace=False)]
    held = [(u, int(n_items - 1 - u % 10), 2.0, 1.0) for u in range(n_users)]  # the last 10 items are new
    cols, types = ["user_idx", "item_idx", "timestamp", "weight"], {"user_idx": "int64", "item_idx": "int64"}
    return Fold(catalog, np.array([f"u{u}" for u in range(n_users)]), pd.DataFrame(rows, columns=cols).astype(types),
                pd.DataFrame(held, columns=cols).astype(types))


def test_known_items_keep_their_als_factors_and_new_items_get_mapped_ones():
    fold = _fold()
    als = {"factors": 6, "iterations": 5, "num_threads": 1}
    src = make_source("mapped_factors", modalities=["attributes"], mapping="ridge", als=als).fit(fold)
    plain = make_source("als", **als).fit(fold)
    new = np.flatnonzero(fold.item_train_counts == 0)
    assert np.array_equal(src.new_items_, new) and len(new) == 10
    known = np.setdiff1d(np.arange(fold.n_items), new)
    np.testing.assert_allclose(src.item_factors_[known], plain.item_factors_[known])
    np.testing.assert_allclose(src.user_factors_, plain.user_factors_)
    content = src.content_vectors(fold)
    ref = Ridge(alpha=src.chosen["setting"]).fit(content[known], plain.item_factors_[known])  # scikit-learn's Ridge
    np.testing.assert_allclose(src.item_factors_[new], ref.predict(content[new]), rtol=1e-3, atol=1e-5)
    assert set(src.validation_["method"]) == {"ridge"}
    users = np.array([0, 5])
    np.testing.assert_allclose(src.score(users), src.user_factors_[users] @ src.item_factors_.T, rtol=1e-6)
    # a scale multiplies the mapped rows only
    scaled = src.with_new_item_scale(3.0)
    np.testing.assert_allclose(scaled.item_factors_[new], 3.0 * src.item_factors_[new], rtol=1e-6)
    np.testing.assert_array_equal(scaled.item_factors_[known], src.item_factors_[known])
    best, table = choose_new_item_scale(src, fold, scales=(1.0, 4.0), metric="hit_rate@10")
    assert best in (1.0, 4.0) and list(table["scale"]) == [1.0, 4.0]
    assert table.loc[table["scale"] == best, "value"].item() == table["value"].max()


@pytest.mark.parametrize(("setting", "value"), [("mapping", "linear"), ("modalities", ["audio"]), ("alphas", [-1.0]),
                                                ("validation_share", 1.0), ("new_item_scale", 0.0)])
def test_bad_settings_are_config_errors(setting, value):
    with pytest.raises(ConfigError, match=setting):
        make_source("mapped_factors", **{setting: value}).fit(_fold())


def test_own_vectors_feed_the_map_alone_or_concatenated(tmp_path):
    from sklearn.preprocessing import normalize as sk_normalize

    fold = _fold()
    rng = np.random.default_rng(3)
    mine = rng.standard_normal((fold.n_items, 5)).astype(np.float32)
    np.save(tmp_path / "mine.npy", mine)
    (tmp_path / "ids.txt").write_text("\n".join(fold.catalog.item_ids.astype(str)), encoding="utf-8")
    vectors = {"mine": {"path": str(tmp_path / "mine.npy"), "ids": str(tmp_path / "ids.txt")}}
    als = {"factors": 6, "iterations": 5, "num_threads": 1}
    both = make_source("mapped_factors", modalities=["attributes", "mine"], vectors=vectors, mapping="ridge", als=als).fit(fold)
    attrs = make_source("mapped_factors", modalities=["attributes"], mapping="ridge", als=als).content_vectors(fold)
    content = both.content_vectors(fold)
    # the concatenation of the L2-normalized blocks (scikit-learn's normalize as the reference)
    np.testing.assert_allclose(content, np.hstack([attrs, sk_normalize(mine)]), rtol=1e-5, atol=1e-6)
    plain = make_source("als", **als).fit(fold)
    new = both.new_items_
    known = np.setdiff1d(np.arange(fold.n_items), new)
    ref = Ridge(alpha=both.chosen["setting"]).fit(content[known], plain.item_factors_[known])  # scikit-learn's Ridge
    np.testing.assert_allclose(both.item_factors_[new], ref.predict(content[new]), rtol=1e-3, atol=1e-5)
    alone = make_source("mapped_factors", modalities=["mine"], vectors=vectors, als=als).fit(fold)
    np.testing.assert_allclose(alone.content_vectors(fold), sk_normalize(mine), rtol=1e-5, atol=1e-6)
    with pytest.raises(ConfigError, match="modalities"):
        make_source("mapped_factors", modalities=["theirs"], vectors=vectors).fit(fold)


def test_new_item_scale_chosen_by_the_two_sided_objective():
    fold = _fold()
    # half the users hold out a known item instead of a new one
    held = fold.heldout.copy()
    train = fold.train
    for u in range(0, fold.n_users, 2):
        held.loc[held["user_idx"] == u, "item_idx"] = int(train.loc[train["user_idx"] == u, "item_idx"].iloc[0])
        train = train[~((train["user_idx"] == u) & (train["item_idx"] == held.loc[held["user_idx"] == u, "item_idx"].iloc[0]))]
    fold = Fold(fold.catalog, fold.user_ids, train.reset_index(drop=True), held.reset_index(drop=True))
    src = make_source("mapped_factors", modalities=["attributes"], mapping="ridge",
                      als={"factors": 6, "iterations": 5, "num_threads": 1}).fit(fold)
    scales = (0.5, 1.0, 3.0, 20.0)
    best, table = choose_new_item_scale(src, fold, scales=scales, metric="hit_rate@10", objective="sides")
    # reference: per-side means by a pandas groupby of each scale's per-user table, then the maximin by hand
    from xrec.evaluate import evaluate

    side = fold.heldout.assign(new=fold.item_train_counts[fold.heldout["item_idx"]] == 0).groupby("user_idx")["new"].any()
    means = {}
    for s in scales:
        pu = evaluate(src.with_new_item_scale(s), fold, ks=(10,), metrics=("hit_rate",)).per_user.set_index("user")["hit_rate@10"]
        means[s] = pu.groupby(side.reindex(pu.index)).mean()
    frame = pd.DataFrame(means).T
    expected = (frame / frame.max()).min(axis=1)
    np.testing.assert_allclose(table["objective"].to_numpy(), expected.to_numpy())
    assert best == expected.idxmax()
    # the overall mean would flood the ranking with new items (the largest scale); the two-sided choice does not
    overall = choose_new_item_scale(src, fold, scales=scales, metric="hit_rate@10")[0]
    assert overall == scales[-1] and best != overall
    assert table["known"].to_numpy() == pytest.approx(frame[False].to_numpy())
    with pytest.raises(ConfigError, match="objective"):
        choose_new_item_scale(src, fold, scales=scales, objective="both")
