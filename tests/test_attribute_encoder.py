"""AttributeEncoder: one-hot, multi-hot, robust scaling, quantile bins, balance, unseen values."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.preprocessing import KBinsDiscretizer, MultiLabelBinarizer, OneHotEncoder, RobustScaler

from xrec.data.catalog import Catalog
from xrec.encoders.attributes import AttributeEncoder
from xrec.errors import ConfigError


def _catalog(n: int = 40, seed: int = 0, extra: dict | None = None) -> Catalog:
    rng = np.random.default_rng(seed)
    colours = np.array(["red", "green", "blue", "black"])
    tags = np.array(["summer", "sale", "kids", "outdoor", "new"])
    price = rng.lognormal(3.0, 1.0, n)
    price[0] = 1e5  # outlier the robust scaling must survive
    frame = pd.DataFrame(
        {
            "item": [f"i{k}" for k in range(n)],
            "colour": colours[rng.integers(0, len(colours), n)],
            "tags": ["|".join(tags[rng.random(len(tags)) < 0.4]) for _ in range(n)],
            "price": price,
            "weight_kg": rng.normal(2.0, 0.5, n),
            "title": [f"thing {k}" for k in range(n)],
        }
    )
    for col, values in (extra or {}).items():
        frame[col] = values
    return Catalog.from_frame(frame, categorical=["colour"], multilabel=["tags"], numeric=["price", "weight_kg"], text=["title"])


def test_one_hot_matches_sklearn_one_hot_encoder() -> None:
    cat = _catalog()
    enc = AttributeEncoder(columns=["colour"], balance=False).fit(cat)
    got = enc.transform(cat)
    # reference library: sklearn.preprocessing.OneHotEncoder (categories sorted, one column each)
    ref = OneHotEncoder(sparse_output=False).fit_transform(cat.items[["colour"]].astype(str).to_numpy())
    assert got.dtype == np.float32
    np.testing.assert_array_equal(got, ref.astype(np.float32))
    assert enc.feature_names_ == [f"colour={c}" for c in sorted(set(cat.items["colour"]))]


def test_multi_hot_matches_sklearn_multilabel_binarizer() -> None:
    cat = _catalog()
    enc = AttributeEncoder(columns=["tags"], balance=False).fit(cat)
    got = enc.transform(cat)
    # reference library: sklearn.preprocessing.MultiLabelBinarizer (classes sorted)
    mlb = MultiLabelBinarizer()
    ref = mlb.fit_transform(list(cat.items["tags"]))
    np.testing.assert_array_equal(got, ref.astype(np.float32))
    assert enc.feature_names_ == [f"tags={c}" for c in mlb.classes_]
    assert any(len(t) == 0 for t in cat.items["tags"])  # the data includes items with no label


def test_robust_scaling_matches_sklearn_robust_scaler() -> None:
    cat = _catalog()
    cols = ["price", "weight_kg"]
    enc = AttributeEncoder(columns=cols, balance=False, clip=None).fit(cat)
    got = enc.transform(cat)
    # reference library: sklearn.preprocessing.RobustScaler (median centre, 25-75 % IQR scale)
    ref = RobustScaler().fit_transform(cat.items[cols].to_numpy())
    np.testing.assert_allclose(got, ref, rtol=1e-5, atol=1e-6)


def test_clipping_bounds_outliers_and_keeps_the_rest() -> None:
    cat = _catalog()
    clipped = AttributeEncoder(columns=["price"], balance=False, clip=3.0).fit(cat).transform(cat)[:, 0]
    ref = RobustScaler().fit_transform(cat.items[["price"]].to_numpy())[:, 0]  # reference library: sklearn RobustScaler
    assert clipped[0] == pytest.approx(3.0)  # the 1e5 outlier
    np.testing.assert_allclose(clipped, np.clip(ref, -3.0, 3.0), rtol=1e-5, atol=1e-6)


def test_quantile_bins_match_sklearn_kbins_discretizer() -> None:
    cat = _catalog(n=60)
    enc = AttributeEncoder(columns=["weight_kg"], numeric_bins=4, balance=False).fit(cat)
    got = enc.transform(cat)
    # reference library: sklearn.preprocessing.KBinsDiscretizer, quantile strategy, one-hot output
    kb = KBinsDiscretizer(n_bins=4, encode="onehot-dense", strategy="quantile", quantile_method="averaged_inverted_cdf")
    ref = kb.fit_transform(cat.items[["weight_kg"]].to_numpy())
    np.testing.assert_allclose(enc.bin_edges_["weight_kg"], kb.bin_edges_[0])
    np.testing.assert_array_equal(got, ref.astype(np.float32))
    assert got.sum(axis=0).tolist() == [15.0, 15.0, 15.0, 15.0]


def test_unseen_categories_are_ignored_and_counted() -> None:
    fit_cat = _catalog(n=30, seed=1)
    new = _catalog(n=5, seed=2)
    items = new.items.copy()
    items["colour"] = ["red", "purple", "purple", "blue", "teal"]
    items["tags"] = ["sale|brand-new", "", "kids", "glow|dark", "new"]
    new = Catalog.from_frame(items, categorical=["colour"], multilabel=["tags"], numeric=["price", "weight_kg"], text=["title"])
    enc = AttributeEncoder(columns=["colour", "tags"], balance=False).fit(fit_cat)
    got = enc.transform(new)
    assert enc.unseen_counts_ == {"colour": 3, "tags": 3}
    # reference library: OneHotEncoder(handle_unknown="ignore") gives an all-zero block for unknowns
    ohe = OneHotEncoder(sparse_output=False, handle_unknown="ignore").fit(fit_cat.items[["colour"]].astype(str).to_numpy())
    np.testing.assert_array_equal(got[:, enc.block_slices_["colour"]], ohe.transform(items[["colour"]].astype(str).to_numpy()))
    tags = got[:, enc.block_slices_["tags"]]
    names = [n.split("=", 1)[1] for n in enc.feature_names_[enc.block_slices_["tags"]]]
    assert [sorted(np.asarray(names)[row > 0]) for row in tags] == [["sale"], [], ["kids"], [], ["new"]]


def test_balance_gives_each_block_unit_mean_square_norm_and_weights_multiply() -> None:
    cat = _catalog()
    enc = AttributeEncoder(clip=None).fit(cat)
    out = enc.transform(cat).astype(np.float64)
    for col, sl in enc.block_slices_.items():
        assert np.mean(np.sum(out[:, sl] ** 2, axis=1)) == pytest.approx(1.0, rel=1e-5), col
    weighted = AttributeEncoder(clip=None, block_weights={"tags": 2.0}).fit(cat).transform(cat)
    sl = enc.block_slices_["tags"]
    np.testing.assert_allclose(weighted[:, sl], 2.0 * out[:, sl], rtol=1e-6)
    other = [c for c in enc.columns_ if c != "tags"]
    for col in other:
        np.testing.assert_allclose(weighted[:, enc.block_slices_[col]], out[:, enc.block_slices_[col]], rtol=1e-6)


def test_default_columns_are_all_attribute_columns_in_schema_order() -> None:
    cat = _catalog()
    enc = AttributeEncoder().fit(cat)
    assert enc.columns_ == ("colour", "tags", "price", "weight_kg")
    assert len(enc.feature_names_) == enc.transform(cat).shape[1]
    assert enc.unseen_counts_ == {"colour": 0, "tags": 0, "price": 0, "weight_kg": 0}


@pytest.mark.parametrize(
    ("settings", "needle"),
    [
        ({"columns": ["title"]}, "title"),
        ({"columns": ["nope"]}, "nope"),
        ({"columns": "colour"}, "columns"),
        ({"numeric_bins": 1}, "numeric_bins"),
        ({"clip": -1.0}, "clip"),
        ({"block_weights": {"size": 1.0}}, "size"),
        ({"block_weights": {"colour": -1.0}}, "colour"),
    ],
)
def test_bad_settings_raise_config_error_naming_the_field(settings: dict, needle: str) -> None:
    with pytest.raises(ConfigError, match=needle):
        AttributeEncoder(**settings).fit(_catalog())


def test_no_attribute_columns_is_a_config_error() -> None:
    with pytest.raises(ConfigError, match="no attribute columns"):
        AttributeEncoder().fit(Catalog.from_ids(["a", "b"]))


def test_transform_before_fit_raises() -> None:
    with pytest.raises(RuntimeError, match="not fitted"):
        AttributeEncoder().transform(_catalog())
