"""Built-in sources: popularity, ALS, BPR, item-kNN and attribute similarity."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics.pairwise import cosine_similarity
from sklearn.preprocessing import normalize

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources import (
    ALSSource,
    AttributeSource,
    BPRSource,
    ItemKNNSource,
    PopularitySource,
    make_source,
    source_kinds,
)
from xrec.sources.base import LowRankSource

DAY = 86400.0
N_USERS, N_ITEMS = 12, 10


def _catalog(n_items: int = N_ITEMS) -> Catalog:
    rng = np.random.default_rng(3)
    frame = pd.DataFrame(
        {
            "item": [f"i{j}" for j in range(n_items)],
            "colour": np.array(["red", "blue", "green"])[np.arange(n_items) % 3],
            "tags": ["|".join(t) for t in (["a", "b"], ["b"], ["c"], [], ["a", "c"])] * (n_items // 5) + ["a"] * (n_items % 5),
            "price": rng.lognormal(2.0, 0.7, n_items),
        }
    )
    return Catalog.from_frame(frame, categorical=["colour"], multilabel=["tags"], numeric=["price"])


def _fold(rows, heldout=(), n_users: int = N_USERS, catalog: Catalog | None = None) -> Fold:
    cols = ["user_idx", "item_idx", "timestamp", "weight"]
    train = pd.DataFrame(list(rows), columns=cols).astype({"user_idx": "int64", "item_idx": "int64", "timestamp": "float64", "weight": "float32"})
    held = pd.DataFrame(list(heldout), columns=cols).astype(train.dtypes.to_dict())
    return Fold(catalog=catalog or _catalog(), user_ids=np.array([f"u{u}" for u in range(n_users)]), train=train, heldout=held)


def _random_rows(seed: int = 0, n_users: int = N_USERS - 1, n_items: int = N_ITEMS, density: float = 0.4):
    """Random training rows; the last user of the fold has none."""
    rng = np.random.default_rng(seed)
    rows = []
    for u in range(n_users):
        for i in np.flatnonzero(rng.random(n_items) < density):
            rows.append((u, int(i), float(rng.integers(0, 100)) * DAY, float(rng.integers(1, 6))))
    return rows


SETTINGS = {
    "popularity": {},
    # one thread: implicit's thread pool costs seconds per fit on a busy machine; the
    # factors do not depend on it (checked in test_als_thread_count_does_not_change_factors)
    "als": {"factors": 4, "iterations": 5, "num_threads": 1},
    "bpr": {"factors": 4, "iterations": 20},
    "item_knn": {"neighbors": 5},
    "attributes": {"half_life_days": 30.0},
}


def test_every_kind_is_registered() -> None:
    assert set(SETTINGS) <= set(source_kinds())


@pytest.mark.parametrize("kind", sorted(SETTINGS))
def test_scores_have_block_shape_and_float32(kind: str) -> None:
    fold = _fold(_random_rows())
    src = make_source(kind, **SETTINGS[kind]).fit(fold)
    assert src.fitted_ is True
    users = np.array([3, 0, N_USERS - 1])
    scores = src.score(users)
    assert scores.shape == (3, N_ITEMS) and scores.dtype == np.float32
    assert np.isfinite(scores).all()
    if isinstance(src, LowRankSource):
        assert src.is_low_rank
        assert src.user_factors_.dtype == np.float32 and src.item_factors_.dtype == np.float32
        assert src.user_factors_.shape[0] == N_USERS and src.item_factors_.shape[0] == N_ITEMS
        np.testing.assert_allclose(scores, src.user_factors_[users] @ src.item_factors_.T, rtol=1e-6)


@pytest.mark.parametrize("kind", sorted(SETTINGS))
def test_same_settings_give_identical_scores(kind: str) -> None:
    fold = _fold(_random_rows())
    a = make_source(kind, **SETTINGS[kind]).fit(fold).score(np.arange(N_USERS))
    b = make_source(kind, **SETTINGS[kind]).fit(_fold(_random_rows())).score(np.arange(N_USERS))
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("kind", ["als", "bpr"])
def test_seed_changes_factorization(kind: str) -> None:
    fold = _fold(_random_rows())
    a = make_source(kind, **SETTINGS[kind], random_state=0).fit(fold)
    b = make_source(kind, **SETTINGS[kind], random_state=1).fit(fold)
    assert not np.array_equal(a.item_factors_, b.item_factors_)


@pytest.mark.parametrize("kind", sorted(SETTINGS))
def test_heldout_rows_never_change_scores(kind: str) -> None:
    rows = _random_rows()
    quiet = _fold(rows, heldout=[(0, 1, 500 * DAY, 1.0)])
    loud = _fold(rows, heldout=[(u, i, 900 * DAY, 5.0) for u in range(N_USERS) for i in range(N_ITEMS)])
    a = make_source(kind, **SETTINGS[kind]).fit(quiet).score(np.arange(N_USERS))
    b = make_source(kind, **SETTINGS[kind]).fit(loud).score(np.arange(N_USERS))
    np.testing.assert_array_equal(a, b)


def test_user_without_history_gets_zero_row_from_factor_models() -> None:
    fold = _fold(_random_rows())
    for kind in ("als", "bpr", "attributes", "item_knn"):
        scores = make_source(kind, **SETTINGS[kind]).fit(fold).score(np.array([N_USERS - 1]))
        assert np.array_equal(scores, np.zeros_like(scores)), kind


# ---------------------------------------------------------------- popularity
def test_popularity_equals_counts() -> None:
    rows = _random_rows()
    fold = _fold(rows)
    src = PopularitySource().fit(fold)
    # reference library: pandas value_counts of the training item column
    ref = fold.train["item_idx"].value_counts().reindex(range(N_ITEMS), fill_value=0).to_numpy()
    scores = src.score(np.arange(N_USERS))
    np.testing.assert_array_equal(scores, np.tile(ref.astype(np.float32), (N_USERS, 1)))


def test_popularity_weighted_and_recent() -> None:
    rows = [(0, 0, 0.0, 5.0), (1, 0, 1 * DAY, 1.0), (2, 1, 8 * DAY, 2.0), (0, 2, 9 * DAY, 1.0), (1, 2, 10 * DAY, 1.0)]
    fold = _fold(rows)
    weighted = PopularitySource(weighted=True).fit(fold).popularity_
    # reference library: pandas groupby-sum of weights per item
    ref = fold.train.groupby("item_idx")["weight"].sum().reindex(range(N_ITEMS), fill_value=0).to_numpy()
    np.testing.assert_array_equal(weighted, ref.astype(np.float32))
    recent = PopularitySource(recent_days=2.0).fit(fold).popularity_  # days 8..10 count
    assert recent[:3].tolist() == [0.0, 1.0, 2.0] and recent[3:].sum() == 0
    with pytest.raises(ConfigError, match="recent_days"):
        PopularitySource(recent_days=0).fit(fold)


# --------------------------------------------------------------------- ALS/BPR
def _two_groups_fold() -> Fold:
    """Users 0-5 use items 0-4, users 6-11 items 5-9; each user misses one in-group item."""
    rows = []
    for u in range(N_USERS):
        group = range(0, 5) if u < 6 else range(5, 10)
        skip = list(group)[u % 5]
        rows += [(u, i, float(i), 1.0) for i in group if i != skip]
    return _fold(rows)


@pytest.mark.parametrize(("kind", "settings"), [("als", {"factors": 4, "iterations": 15, "regularization": 0.1, "num_threads": 1}), ("bpr", {"factors": 4, "iterations": 200, "learning_rate": 0.05})])
def test_factor_models_recover_two_disjoint_groups(kind: str, settings: dict) -> None:
    fold = _two_groups_fold()
    scores = make_source(kind, **settings).fit(fold).score(np.arange(N_USERS))
    for u in range(N_USERS):
        group = np.arange(0, 5) if u < 6 else np.arange(5, 10)
        other = np.setdiff1d(np.arange(N_ITEMS), group)
        missed = group[u % 5]
        assert scores[u, missed] > scores[u, other].max(), (kind, u)


def test_als_thread_count_does_not_change_factors() -> None:
    from implicit.cpu.als import AlternatingLeastSquares
    from threadpoolctl import threadpool_limits

    fold = _fold(_random_rows())
    src = ALSSource(factors=4, iterations=5, num_threads=2).fit(fold)
    with threadpool_limits(1, "blas"):
        single = AlternatingLeastSquares(factors=4, iterations=5, random_state=0, num_threads=1)
        single.fit(fold.train_matrix, show_progress=False)
    np.testing.assert_array_equal(src.user_factors_[:-1], single.user_factors[:-1])  # last user: no rows, zeroed
    np.testing.assert_array_equal(src.item_factors_, single.item_factors)


def test_als_use_weights_false_binarizes() -> None:
    rows = _random_rows()
    ones = [(u, i, t, 1.0) for u, i, t, _ in rows]
    a = ALSSource(factors=4, iterations=5, use_weights=False, num_threads=1).fit(_fold(rows))
    b = ALSSource(factors=4, iterations=5, num_threads=1).fit(_fold(ones))
    np.testing.assert_array_equal(a.user_factors_, b.user_factors_)
    c = ALSSource(factors=4, iterations=5, num_threads=1).fit(_fold(rows))
    assert not np.array_equal(a.user_factors_, c.user_factors_)


def test_bpr_ignores_weights() -> None:
    rows = _random_rows()
    ones = [(u, i, t, 1.0) for u, i, t, _ in rows]
    a = BPRSource(factors=4, iterations=10).fit(_fold(rows))
    b = BPRSource(factors=4, iterations=10).fit(_fold(ones))
    np.testing.assert_array_equal(a.item_factors_, b.item_factors_)


# -------------------------------------------------------------------- item-kNN
@pytest.mark.parametrize("binarize", [False, True])
def test_item_knn_cosine_matches_sklearn(binarize: bool) -> None:
    fold = _fold(_random_rows(seed=5))
    src = ItemKNNSource(neighbors=N_ITEMS, binarize=binarize, chunk_size=3).fit(fold)
    x = fold.train_matrix.toarray().astype(np.float64)
    if binarize:
        x = (x > 0).astype(np.float64)
    # reference library: sklearn.metrics.pairwise.cosine_similarity between item columns
    ref = cosine_similarity(x.T)
    np.fill_diagonal(ref, 0.0)  # an item is not its own neighbour (common practice, no source)
    np.testing.assert_allclose(src.similarity_.toarray(), ref, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(src.score(np.arange(N_USERS)), x @ ref, rtol=1e-5, atol=1e-5)


def test_item_knn_keeps_the_top_neighbours_of_each_item() -> None:
    fold = _fold(_random_rows(seed=6))
    k = 3
    sim = ItemKNNSource(neighbors=k, chunk_size=4).fit(fold).similarity_.toarray()
    ref = cosine_similarity(fold.train_matrix.T.toarray())  # reference library: sklearn cosine_similarity
    np.fill_diagonal(ref, 0.0)
    for i in range(N_ITEMS):
        assert np.count_nonzero(sim[i]) <= k
        np.testing.assert_allclose(np.sort(sim[i])[::-1][:k], np.sort(ref[i])[::-1][:k], rtol=1e-5, atol=1e-6)
        kept = np.flatnonzero(sim[i])
        np.testing.assert_allclose(sim[i, kept], ref[i, kept], rtol=1e-5)


def test_item_knn_scores_chunked_equal_unchunked() -> None:
    fold = _fold(_random_rows(seed=7))
    users = np.array([5, 1, 1, 9, 0, 11, 3])
    a = ItemKNNSource(neighbors=4, chunk_size=2).fit(fold).score(users)
    b = ItemKNNSource(neighbors=4, chunk_size=1000).fit(fold).score(users)
    np.testing.assert_allclose(a, b, rtol=1e-6)


# ------------------------------------------------------------------ attributes
def test_attribute_scores_equal_sklearn_cosine_of_profile_and_items() -> None:
    fold = _fold(_random_rows(seed=8))
    src = AttributeSource().fit(fold)
    vectors = src.encoder_.transform(fold.catalog).astype(np.float64)
    unit = normalize(vectors)  # reference library: sklearn.preprocessing.normalize (L2 rows)
    users = np.arange(N_USERS - 1)  # the last user has no history
    profiles = np.stack([unit[fold.train.loc[fold.train["user_idx"] == u, "item_idx"]].mean(axis=0) for u in users])
    # reference library: sklearn.metrics.pairwise.cosine_similarity
    np.testing.assert_allclose(src.score(users), cosine_similarity(profiles, vectors), rtol=1e-5, atol=1e-6)


def test_attribute_half_life_weights_recent_items() -> None:
    fold = _fold(_random_rows(seed=9))
    h = 10.0
    src = AttributeSource(half_life_days=h).fit(fold)
    unit = normalize(src.encoder_.transform(fold.catalog).astype(np.float64))
    u = 2
    rows = fold.train[fold.train["user_idx"] == u]
    age = (rows["timestamp"].max() - rows["timestamp"]).to_numpy() / DAY
    w = 0.5 ** (age / h)  # exponential decay with half-life h: weight halves every h days (from memory)
    profile = (w[:, None] * unit[rows["item_idx"].to_numpy()]).sum(axis=0) / w.sum()
    np.testing.assert_allclose(src.score(np.array([u]))[0], cosine_similarity(profile[None], unit)[0], rtol=1e-5, atol=1e-6)
    plain = AttributeSource().fit(fold).score(np.array([u]))[0]
    assert not np.allclose(plain, src.score(np.array([u]))[0])


def test_attribute_source_columns_and_bins() -> None:
    fold = _fold(_random_rows())
    src = AttributeSource(columns=["colour"]).fit(fold)
    assert src.encoder_.columns_ == ("colour",)
    # one colour per item → same-colour items get cosine 1 with a single-item profile
    one = _fold([(0, 0, 0.0, 1.0)])
    scores = AttributeSource(columns=["colour"]).fit(one).score(np.array([0]))[0]
    colours = one.catalog.items["colour"].to_numpy()
    np.testing.assert_allclose(scores, (colours == colours[0]).astype(np.float32), atol=1e-6)
    binned = AttributeSource(columns=["price"], numeric_bins=2).fit(fold)
    assert binned.item_factors_.shape == (N_ITEMS, 2)
    with pytest.raises(ConfigError, match="half_life_days"):
        AttributeSource(half_life_days=-1.0).fit(fold)
    with pytest.raises(ConfigError, match="nope"):
        AttributeSource(columns=["nope"]).fit(fold)
    with pytest.raises(ConfigError, match="columns"):
        AttributeSource(columns="colour").fit(fold)


# ----------------------------------------------------------------- make_source
def test_make_source_builds_and_rejects_unknown_settings() -> None:
    src = make_source("als", factors=8)
    assert isinstance(src, ALSSource) and src.factors == 8
    assert src.get_params()["random_state"] == 0
    with pytest.raises(ConfigError, match="learning_rate"):
        make_source("als", learning_rate=0.1)
    with pytest.raises(ConfigError, match="neighbours"):
        make_source("item_knn", neighbours=10)
    with pytest.raises(ConfigError, match="unknown source kind"):
        make_source("nearest")


@pytest.mark.parametrize(
    ("kind", "settings", "needle"),
    [
        ("als", {"factors": 0}, "factors"),
        ("als", {"alpha": -1.0}, "alpha"),
        ("als", {"num_threads": -1}, "num_threads"),
        ("bpr", {"learning_rate": 0.0}, "learning_rate"),
        ("item_knn", {"neighbors": 0}, "neighbors"),
        ("item_knn", {"neighbors": 2.5}, "neighbors"),
    ],
)
def test_bad_values_raise_config_error_on_fit(kind: str, settings: dict, needle: str) -> None:
    with pytest.raises(ConfigError, match=needle):
        make_source(kind, **settings).fit(_fold(_random_rows()))


def test_score_before_fit_raises() -> None:
    with pytest.raises(RuntimeError, match="not fitted"):
        ItemKNNSource().score(np.array([0]))
    with pytest.raises(RuntimeError, match="not fitted"):
        ALSSource().score(np.array([0]))


# --- training weights at the edge of float32 ------------------------------------------------------


def _with_weight(value: float) -> Fold:
    rows = _random_rows()
    rows[0] = (*rows[0][:3], value)
    return _fold(rows)


@pytest.mark.parametrize("value", [1e30, 2e19])
def test_als_refuses_weights_whose_squares_overflow_float32(value) -> None:
    # float32's largest value is about 3.4e38 (IEEE 754 binary32, numpy.finfo), so strengths above
    # sqrt(3.4e38) ~ 1.84e19 cannot be squared; 1e30 used to fail inside implicit with a NaN error.
    with np.errstate(over="ignore"):
        assert np.isinf(np.float32(value) ** 2) and np.isfinite(np.float32(value))
    from xrec.errors import DataError

    with pytest.raises(DataError, match=r"als: training weights × alpha reach .*overflows float32"):
        make_source("als", **SETTINGS["als"]).fit(_with_weight(value))
    # alpha scales the strengths too
    with pytest.raises(DataError, match="alpha"):
        make_source("als", **SETTINGS["als"], alpha=1e12).fit(_with_weight(1e8))


def test_als_fit_failure_inside_implicit_is_an_xrec_error(monkeypatch) -> None:
    from implicit.cpu.als import AlternatingLeastSquares
    from implicit.recommender_base import ModelFitError  # what implicit raises on NaN factors

    from xrec.errors import DataError

    def fail(self, *args, **kwargs):
        raise ModelFitError("NaN encountered in factors")

    monkeypatch.setattr(AlternatingLeastSquares, "fit", fail)
    with pytest.raises(DataError, match=r"als: the factorization failed: NaN encountered in factors \(training weights range from 1 to 5") as info:
        make_source("als", **SETTINGS["als"]).fit(_fold(_random_rows()))
    assert isinstance(info.value.__cause__, ModelFitError)


def test_experiment_names_the_source_whose_fit_failed(tmp_path) -> None:
    from xrec.errors import DataError
    from xrec.experiment import fit_source

    with pytest.raises(DataError, match=r"^sources\.mf: als: training weights"):
        fit_source("mf", make_source("als", **SETTINGS["als"]), _with_weight(1e30))
