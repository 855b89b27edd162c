"""split_dataset: the four holdout rules, their validation carve, and leakage invariants."""

from __future__ import annotations

import calendar
import numpy as np
import pandas as pd
import pytest
import tomli_w
from scipy import stats

from xrec.data import Catalog, Dataset, Interactions, load_movielens
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.split import SPLIT_RULES, SplitResult, split_dataset


def _tiny() -> Dataset:
    rows = [
        ("u1", "a", 1), ("u1", "b", 2), ("u1", "c", 3),
        ("u2", "a", 5), ("u2", "d", 5),  # tie: "d" > "a" counts as latest
        ("u3", "e", 1),  # a single interaction: stays in training
        ("u4", "b", 1), ("u4", "c", 2), ("u4", "a", 2),  # tie at t=2: "c" is latest
    ]  # fmt: skip
    frame = pd.DataFrame(rows, columns=["user", "item", "timestamp"])
    catalog = Catalog.from_ids(["f", "a", "b", "c", "d", "e"])  # catalog order is not id order
    return Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name="tiny")


def _pairs(fold: Fold, part: str) -> set[tuple[str, str]]:
    rows = getattr(fold, part)
    users = fold.user_ids[rows["user_idx"].to_numpy()]
    items = fold.catalog.item_ids[rows["item_idx"].to_numpy()]
    return set(zip(users.tolist(), items.tolist()))


def _keys(fold: Fold, part: str) -> np.ndarray:
    """One int64 per (user, item) row; a dataset holds each pair once, so keys identify rows."""
    rows = getattr(fold, part)
    return np.unique(rows["user_idx"].to_numpy() * fold.n_items + rows["item_idx"].to_numpy())


def _overlap(a: np.ndarray, b: np.ndarray) -> int:
    return len(np.intersect1d(a, b, assume_unique=True))


@pytest.fixture(scope="module")
def movielens() -> Dataset:
    return load_movielens()


@pytest.fixture(scope="module")
def ml_splits(movielens) -> dict[str, SplitResult]:
    return {
        "leave_last": split_dataset(movielens, "leave_last"),
        "time_cutoff": split_dataset(movielens, "time_cutoff", cutoff="q0.8"),
        "random": split_dataset(movielens, "random", seed=3),
        "cold_items": split_dataset(movielens, "cold_items", seed=3),
        "mixed_last": split_dataset(movielens, "mixed_last", new_share=0.2, seed=3),
        "mixed_cutoff": split_dataset(movielens, "mixed_cutoff", cutoff="q0.8"),
    }


# --- leave_last on hand-made data ---------------------------------------------------------------


def test_leave_last_holds_out_latest_with_id_tie_break():
    result = split_dataset(_tiny(), "leave_last")
    assert _pairs(result.test, "heldout") == {("u1", "c"), ("u2", "d"), ("u4", "c")}
    assert _pairs(result.test, "train") == {("u1", "a"), ("u1", "b"), ("u2", "a"), ("u3", "e"), ("u4", "b"), ("u4", "a")}
    # Validation: the latest of what is left, for users still holding more than min_train rows.
    assert _pairs(result.validation, "heldout") == {("u1", "b"), ("u4", "a")}
    assert _pairs(result.validation, "train") == {("u1", "a"), ("u2", "a"), ("u3", "e"), ("u4", "b")}


def test_leave_last_tie_break_compares_numeric_ids_as_numbers():
    # "9" and "10" at the same time: as numbers 10 > 9, so "10" is the latest (as strings "9" > "10").
    frame = pd.DataFrame({"user": ["u", "u", "u"], "item": ["1", "9", "10"], "timestamp": [1, 5, 5]})
    catalog = Catalog.from_ids(["1", "9", "10"])
    ds = Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name="numeric")
    result = split_dataset(ds, "leave_last", validation=False)
    assert _pairs(result.test, "heldout") == {("u", "10")}


def test_natural_order_rule():
    from xrec.split import natural_order

    ids = np.array(["b", "10", "9", "a10", "007", "a9", "7", "100000000000000000000000", "0"])
    ordered = ids[natural_order(ids)].tolist()
    # numbers first, by value (equal values by string), then the rest by code point
    assert ordered == ["0", "007", "7", "9", "10", "100000000000000000000000", "a10", "a9", "b"]
    # Reference: Python's int() order for all-digit ids (common practice, no source).
    digits = [s for s in ids.tolist() if s.isdigit()]
    assert [int(s) for s in ordered[: len(digits)]] == sorted(int(s) for s in digits)


