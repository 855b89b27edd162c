"""The mixed protocol (``mixed_last``, ``mixed_cutoff``): known and new items held out together.

The invariants are checked against plain pandas computations of the same facts (first-seen
time per item by ``groupby().min()``, users without training rows by set difference), not
against the split's own bookkeeping.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from xrec.data import Catalog, Dataset, Interactions
from xrec.errors import ConfigError
from xrec.split import split_dataset


def _dataset(n_users: int = 300, n_items: int = 120, n_rows: int = 4000, seed: int = 0) -> Dataset:
    rng = np.random.default_rng(seed)
    # items are introduced over time: item j cannot be bought before day j
    item = rng.integers(0, n_items, n_rows)
    day = item + rng.integers(0, 200, n_rows)
    frame = pd.DataFrame({"user": [f"u{u}" for u in rng.integers(0, n_users, n_rows)], "item": [f"i{j}" for j in item],
                          "timestamp": day * 86400.0 + rng.integers(0, 86400, n_rows)})
    # a few users who arrive late: every row of theirs falls after any reasonable cutoff
    late = pd.DataFrame({"user": [f"late{k % 15}" for k in range(60)], "item": [f"i{j}" for j in rng.integers(0, n_items, 60)],
                         "timestamp": (n_items + 200 + rng.integers(0, 20, 60)) * 86400.0})
    frame = pd.concat([frame, late]).drop_duplicates(["user", "item"])
    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    return Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name="mixed")


def _items(fold, part: str) -> set[str]:
    return set(fold.catalog.item_ids[getattr(fold, part)["item_idx"].to_numpy()].tolist())


@pytest.mark.parametrize("share", [0.1, 0.3])
def test_mixed_last_new_items_never_in_their_folds_training_rows(share):
    result = split_dataset(_dataset(), "mixed_last", new_share=share, seed=3)
    for part, fold in result.folds.items():
        new = set(fold.catalog.item_ids[fold.new_items].tolist())
        assert new, part
        assert not new & _items(fold, "train"), part  # no leakage
        held_items = fold.catalog.item_ids[fold.heldout["item_idx"].to_numpy()]
        achieved = np.isin(held_items, list(new)).mean()
        assert achieved == pytest.approx(result.settings[f"{part}_new_share_achieved"])
        # at least the asked share, overshooting by at most one item's held-out rows
        most = pd.Series(held_items).value_counts().max() / len(held_items)
        assert share <= achieved <= share + most, part
    # the validation fold is carved from the test fold's training rows
    assert _items(result.validation, "heldout") <= _items(result.test, "train")


def test_mixed_last_validation_holds_new_items_in_the_same_proportion():
    result = split_dataset(_dataset(n_users=600, n_rows=9000), "mixed_last", new_share=0.25)
    test_share = result.settings["test_new_share_achieved"]
    valid_share = result.settings["validation_new_share_achieved"]
    assert test_share >= 0.25 and valid_share >= 0.25
    assert abs(test_share - valid_share) < 0.05


def test_mixed_last_makes_the_most_recently_introduced_items_new():
    ds = _dataset()
    fold = split_dataset(ds, "mixed_last", new_share=0.2, validation=False).test
    frame = ds.interactions.frame
    first_seen = frame.groupby("item")["timestamp"].min()  # pandas, independent of the split's arrays
    held = set(fold.catalog.item_ids[fold.heldout["item_idx"].to_numpy()].tolist())
    new = set(fold.catalog.item_ids[fold.new_items].tolist())
    known_held = held - new
    assert first_seen[list(new)].min() >= first_seen[list(known_held)].max() - 1e-9 or \
        first_seen[list(new)].min() > first_seen[list(known_held)].median()
    # every row of a new item that is not held out has left the fold
    removed = frame[frame["item"].isin(new)]
    assert len(removed) - fold.heldout["item_idx"].isin(fold.new_items).sum() == split_dataset(
        ds, "mixed_last", new_share=0.2, validation=False).settings["test_new_item_rows_removed"]


def test_mixed_cutoff_new_items_are_the_items_first_seen_after_the_cutoff():
    ds = _dataset()
    result = split_dataset(ds, "mixed_cutoff", cutoff=0.7, validation=False)
    fold, at = result.test, result.settings["test_cutoff_time"]
    frame = ds.interactions.frame
    first_seen = frame.groupby("item")["timestamp"].min()
    expected = set(first_seen[first_seen >= at].index) & set(frame.loc[frame["timestamp"] >= at, "item"])
    assert set(fold.catalog.item_ids[fold.new_items].tolist()) == expected
    assert not expected & _items(fold, "train")


@pytest.mark.parametrize("rule", ["keep", "drop"])
def test_cold_users_are_kept_or_dropped_and_always_counted(rule):
    ds = _dataset()
    result = split_dataset(ds, "mixed_cutoff", cutoff=0.6, cold_users=rule, validation=False)
    fold, s = result.test, result.settings
    frame = ds.interactions.frame
    before = set(frame.loc[frame["timestamp"] < s["test_cutoff_time"], "user"])
    after = set(frame.loc[frame["timestamp"] >= s["test_cutoff_time"], "user"])
    cold = after - before  # users whose every row is after the cutoff
    assert cold and s["test_cold_users"] == len(cold)
    assert s["test_cold_user_rows"] == int(frame["user"].isin(cold).sum())
    held_users = set(fold.user_ids[fold.heldout["user_idx"].to_numpy()].tolist())
    if rule == "keep":
        assert cold <= held_users
        assert set(fold.user_ids[fold.cold_users].tolist()) == cold
        assert s["test_heldout_rows"] == int((frame["timestamp"] >= s["test_cutoff_time"]).sum())
    else:
        assert not cold & held_users and len(fold.cold_users) == 0
        assert s["test_dropped_rows"] == s["test_cold_user_rows"]


def test_mixed_settings_are_checked():
    ds = _dataset()
    with pytest.raises(ConfigError, match="new_share"):
        split_dataset(ds, "leave_last", new_share=0.2)
    with pytest.raises(ConfigError, match="new_share"):
        split_dataset(ds, "mixed_last", new_share=1.5)
    with pytest.raises(ConfigError, match="cold_users"):
        split_dataset(ds, "mixed_last", cold_users="ignore")
    with pytest.raises(ConfigError, match="cold_users"):
        split_dataset(ds, "random", cold_users="drop")
    with pytest.raises(ConfigError, match="cutoff"):
        split_dataset(ds, "mixed_last", cutoff=0.5)
    again = split_dataset(ds, "mixed_last", new_share=0.2, seed=1)
    assert again.settings == split_dataset(ds, "mixed_last", new_share=0.2, seed=1).settings
    assert again.test.heldout.equals(split_dataset(ds, "mixed_last", new_share=0.2, seed=1).test.heldout)


def _introduced_over_time(n_users=500, n_items=200, n_rows=8000, seed=0) -> Dataset:
    """Item j is on sale from day 3j for 100 days, so the latest items are first seen after any late cutoff."""
    rng = np.random.default_rng(seed)
    item = rng.integers(0, n_items, n_rows)
    day = item * 3 + rng.integers(0, 100, n_rows)
    frame = pd.DataFrame({"user": [f"u{u}" for u in rng.integers(0, n_users, n_rows)], "item": [f"i{j}" for j in item],
                          "timestamp": day * 86400.0 + rng.integers(0, 86400, n_rows)}).drop_duplicates(["user", "item"])
    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    return Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name="introduced")


def test_mixed_cutoff_validation_holds_new_items_in_the_test_proportion():
    result = split_dataset(_introduced_over_time(), "mixed_cutoff", cutoff=0.8)
    s = result.settings
    valid, test = result.validation, result.test
    # shares recomputed with pandas from the folds' rows: held-out rows on items absent from training
    def share(fold):
        train_items = set(fold.train["item_idx"])
        return float((~fold.heldout["item_idx"].isin(train_items)).mean())

    assert share(test) == pytest.approx(s["test_new_share_achieved"])
    assert share(valid) == pytest.approx(s["validation_new_share_achieved"])
    # the natural share after the inner cutoff is lower here, so items were added until it matched:
    # at least the test share, overshooting by at most one item's held-out rows
    assert s["validation_new_share_natural"] < s["test_new_share_achieved"]
    assert s["validation_new_items_added_to_match"] > 0
    most = valid.heldout["item_idx"].value_counts().max() / len(valid.heldout)
    assert s["test_new_share_achieved"] <= share(valid) <= s["test_new_share_achieved"] + most
    # no leakage: validation's new items have no row in its training part, and validation comes from test's training rows
    new = set(valid.catalog.item_ids[valid.new_items].tolist())
    assert new and not new & _items(valid, "train")
    assert _items(valid, "heldout") <= _items(test, "train")
