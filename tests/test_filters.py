"""Request-time item filters: masks equal pandas boolean masks, errors name the field, K items come back."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from _bundles import COLOURS, TAGS, small_bundle, small_dataset

from xrec.bundle import ItemTable, load_bundle
from xrec.errors import ConfigError

@pytest.fixture(scope="module")
def dataset():
    return small_dataset()


@pytest.fixture(scope="module")
def table(dataset):
    s = dataset.catalog.schema
    return ItemTable(dataset.catalog.items, s.categorical, s.multilabel, s.numeric)


@pytest.fixture(scope="module")
def bundle(dataset, tmp_path_factory):
    return load_bundle(small_bundle(dataset, tmp_path_factory.mktemp("filters") / "b"))


def pandas_mask(items: pd.DataFrame, filters: dict) -> np.ndarray:
    """Reference: the same conditions as a pandas boolean mask (Series.isin, comparisons, set tests)."""
    mask = pd.Series(True, index=items.index)
    for column, cond in filters.get("attributes", {}).items():
        values = items[column]
        for op, arg in cond.items():
            if op == "equals":
                mask &= values == arg
            elif op == "one_of":
                mask &= values.isin(arg)
            elif op == "none_of" and column == "colour":
                mask &= ~values.isin(arg)
            elif op == "has":
                mask &= values.map(lambda labels, a=arg: a in labels)
            elif op == "any_of":
                mask &= values.map(lambda labels, a=arg: bool(set(labels) & set(a)))
            elif op == "all_of":
                mask &= values.map(lambda labels, a=arg: set(a) <= set(labels))
            elif op == "none_of":
                mask &= values.map(lambda labels, a=arg: not set(labels) & set(a))
            elif op == "min":
                mask &= values >= arg
            elif op == "max":
                mask &= values <= arg
    if "include_items" in filters:
        mask &= items["item"].isin(filters["include_items"])
    if "exclude_items" in filters:
        mask &= ~items["item"].isin(filters["exclude_items"])
    return mask.to_numpy()


colour_values = st.lists(st.sampled_from([*COLOURS, "purple"]), max_size=3)
tag_values = st.lists(st.sampled_from([*TAGS, "zzz"]), max_size=3)
colour_cond = st.one_of(
    st.builds(lambda v: {"equals": v}, st.sampled_from([*COLOURS, "purple"])),
    st.builds(lambda v: {"one_of": v}, colour_values),
    st.builds(lambda v: {"none_of": v}, colour_values),
)
tag_cond = st.dictionaries(st.sampled_from(["any_of", "all_of", "none_of"]), tag_values, min_size=1) | st.builds(
    lambda v: {"has": v}, st.sampled_from(TAGS)
)
bounds = st.floats(0, 110, allow_nan=False).map(lambda x: round(x, 1))
price_cond = st.one_of(
    st.builds(lambda a: {"min": a}, bounds),
    st.builds(lambda a: {"max": a}, bounds),
    st.tuples(bounds, bounds).map(lambda ab: {"min": min(ab), "max": max(ab)}),
)
ids = st.lists(st.sampled_from([f"i{j:02d}" for j in range(60)]), max_size=20)


@st.composite
def filter_specs(draw):
    attributes = {}
    for column, cond in (("colour", colour_cond), ("tags", tag_cond), ("price", price_cond)):
        if draw(st.booleans()):
            attributes[column] = draw(cond)
    out: dict = {"attributes": attributes} if attributes else {}
    if draw(st.booleans()):
        out["include_items"] = draw(ids)
    if draw(st.booleans()):
        out["exclude_items"] = draw(ids)
    return out


@settings(max_examples=300, deadline=None)
@given(filters=filter_specs())
def test_masks_equal_pandas_boolean_masks(table, dataset, filters):
    mask = table.mask(filters)
    expected = pandas_mask(dataset.catalog.items, filters)
    assert np.array_equal(np.ones(len(expected), bool) if mask is None else mask, expected)


def test_shorthands_mean_equals_and_membership(table, dataset):
    items = dataset.catalog.items
    assert np.array_equal(table.mask({"attributes": {"colour": "red"}}), (items["colour"] == "red").to_numpy())
    assert np.array_equal(table.mask({"attributes": {"colour": ["red", "blue"]}}), items["colour"].isin(["red", "blue"]).to_numpy())
    assert np.array_equal(table.mask({"attributes": {"tags": "a"}}), items["tags"].map(lambda t: "a" in t).to_numpy())


@pytest.mark.parametrize(
    ("filters", "field"),
    [
        ("red", "filters"),
        ({"colours": {}}, "filters.colours"),
        ({"attributes": []}, "filters.attributes"),
        ({"attributes": {"size": "xl"}}, "filters.attributes.size"),
        ({"attributes": {"colour": {"is": "red"}}}, "filters.attributes.colour.is"),
        ({"attributes": {"colour": {"one_of": "red"}}}, "filters.attributes.colour.one_of"),
        ({"attributes": {"colour": {"one_of": ["red", 3]}}}, r"filters.attributes.colour.one_of\[1\]"),
        ({"attributes": {"tags": {"any_of": [None]}}}, r"filters.attributes.tags.any_of\[0\]"),
        ({"attributes": {"price": {"max": "cheap"}}}, "filters.attributes.price.max"),
        ({"attributes": {"price": {"min": float("nan")}}}, "filters.attributes.price.min"),
        ({"attributes": {"price": {"min": True}}}, "filters.attributes.price.min"),
        ({"attributes": {"price": {"min": 50, "max": 10}}}, "filters.attributes.price"),
        ({"attributes": {"price": 5}}, "filters.attributes.price"),
        ({"attributes": {"price": {"equals": 5}}}, "filters.attributes.price.equals"),
        ({"include_items": ["i00", "nope"]}, "filters.include_items"),
        ({"exclude_items": "i00"}, "filters.exclude_items"),
        ({"include_items": ["i00"] * 10_001}, "filters.include_items"),
    ],
)
def test_malformed_filters_name_the_field(table, filters, field):
    with pytest.raises(ConfigError, match=rf"^{field}: "):
        table.mask(filters)


def test_filters_apply_before_the_top_k_cut(bundle, dataset):
    items = dataset.catalog.items
    user = bundle.user_ids[3]
    seen = set(bundle.item_ids[bundle.scorer.train_matrix_[3].indices])
    filters = {"attributes": {"colour": {"one_of": ["red", "blue"]}, "price": {"max": 80}}}
    passing = set(items.loc[pandas_mask(items, filters), "item"]) - seen
    assert len(passing) >= 10
    recs = bundle.recommend(user, 10, filters=filters)
    assert len(recs) == 10 and set(recs["item"]) <= passing
    # the filtered list is the unfiltered full ranking restricted to the passing items
    full = bundle.recommend(user, bundle.items.n_items)
    assert recs["item"].tolist() == [i for i in full["item"] if i in passing][:10]
    few = bundle.recommend(user, 10, filters={"include_items": sorted(passing)[:4]})
    assert sorted(few["item"]) == sorted(passing)[:4]


def test_exclude_seen_false_lists_seen_items_after_unseen_ones(bundle):
    u = 5
    seen = set(bundle.item_ids[bundle.scorer.train_matrix_[u].indices])
    n = bundle.items.n_items
    full = bundle.recommend(bundle.user_ids[u], n, exclude_seen=False)
    assert len(full) == n
    assert set(full["item"].iloc[n - len(seen):]) == seen
    only_seen = bundle.recommend(bundle.user_ids[u], 3, exclude_seen=False, filters={"include_items": sorted(seen)})
    assert len(only_seen) == 3 and set(only_seen["item"]) <= seen


def test_unknown_users_get_popular_items_that_pass(bundle, dataset):
    counts = np.bincount(bundle.fold.train["item_idx"], minlength=bundle.items.n_items)
    recs = bundle.recommend("nobody", 5, unknown="popular", filters={"attributes": {"colour": "green"}})
    green = dataset.catalog.items["colour"].to_numpy() == "green"
    # reference: lexsort by (count descending, index ascending) among green items
    order = [j for j in np.lexsort((np.arange(len(counts)), -counts)) if green[j]][:5]
    assert recs["item"].tolist() == bundle.item_ids[order].tolist()
    with pytest.raises(Exception, match="user: unknown user 'nobody'"):
        bundle.recommend("nobody", 5)