def test_leave_last_on_movielens_differs_from_string_tie_break_for_36_users(movielens, ml_splits):
    # Measured when the tie-break moved from string order to natural order: the held-out item
    # changed for 36 of the 671 users (timestamp ties between ids such as "9" and "10").
    f = movielens.interactions.frame
    as_text = f.sort_values(["user", "timestamp", "item"]).groupby("user").tail(1)
    old = set(zip(as_text["user"], as_text["item"]))
    assert len(old - _pairs(ml_splits["leave_last"].test, "heldout")) == 36


def test_leave_last_min_train_keeps_small_users_whole():
    result = split_dataset(_tiny(), "leave_last", min_train=2, validation=False)
    assert _pairs(result.test, "heldout") == {("u1", "c"), ("u4", "c")}
    assert result.validation is None and list(result.folds) == ["test"]


def test_folds_share_user_and_item_index():
    ds = _tiny()
    result = split_dataset(ds, "leave_last")
    for fold in (result.test, result.validation):
        assert fold.user_ids.tolist() == ["u1", "u2", "u3", "u4"]
        assert fold.catalog is ds.catalog
        for part in (fold.train, fold.heldout):
            assert list(part.columns) == ["user_idx", "item_idx", "timestamp", "weight"]
            assert part["user_idx"].dtype == np.int64 and part["item_idx"].dtype == np.int64
            assert part["timestamp"].dtype == np.float64 and part["weight"].dtype == np.float32
        assert fold.train_matrix.shape == (4, 6)


# --- other rules on hand-made data --------------------------------------------------------------


def test_time_cutoff_absolute_and_dropped_rows():
    result = split_dataset(_tiny(), "time_cutoff", cutoff=2, validation=False)
    # t >= 2 held out; u2's rows are all at t=5, so u2 has no training history: dropped.
    assert _pairs(result.test, "heldout") == {("u1", "b"), ("u1", "c"), ("u4", "c"), ("u4", "a")}
    assert _pairs(result.test, "train") == {("u1", "a"), ("u3", "e"), ("u4", "b")}
    assert result.settings["test_dropped_rows"] == 2
    assert result.settings["cutoff_kind"] == "time" and result.settings["test_cutoff_time"] == 2.0


def test_time_cutoff_quantile_keeps_ties_together():
    # Times sorted: 1,1,1,2,2,2,3,5,5 ; share 0.4 -> position floor(3.6)=3 -> cutoff t=2.
    for spec in ("q0.4", 0.4, " Q0.4 "):
        result = split_dataset(_tiny(), "time_cutoff", cutoff=spec, validation=False)
        assert result.settings["test_cutoff_time"] == 2.0
        assert result.test.train["timestamp"].max() < 2.0 <= result.test.heldout["timestamp"].min()


@pytest.mark.parametrize("share", [0.29, 0.57, 0.58, 0.8])
def test_time_cutoff_share_is_not_cut_short_by_rounding(share):
    # 100 rows at distinct times 0..99: a share q keeps exactly round(100 q) rows before the
    # cutoff (plain arithmetic). In floating point 0.29 * 100 = 28.999999999999996, which
    # used to floor to 28 and move one more row to the held-out side.
    t = np.arange(100)
    frame = pd.DataFrame({"user": [f"u{x % 10}" for x in t], "item": [f"i{x // 10}" for x in t], "timestamp": t})
    catalog = Catalog.from_ids([f"i{j}" for j in range(10)])
    ds = Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name="grid")
    result = split_dataset(ds, "time_cutoff", cutoff=share, validation=False)
    assert len(result.test.train) == round(100 * share)
    assert result.settings["test_cutoff_time"] == float(round(100 * share))


def test_time_cutoff_date_string_is_utc():
    ds = Dataset(
        Catalog.from_ids(["a", "b"]),
        Interactions.from_frame(pd.DataFrame({"user": ["u", "u"], "item": ["a", "b"], "timestamp": [1420070399, 1420070400]})),
    )
    result = split_dataset(ds, "time_cutoff", cutoff="2015-01-01", validation=False)
    # Reference: the standard library's calendar.timegm (UTC epoch seconds).
    assert result.settings["cutoff_value"] == float(calendar.timegm((2015, 1, 1, 0, 0, 0)))
    assert _pairs(result.test, "heldout") == {("u", "b")}


def test_random_keeps_min_train_rows():
    ds = _tiny()
    result = split_dataset(ds, "random", test_fraction=0.95, min_train=2, seed=5, validation=False)
    train_counts = result.test.train.groupby("user_idx").size()
    full_counts = ds.interactions.frame.groupby("user").size()
    for u, user in enumerate(result.test.user_ids):
        assert train_counts.get(u, 0) >= min(2, full_counts[user])
    # u1 (3 rows) and u4 (3 rows) can lose one row each; u2 (2 rows) and u3 (1 row) stay whole.
    assert _pairs(result.test, "heldout") <= {("u1", "a"), ("u1", "b"), ("u1", "c"), ("u4", "a"), ("u4", "b"), ("u4", "c")}


