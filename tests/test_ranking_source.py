"""The ``ranking`` source: a production top-N list per user, read from CSV or Parquet."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import rankdata

from xrec.blend import normalize
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.evaluate import evaluate
from xrec.fold import Fold
from xrec.sources import RankingSource, make_source

N_USERS, N_ITEMS = 4, 12


def _fold(train=(), heldout=()) -> Fold:
    cols = ["user_idx", "item_idx", "timestamp", "weight"]
    types = {"user_idx": "int64", "item_idx": "int64", "timestamp": "float64", "weight": "float32"}
    tr = pd.DataFrame([(u, i, 0.0, 1.0) for u, i in train], columns=cols).astype(types)
    ho = pd.DataFrame([(u, i, 1.0, 1.0) for u, i in heldout], columns=cols).astype(types)
    catalog = Catalog.from_ids([f"i{j}" for j in range(N_ITEMS)])
    return Fold(catalog, np.array([f"u{u}" for u in range(N_USERS)]), tr, ho)


def _write(tmp_path, rows, columns=("user", "item", "score"), name="r.csv"):
    frame = pd.DataFrame(rows, columns=list(columns))
    path = tmp_path / name
    if name.endswith(".csv"):
        frame.to_csv(path, index=False)
    else:
        frame.to_parquet(path)
    return str(path)


def test_listed_items_score_by_position_and_the_rest_tie_at_zero(tmp_path) -> None:
    rows = [("u0", "i3", 0.9), ("u0", "i1", 0.5), ("u0", "i7", 0.7), ("u1", "i2", 2.0), ("u1", "i4", 2.0), ("u1", "i5", 1.0)]
    src = RankingSource(_write(tmp_path, rows)).fit(_fold())
    s = src.score(np.arange(N_USERS))
    assert s.dtype == np.float32 and s.shape == (N_USERS, N_ITEMS)
    expected0 = np.zeros(N_ITEMS)
    expected0[[3, 7, 1]] = [3, 2, 1]  # L + 1 - p for p = 1, 2, 3
    np.testing.assert_array_equal(s[0], expected0)
    # a tie in the file shares the best position among the tied items
    assert s[1, 2] == s[1, 4] == 3 and s[1, 5] == 1
    assert not s[2].any() and not s[3].any()  # not in the file: every item ties
    assert src.list_lengths_.tolist() == [3, 3, 0, 0] and src.by_ == "score"
    assert src.skipped_ == {"unknown_user": 0, "unknown_item": 0}


def test_ranks_read_lower_is_better_and_parquet_equals_csv(tmp_path) -> None:
    by_score = [("u0", "i3", 0.9), ("u0", "i1", 0.5), ("u0", "i7", 0.7)]
    by_rank = [("u0", "i3", 1), ("u0", "i1", 3), ("u0", "i7", 2)]
    a = RankingSource(_write(tmp_path, by_score)).fit(_fold()).score(np.arange(N_USERS))
    b = RankingSource(_write(tmp_path, by_rank, ("user", "item", "rank"), "r.parquet")).fit(_fold()).score(np.arange(N_USERS))
    c = RankingSource(_write(tmp_path, by_rank, ("who", "what", "pos"), "x.csv"), user_col="who", item_col="what", rank_col="pos").fit(_fold())
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(a, c.score(np.arange(N_USERS)))
    assert c.by_ == "rank"


def test_depth_keeps_the_files_top_n_before_unknown_items_are_left_out(tmp_path) -> None:
    rows = [("u0", "gone", 1), ("u0", "i1", 2), ("u0", "i2", 3), ("u9", "i1", 1), ("u0", "i4", 4)]
    path = _write(tmp_path, rows, ("user", "item", "rank"))
    with pytest.warns(UserWarning, match="left out 2 of 3 rows: 1 name a user not in the data, 1 an item not in the catalog"):
        src = RankingSource(path, depth=2).fit(_fold())
    assert src.skipped_ == {"unknown_user": 1, "unknown_item": 1}
    s = src.score(np.array([0]))[0]
    assert s[1] == 1 and not s[2] and not s[4]  # "gone" used a place of the top 2; i2 is not promoted


def test_an_unlisted_heldout_item_gets_the_pessimistic_rank(tmp_path) -> None:
    # u0 trained on i0, holds out i11 which the file does not list; u1 holds out its listed top item
    fold = _fold(train=[(0, 0), (1, 0)], heldout=[(0, 11), (1, 5)])
    path = _write(tmp_path, [("u0", "i1", 3.0), ("u0", "i2", 2.0), ("u1", "i5", 1.0), ("u1", "i0", 5.0)])
    card = evaluate(RankingSource(path).fit(fold), fold, ks=(N_ITEMS,), metrics=("mrr",))
    mrr = card.per_user.set_index("user")[f"mrr@{N_ITEMS}"]
    # u0 has 11 candidates (12 items, one seen); tied last among the 9 unlisted, it ranks 11th.
    # u1's i0 is seen in training and leaves the candidates, so i5 ranks first.
    assert mrr[0] == pytest.approx(1 / 11) and mrr[1] == pytest.approx(1.0)


@pytest.mark.parametrize("method", ["zscore", "minmax", "rank"])
def test_normalizers_keep_the_list_order_above_a_tied_rest(tmp_path, method) -> None:
    rows = [("u0", f"i{j}", float(10 - j)) for j in range(5)] + [("u1", "i2", 1.0)]
    block = RankingSource(_write(tmp_path, rows)).fit(_fold()).score(np.arange(N_USERS))
    out = normalize(block, method)
    assert np.isfinite(out).all()
    for u, listed in ((0, np.arange(5)), (1, np.array([2]))):
        rest = np.setdiff1d(np.arange(N_ITEMS), listed)
        assert np.ptp(out[u, rest]) == 0 and out[u, listed].min() > out[u, rest].max()
        # the order inside the list is kept: ascending ranks of the normalized scores equal those of
        # the raw scores (scipy.stats.rankdata as the reference ranking, reference library)
        np.testing.assert_array_equal(rankdata(out[u, listed]), rankdata(block[u, listed]))
    assert not out[2].any() and not out[3].any()  # a user absent from the file carries no preference


@pytest.mark.parametrize(
    ("rows", "columns", "kwargs", "error", "message"),
    [
        ([("u0", "i1", 1.0, 2)], ("user", "item", "score", "rank"), {}, DataError, "both a 'score' and a 'rank' column"),
        ([("u0", "i1", 1.0)], ("user", "item", "weight"), {}, DataError, "no 'score' or 'rank' column"),
        ([("u0", "i1", 1.0), ("u0", "i1", 2.0)], ("user", "item", "score"), {}, DataError, r"2 row\(s\) repeat a \(user, item\) pair"),
        ([("u0", "i1", 1.0), ("u0", "i2", np.nan)], ("user", "item", "score"), {}, DataError, r"1 row\(s\) have a missing \(NaN\) or infinite score.*row 1"),
        ([("u0", "i1", "high")], ("user", "item", "score"), {}, DataError, "non-numeric score"),
        ([("u0", None, 1.0)], ("user", "item", "score"), {}, DataError, "have no item"),
        ([("u0", "i1", 1.0)], ("user", "sku", "score"), {}, DataError, r"lacks column\(s\) \['item'\]"),
        ([], ("user", "item", "score"), {}, DataError, "holds no rows"),
        ([("u0", "i1", 1.0)], ("user", "item", "score"), {"score_col": "score", "rank_col": "rank"}, ConfigError, "give one, not both"),
        ([("u0", "i1", 1.0)], ("user", "item", "score"), {"depth": 0}, ConfigError, "'depth'"),
    ],
)
def test_bad_files_and_settings_name_the_problem(tmp_path, rows, columns, kwargs, error, message) -> None:
    with pytest.raises(error, match=message):
        RankingSource(_write(tmp_path, rows, columns), **kwargs).fit(_fold())


def test_missing_file_and_unknown_extension(tmp_path) -> None:
    with pytest.raises(ConfigError, match="file not found"):
        RankingSource(str(tmp_path / "none.csv")).fit(_fold())
    (tmp_path / "r.json").write_text("{}")
    with pytest.raises(ConfigError, match=r"\.csv, \.parquet or \.pq"):
        make_source("ranking", path=str(tmp_path / "r.json")).fit(_fold())
    (tmp_path / "broken.parquet").write_bytes(b"not parquet")
    with pytest.raises(DataError, match="not a readable Parquet"):
        RankingSource(str(tmp_path / "broken.parquet")).fit(_fold())


def test_heldout_rows_never_change_scores(tmp_path) -> None:
    path = _write(tmp_path, [("u0", "i1", 1.0), ("u1", "i3", 2.0)])
    a = RankingSource(path).fit(_fold(heldout=[(0, 2)])).score(np.arange(N_USERS))
    b = RankingSource(path).fit(_fold(heldout=[(0, 1), (1, 3), (2, 4)])).score(np.arange(N_USERS))
    np.testing.assert_array_equal(a, b)


@settings(max_examples=40, deadline=None)
@given(st.data())
def test_any_file_order_is_kept_and_unlisted_items_stay_below(data) -> None:
    import tempfile

    n_listed = data.draw(st.integers(1, N_ITEMS), label="listed")
    items = data.draw(st.permutations(range(N_ITEMS)), label="items")[:n_listed]
    values = data.draw(st.lists(st.integers(-3, 3), min_size=n_listed, max_size=n_listed), label="scores")
    with tempfile.TemporaryDirectory() as folder:
        path = _write(Path(folder), [("u1", f"i{j}", float(v)) for j, v in zip(items, values)])
        s = RankingSource(path).fit(_fold()).score(np.array([1]))[0]
    listed = np.array(items)
    rest = np.setdiff1d(np.arange(N_ITEMS), listed)
    # the pairwise order of the file's scores is the source's order, ties included
    # (a comparison of every pair, common practice, no source)
    v = np.array(values, dtype=float)
    np.testing.assert_array_equal(np.sign(v[:, None] - v[None, :]), np.sign(s[listed][:, None] - s[listed][None, :]))
    assert s[listed].min() >= 1 and not s[rest].any()