def test_cold_items_removes_items_from_training():
    result = split_dataset(_tiny(), "cold_items", cold_fraction=0.2, seed=1, validation=False)
    cold = {i for _, i in _pairs(result.test, "heldout")}
    assert result.settings["test_cold_items"] == 1  # round(0.2 * 5 items with interactions)
    assert not cold & {i for _, i in _pairs(result.test, "train")}


# --- invariants on the MovieLens copy -----------------------------------------------------------


@pytest.mark.parametrize("rule", SPLIT_RULES)
def test_no_leakage_and_validation_carved_from_training(ml_splits, movielens, rule):
    result = ml_splits[rule]
    test, val = result.test, result.validation
    assert len(test.heldout) > 0 and len(val.heldout) > 0
    test_train, test_held = _keys(test, "train"), _keys(test, "heldout")
    val_train, val_held = _keys(val, "train"), _keys(val, "heldout")
    assert len(test_train) == len(test.train) and len(val_train) == len(val.train)  # keys are row ids
    assert _overlap(test_held, test_train) == 0
    assert _overlap(val_held, val_train) == 0
    assert _overlap(val_held, test_held) == 0
    assert _overlap(np.union1d(val_train, val_held), test_train) == len(val_train) + len(val_held)  # subset
    s = result.settings
    assert len(test.train) + len(test.heldout) + s["test_dropped_rows"] == len(movielens.interactions)
    assert len(val.train) + len(val.heldout) + s["validation_dropped_rows"] == len(test.train)
    assert np.array_equal(test.user_ids, val.user_ids) and len(test.user_ids) == 671
    assert s["dataset_fingerprint"] == movielens.fingerprint() and s["rule"] == rule
    assert test.settings["part"] == "test" and val.settings["part"] == "validation"
    tomli_w.dumps(s)  # settings must be writable to a blend file


@pytest.mark.parametrize("rule", ["leave_last", "time_cutoff", "random"])
def test_warm_splits_keep_every_test_user_in_training(ml_splits, rule):
    for fold in ml_splits[rule].folds.values():
        trained = np.bincount(fold.train["user_idx"], minlength=fold.n_users)
        assert (trained[fold.eval_users] >= 1).all()


def test_cold_item_test_items_never_in_training(ml_splits):
    result = ml_splits["cold_items"]
    for fold, key in ((result.test, "test_cold_items"), (result.validation, "validation_cold_items")):
        held_items = np.unique(fold.heldout["item_idx"])
        assert (fold.item_train_counts[held_items] == 0).all()
        assert len(held_items) <= result.settings[key]
        trained = np.bincount(fold.train["user_idx"], minlength=fold.n_users)
        assert (trained[fold.eval_users] >= 1).all()  # rows of users without training were dropped
    assert result.settings["test_cold_items"] == round(0.1 * 9066)


def test_leave_last_on_movielens_matches_groupby(ml_splits, movielens):
    # Leave-one-out by time as in He et al., "Neural Collaborative Filtering" (WWW 2017): each
    # user's latest interaction is the test item. GroupLens README (from memory): 671 users, each
    # with >= 20 ratings, so every user gets one.
    test = ml_splits["leave_last"].test
    assert len(test.heldout) == 671 and len(test.eval_users) == 671
    f = movielens.interactions.frame
    # independent path; among equal timestamps the greatest movie id as a number is the latest
    latest = f.assign(num=f["item"].astype(int)).sort_values(["user", "timestamp", "num"]).groupby("user").tail(1)
    assert _pairs(test, "heldout") == set(zip(latest["user"], latest["item"]))
    latest_time = f.groupby("user")["timestamp"].max()
    held_time = pd.Series(test.heldout["timestamp"].to_numpy(), index=test.user_ids[test.heldout["user_idx"]])
    assert (held_time.sort_index() == latest_time.sort_index()).all()


def test_random_holdout_share_is_binomial(ml_splits, movielens):
    # Each row is held out with probability 0.2 (the min_train cap never binds for users with >= 20
    # ratings at this share in practice); an exact binomial test (scipy.stats.binomtest) must not reject.
    held = len(ml_splits["random"].test.heldout)
    assert stats.binomtest(held, len(movielens.interactions), 0.2).pvalue > 1e-3


def test_time_cutoff_quantile_on_movielens(ml_splits, movielens):
    result = ml_splits["time_cutoff"]
    times = np.sort(movielens.interactions.frame["timestamp"].to_numpy())
    at = result.settings["test_cutoff_time"]
    assert result.test.train["timestamp"].max() < at <= result.test.heldout["timestamp"].min()
    # numpy.quantile with method="inverted_cdf" picks the order statistic at ceil(q*n), 1-based
    # (Hyndman & Fan 1996, definition 1); with q*n not an integer that is our position floor(q*n).
    assert not (0.8 * len(times)).is_integer()
    assert at == np.quantile(times, 0.8, method="inverted_cdf")
    assert (times < at).mean() <= 0.8 < (times <= at).mean()
    assert result.settings["test_dropped_rows"] > 0


# --- determinism --------------------------------------------------------------------------------


@pytest.mark.parametrize("rule", ["random", "cold_items"])
def test_seeded_rules_repeat_and_vary(movielens, ml_splits, rule):
    again = split_dataset(movielens, rule, seed=3)
    other = split_dataset(movielens, rule, seed=4)
    first = ml_splits[rule]
    pd.testing.assert_frame_equal(first.test.heldout, again.test.heldout)
    pd.testing.assert_frame_equal(first.validation.heldout, again.validation.heldout)
    assert first.settings == again.settings
    assert not np.array_equal(_keys(first.test, "heldout"), _keys(other.test, "heldout"))


def test_deterministic_rules_ignore_seed():
    a = split_dataset(_tiny(), "leave_last", seed=1)
    b = split_dataset(_tiny(), "leave_last", seed=2)
    pd.testing.assert_frame_equal(a.test.heldout, b.test.heldout)


# --- bad parameters -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"rule": "newest"}, "rule must be one of"),
        ({"test_fraction": 0.0}, "test_fraction must be a number strictly between 0 and 1"),
        ({"test_fraction": 1}, "test_fraction"),
        ({"test_fraction": "0.2"}, "test_fraction"),
        ({"cold_fraction": 1.5}, "cold_fraction"),
        ({"min_train": 0}, "min_train must be an integer >= 1"),
        ({"min_train": 1.5}, "min_train"),
        ({"seed": -1}, "seed must be an integer >= 0"),
        ({"seed": True}, "seed"),
        ({"validation": "yes"}, "validation must be True or False"),
        ({"rule": "random", "cutoff": 0.5}, "cutoff applies only to rule='time_cutoff'"),
        ({"rule": "time_cutoff", "cutoff": "soon"}, "neither a share"),
        ({"rule": "time_cutoff", "cutoff": "q1.5"}, "quantile must be strictly between 0 and 1"),
        ({"rule": "time_cutoff", "cutoff": float("nan")}, "finite"),
        ({"rule": "time_cutoff", "cutoff": 100.0}, "test split holds out no rows"),
        ({"rule": "time_cutoff", "cutoff": 1.0}, "test split leaves no training rows"),
        ({"rule": "cold_items", "cold_fraction": 0.95}, "would make all 5 items"),
        ({"rule": "leave_last", "min_train": 5}, "test split holds out no rows"),
    ],
)
def test_bad_parameters_raise_config_error(kwargs, message):
    with pytest.raises(ConfigError, match=message):
        split_dataset(_tiny(), **kwargs)


def test_empty_validation_suggests_turning_it_off():
    ds = Dataset(
        Catalog.from_ids(["a", "b"]),
        Interactions.from_frame(pd.DataFrame({"user": ["u", "u"], "item": ["a", "b"], "timestamp": [1, 2]})),
    )
    with pytest.raises(ConfigError, match="validation split holds out no rows.*validation=False"):
        split_dataset(ds, "leave_last")
    assert len(split_dataset(ds, "leave_last", validation=False).test.heldout) == 1


def test_non_dataset_rejected():
    with pytest.raises(ConfigError, match="Dataset"):
        split_dataset(pd.DataFrame(), "leave_last")  # type: ignore[arg-type]


@pytest.mark.parametrize(
    "rule, kwargs",
    [
        ("leave_last", {"min_train": 2}),
        ("random", {"test_fraction": 0.5, "seed": 9}),
        ("cold_items", {"cold_fraction": 0.4, "seed": 2}),
        ("time_cutoff", {"cutoff": np.int64(2)}),
        ("time_cutoff", {"cutoff": pd.Timestamp("1970-01-01 00:00:02", tz="UTC")}),
        ("time_cutoff", {"test_fraction": 0.5}),
    ],
)
def test_settings_reproduce_the_split(rule, kwargs):
    ds = _tiny()
    first = split_dataset(ds, rule, validation=False, **kwargs)
    params = {k: v for k, v in first.settings.items() if k in ("rule", "seed", "validation", "min_train", "test_fraction", "cold_fraction", "cutoff")}
    again = split_dataset(ds, **params)
    pd.testing.assert_frame_equal(first.test.train, again.test.train)
    pd.testing.assert_frame_equal(first.test.heldout, again.test.heldout)
    assert first.settings == again.settings
    tomli_w.dumps(first.settings)
