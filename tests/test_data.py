"""Validation on load: Catalog.from_frame, Interactions.from_frame, Dataset."""

from __future__ import annotations

import calendar
import datetime as dt
import re

import numpy as np
import pandas as pd
import pytest

from xrec.data import Catalog, Dataset, Interactions
from xrec.data._report import describe_rows
from xrec.errors import ConfigError, DataError


def _catalog_frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "sku": ["a", "b", "c"],
            "kind": ["shoe", "hat", "shoe"],
            "tags": ["red|sale", "", None],
            "price": [10.0, 20.5, 3],
            "name": ["Red shoe", "Blue hat", "Green shoe"],
        }
    )


def _catalog(frame: pd.DataFrame | None = None, **kw) -> Catalog:
    args = dict(item_col="sku", categorical=["kind"], multilabel=["tags"], numeric=["price"], text=["name"])
    args.update(kw)
    return Catalog.from_frame(_catalog_frame() if frame is None else frame, **args)


def _events() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "uid": ["u1", "u1", "u2", "u2"],
            "sku": ["a", "b", "a", "c"],
            "ts": [100, 200, 150, 50],
            "stars": [4, 5, 3, 1],
        }
    )


# --- catalog ------------------------------------------------------------------------------------


def test_catalog_loads_and_normalises_columns():
    cat = _catalog()
    assert list(cat.item_ids) == ["a", "b", "c"]
    assert cat.items.columns[0] == "item"
    assert cat.items["price"].dtype == np.float64
    assert cat.items["tags"].tolist() == [("red", "sale"), (), ()]
    assert cat.index_of(["c", "a"]).tolist() == [2, 0]
    assert cat.fingerprint() == _catalog().fingerprint()


def test_catalog_integer_ids_become_strings():
    cat = Catalog.from_ids([3, 1, 2])
    assert list(cat.item_ids) == ["3", "1", "2"]
    assert cat.index_of([1]).tolist() == [1]


def test_catalog_rejects_empty_and_non_frames():
    with pytest.raises(DataError, match="empty"):
        Catalog.from_frame(pd.DataFrame({"item": []}))
    with pytest.raises(DataError, match="DataFrame"):
        Catalog.from_frame({"item": ["a"]})  # type: ignore[arg-type]


def test_catalog_missing_declared_column_is_named():
    with pytest.raises(DataError, match=r"lacks declared columns \['colour'\]"):
        _catalog(categorical=["colour"])


def test_catalog_column_declared_twice():
    with pytest.raises(DataError, match="declared twice"):
        _catalog(text=["name", "kind"])


def test_catalog_duplicate_ids_name_the_rows():
    frame = _catalog_frame()
    frame.loc[2, "sku"] = "a"
    with pytest.raises(DataError) as err:
        _catalog(frame=frame)
    msg = str(err.value)
    assert msg.startswith("catalog: 2 rows share an item id")
    # Rows are numbered from 1 (the frame's first row is row 1), like the 1-based lines of parse errors.
    assert "row 1: sku='a'" in msg and "row 3: sku='a'" in msg


def test_catalog_ids_equal_as_strings_are_duplicates():
    with pytest.raises(DataError, match="share an item id"):
        Catalog.from_frame(pd.DataFrame({"item": [1, "1", 2]}))


def test_catalog_missing_id_single_row_reads_as_singular():
    frame = _catalog_frame()
    frame.loc[1, "sku"] = None
    with pytest.raises(DataError, match=r"^catalog: 1 row has no item id: row 2: sku=<missing>$"):
        _catalog(frame=frame)


def test_catalog_nan_and_non_numeric_in_numeric_column():
    frame = _catalog_frame()
    frame["price"] = [1.0, np.nan, np.nan]
    with pytest.raises(DataError, match=r"2 rows have a missing or NaN value in numeric column 'price'.*row 2.*row 3"):
        _catalog(frame=frame)
    frame["price"] = ["1", "cheap", "2"]
    with pytest.raises(DataError, match=r"1 row has a non-numeric 'price': row 2: sku='b', price='cheap'"):
        _catalog(frame=frame)
    frame["price"] = [1.0, np.inf, 2.0]
    with pytest.raises(DataError, match="1 row has an infinite value in numeric column 'price'"):
        _catalog(frame=frame)


def test_catalog_missing_categorical_and_bad_text():
    frame = _catalog_frame()
    frame.loc[0, "kind"] = None
    with pytest.raises(DataError, match="1 row has no value in categorical column 'kind'"):
        _catalog(frame=frame)
    frame = _catalog_frame()
    frame.loc[2, "name"] = np.nan
    with pytest.raises(DataError, match="1 row has a non-string text in 'name': row 3"):
        _catalog(frame=frame)


def test_catalog_missing_image_file(tmp_path):
    (tmp_path / "a.png").write_bytes(b"not really an image")
    frame = pd.DataFrame({"item": ["a", "b"], "img": ["a.png", "b.png"]})
    cat = Catalog.from_frame(frame.iloc[:1], image="img", image_root=tmp_path)
    assert cat.image_path(0) == tmp_path / "a.png"
    with pytest.raises(DataError, match=r"1 row points to a missing image file in 'img': row 2: item='b', img='b.png'"):
        Catalog.from_frame(frame, image="img", image_root=tmp_path)


def test_many_bad_rows_show_first_five_and_count():
    frame = pd.DataFrame({"item": [f"i{k}" for k in range(12)], "x": [np.nan] * 12})
    with pytest.raises(DataError) as err:
        Catalog.from_frame(frame, numeric=["x"])
    msg = str(err.value)
    assert msg.startswith("catalog: 12 rows have a missing or NaN value")
    assert re.findall(r"row (\d+):", msg) == ["1", "2", "3", "4", "5"]
    assert msg.endswith("(and 7 more)")


def test_describe_rows_verb_agreement():
    frame = pd.DataFrame({"a": [1, 2]})
    assert describe_rows(frame, [True, False], "have no id") == "1 row has no id: row 1: a=1"
    assert describe_rows(frame, [True, False], "repeat a pair") == "1 row repeats a pair: row 1: a=1"
    assert describe_rows(frame, [True, True], "have no id").startswith("2 rows have no id")


# --- interactions -------------------------------------------------------------------------------


def test_interactions_load_and_sort():
    inter = Interactions.from_frame(_events(), user_col="uid", item_col="sku", time_col="ts", weight_col="stars")
    f = inter.frame
    assert list(f.columns) == ["user", "item", "timestamp", "weight"]
    assert f["timestamp"].dtype == np.float64 and f["weight"].dtype == np.float32
    assert f[["user", "item"]].values.tolist() == [["u1", "a"], ["u1", "b"], ["u2", "c"], ["u2", "a"]]
    assert inter.n_users == 2 and len(inter) == 4


def test_interactions_without_weight_get_one():
    inter = Interactions.from_frame(_events(), user_col="uid", item_col="sku", time_col="ts")
    assert (inter.frame["weight"] == 1.0).all()


def test_interactions_empty_and_missing_columns():
    with pytest.raises(DataError, match="empty"):
        Interactions.from_frame(_events().iloc[:0], user_col="uid", item_col="sku", time_col="ts")
    with pytest.raises(DataError, match=r"lack columns \['timestamp'\]"):
        Interactions.from_frame(_events(), user_col="uid", item_col="sku")
    with pytest.raises(DataError, match=r"lack columns \['rating'\]"):
        Interactions.from_frame(_events(), user_col="uid", item_col="sku", time_col="ts", weight_col="rating")


def test_interactions_unknown_items_named():
    cat = _catalog()
    events = _events()
    events.loc[3, "sku"] = "zz"
    with pytest.raises(DataError, match=r"1 row names an item that is not in the catalog: row \d+: user='u2', item='zz'"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts", catalog=cat)


def test_interactions_missing_ids():
    events = _events()
    events.loc[0, "uid"] = None
    with pytest.raises(DataError, match="1 row has no user id: row 1"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts")
    events = _events()
    events.loc[1, "sku"] = np.nan
    with pytest.raises(DataError, match="1 row has no item id: row 2"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts")


def test_interactions_bad_timestamps():
    events = _events().astype({"ts": object})
    events.loc[2, "ts"] = "yesterday"
    with pytest.raises(DataError, match=r"1 row has a timestamp that is neither a number nor a date in 'ts': row 3: uid='u2', sku='a', ts='yesterday'"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts")
    events = _events().astype({"ts": float})
    events.loc[[0, 3], "ts"] = np.nan
    with pytest.raises(DataError, match=r"2 rows have no timestamp in 'ts': row 1.*row 4"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts")
    events.loc[[0, 3], "ts"] = np.inf
    with pytest.raises(DataError, match=r"2 rows have an infinite timestamp"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts")


def test_interactions_bad_weights():
    events = _events().astype({"stars": object})
    events.loc[1, "stars"] = "five"
    with pytest.raises(DataError, match="1 row has a missing or non-numeric weight in 'stars': row 2"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts", weight_col="stars")


def test_datetime_timestamps_are_epoch_seconds():
    # Reference: the Python standard library's calendar.timegm (UTC epoch seconds).
    expected = [calendar.timegm((2015, 1, 1, 0, 0, 0)), calendar.timegm((2016, 2, 29, 12, 30, 5))]
    when = pd.to_datetime(["2015-01-01 00:00:00", "2016-02-29 12:30:05"])
    for stamps in (when, when.as_unit("ns"), when.as_unit("s"), when.tz_localize("UTC")):
        frame = pd.DataFrame({"user": ["u", "u"], "item": ["a", "b"], "timestamp": stamps})
        got = Interactions.from_frame(frame).frame["timestamp"].tolist()
        assert got == [float(e) for e in expected]
    # A time zone shifts the instant: 01:00 at UTC+01:00 is midnight UTC (stdlib datetime as reference).
    plus_one = pd.Series(pd.to_datetime(["2015-01-01 01:00:00+01:00"]))
    frame = pd.DataFrame({"user": ["u"], "item": ["a"], "timestamp": plus_one})
    ref = dt.datetime(2015, 1, 1, 1, 0, tzinfo=dt.timezone(dt.timedelta(hours=1))).timestamp()
    assert Interactions.from_frame(frame).frame["timestamp"].iat[0] == ref


def test_missing_datetime_is_reported():
    frame = pd.DataFrame({"user": ["u", "u"], "item": ["a", "b"], "timestamp": [pd.Timestamp("2015-01-01"), pd.NaT]})
    with pytest.raises(DataError, match="1 row has no timestamp"):
        Interactions.from_frame(frame)


def _dupes() -> pd.DataFrame:
    return pd.DataFrame(
        {"user": ["u", "u", "u", "v"], "item": ["a", "a", "b", "a"], "timestamp": [30, 10, 20, 5], "weight": [1.0, 2.0, 4.0, 8.0]}
    )


def test_duplicates_error_by_default_and_name_rows():
    with pytest.raises(DataError) as err:
        Interactions.from_frame(_dupes(), weight_col="weight")
    msg = str(err.value)
    assert msg.startswith("interactions: 2 rows repeat a (user, item) pair")
    assert "on_duplicate" in msg and "timestamp=30.0" in msg and "timestamp=10.0" in msg


def test_duplicates_last_keeps_latest():
    f = Interactions.from_frame(_dupes(), weight_col="weight", on_duplicate="last").frame
    row = f[(f.user == "u") & (f.item == "a")]
    assert len(f) == 3 and row["timestamp"].tolist() == [30.0] and row["weight"].tolist() == [1.0]


def test_duplicates_sum_adds_weights_and_keeps_last_time():
    f = Interactions.from_frame(_dupes(), weight_col="weight", on_duplicate="sum").frame
    row = f[(f.user == "u") & (f.item == "a")]
    assert len(f) == 3 and row["timestamp"].tolist() == [30.0] and row["weight"].tolist() == [3.0]
    assert f.loc[f.item == "b", "weight"].tolist() == [4.0]


def test_on_duplicate_rule_checked():
    with pytest.raises(DataError, match=re.escape("on_duplicate must be one of ('error', 'last', 'sum'), got 'first'")):
        Interactions.from_frame(_dupes(), on_duplicate="first")


def test_fingerprint_changes_with_content():
    a = Interactions.from_frame(_dupes(), on_duplicate="last")
    b = Interactions.from_frame(_dupes().assign(timestamp=[30, 10, 21, 5]), on_duplicate="last")
    assert a.fingerprint() == Interactions.from_frame(_dupes(), on_duplicate="last").fingerprint()
    assert a.fingerprint() != b.fingerprint()


# --- dataset ------------------------------------------------------------------------------------


def test_dataset_checks_items_against_catalog():
    cat = _catalog()
    inter = Interactions.from_frame(_events(), user_col="uid", item_col="sku", time_col="ts")
    ds = Dataset(cat, inter, name="tiny")
    assert ds.fingerprint() == f"{inter.fingerprint()}-{cat.fingerprint()}"
    stray = Interactions.from_frame(_events().assign(sku=["a", "b", "q", "c"]), user_col="uid", item_col="sku", time_col="ts")
    with pytest.raises(DataError, match=r"^1 interaction names an item missing from the catalog, first: \['q'\]$"):
        Dataset(cat, stray)


def test_date_string_timestamps_become_epoch_seconds():
    frame = pd.DataFrame({"user": ["u1", "u2", "u3"], "item": ["a", "b", "c"],
                          "timestamp": ["2024-05-01", "2024-05-01T12:00:00+02:00", "1714521600"]})
    got = Interactions.from_frame(frame).frame.set_index("user")["timestamp"]
    # Reference: the standard library's datetime, independent of pandas' parser.
    assert got["u1"] == dt.datetime(2024, 5, 1, tzinfo=dt.timezone.utc).timestamp()
    assert got["u2"] == dt.datetime(2024, 5, 1, 10, tzinfo=dt.timezone.utc).timestamp()
    assert got["u3"] == 1714521600.0


# --- defects found by a hostile pass over the inputs (each raised a raw exception or passed) ---


def test_weight_finite_in_float64_but_not_in_float32_is_refused():
    # Weights are stored as float32; 1e39 used to pass (checked in float64) and become inf.
    # Reference: numpy.finfo(np.float32).max (IEEE 754 binary32, ~3.4028235e38).
    assert float(np.finfo(np.float32).max) < 1e39
    events = _events().astype({"stars": float})
    events.loc[2, "stars"] = 1e39
    with pytest.raises(DataError, match=r"1 row has a weight in 'stars' that is not a finite float32.*row 3: .*stars=1e\+39"):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts", weight_col="stars")
    largest = float(np.finfo(np.float32).max)
    events.loc[2, "stars"] = largest
    kept = Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts", weight_col="stars")
    assert kept.frame["weight"].max() == np.float32(largest)


def test_summed_weights_that_overflow_float32_are_refused():
    frame = _dupes().assign(weight=[3e38, 3e38, 1.0, 1.0])
    with pytest.raises(DataError, match="summed weights that are not a finite float32"):
        Interactions.from_frame(frame, weight_col="weight", on_duplicate="sum")


def test_dates_outside_the_nanosecond_range_are_read_or_named():
    # "1000-01-01" used to raise pandas' OutOfBoundsDatetime (the epoch was subtracted in
    # nanoseconds). Reference: the standard library's datetime for the expected seconds.
    frame = pd.DataFrame({"user": ["u", "u", "u"], "item": ["a", "b", "c"],
                          "timestamp": ["1000-01-01", "2020-01-01", "3000-06-01T12:00:00Z"]})
    got = Interactions.from_frame(frame).frame.sort_values("item")["timestamp"].tolist()
    utc = dt.timezone.utc
    assert got == [dt.datetime(1000, 1, 1, tzinfo=utc).timestamp(), dt.datetime(2020, 1, 1, tzinfo=utc).timestamp(),
                   dt.datetime(3000, 6, 1, 12, tzinfo=utc).timestamp()]
    stamps = pd.Series(pd.to_datetime(["1000-01-01", "3000-01-01"]).as_unit("s"))
    got = Interactions.from_frame(pd.DataFrame({"user": ["u", "u"], "item": ["a", "b"], "timestamp": stamps})).frame
    assert got["timestamp"].tolist() == [dt.datetime(1000, 1, 1, tzinfo=utc).timestamp(), dt.datetime(3000, 1, 1, tzinfo=utc).timestamp()]
    # A year pandas cannot hold at all is reported with its row, as the file holds it.
    frame.loc[1, "timestamp"] = "10000-01-01"
    with pytest.raises(DataError, match=r"1 row has a timestamp that is neither a number nor a date.*row 2: .*timestamp='10000-01-01'"):
        Interactions.from_frame(frame)


def test_a_date_pandas_refuses_to_convert_is_named_not_raised(monkeypatch):
    # Whatever pandas' own range is, a date it raises OutOfBoundsDatetime for becomes a DataError naming the row.
    real = pd.to_datetime

    def refusing(values, *args, **kwargs):
        if any(str(v).startswith("0999") for v in list(values)):
            raise pd.errors.OutOfBoundsDatetime("Out of bounds nanosecond timestamp")
        return real(values, *args, **kwargs)

    monkeypatch.setattr(pd, "to_datetime", refusing)
    frame = pd.DataFrame({"user": ["u", "u"], "item": ["a", "b"], "timestamp": ["2020-01-01", "0999-01-01"]})
    with pytest.raises(DataError, match=r"1 row has a date in 'timestamp' outside the range pandas can represent: row 2: .*'0999-01-01'"):
        Interactions.from_frame(frame)


@pytest.mark.parametrize("bad", ["\ud800", b"u1"])
@pytest.mark.parametrize("column", ["uid", "sku"])
def test_ids_that_cannot_be_text_name_the_row(bad, column):
    # Lone surrogates used to pass and then break the fingerprint (UnicodeEncodeError); bytes
    # were silently turned into the text "b'u1'".
    events = _events().astype({column: object})
    events.loc[1, column] = bad
    what = "user" if column == "uid" else "item"
    with pytest.raises(DataError, match=rf"1 row has a {what} id that is not text.*row 2: {column}="):
        Interactions.from_frame(events, user_col="uid", item_col="sku", time_col="ts")
    items = _catalog_frame().astype({"sku": object, "name": object})
    items.loc[2, "sku" if column == "sku" else "name"] = bad
    with pytest.raises(DataError, match=r"1 row has an? (item id|value in 'name') that is not text.*row 3"):
        _catalog(frame=items)


def test_one_column_name_given_as_a_string_is_one_column():
    # categorical="brand" used to be read as the columns ['b', 'r', 'a', 'n', 'd'].
    frame = _catalog_frame()
    cat = Catalog.from_frame(frame, item_col="sku", categorical="kind", text="name")
    assert cat.schema.categorical == ("kind",) and cat.schema.text == ("name",)
    with pytest.raises(ConfigError, match=r"categorical: a column name or a list of column names, got \['kind', 3\]"):
        Catalog.from_frame(frame, item_col="sku", categorical=["kind", 3])


def test_row_order_equals_numpys_lexsort_packed_or_not():
    # Reference: numpy.lexsort (last key first) on (item, time, user); xrec packs the three into
    # one int64 key when they fit, else sorts three times.
    from xrec.data.interactions import _order

    rng = np.random.default_rng(11)
    users = rng.integers(0, 50, 3000).astype(np.int32)
    times = rng.integers(0, 40, 3000).astype(float)
    items = rng.permutation(3000).astype(np.int32)  # distinct, so (user, item) pairs are distinct
    np.testing.assert_array_equal(_order(users, times, items), np.lexsort((items, times, users)))
    wide = items.astype(np.int64) * 2**45  # too wide to pack into 63 bits
    np.testing.assert_array_equal(_order(users, times, wide), np.lexsort((wide, times, users)))


@pytest.mark.parametrize("chunk", [1, 3, 1_000_000])
def test_interactions_fingerprint_is_the_documented_sha256_whatever_the_chunking(monkeypatch, chunk):
    # Reference: hashlib.sha256 over the documented bytes (ids joined by "\x1f", then float64
    # times and float32 weights); xrec feeds the ids in chunks to bound memory.
    import hashlib

    import xrec.data.interactions

    monkeypatch.setattr(xrec.data.interactions, "_HASH_CHUNK", chunk)
    inter = Interactions.from_frame(_events(), user_col="uid", item_col="sku", time_col="ts", weight_col="stars")
    f = inter.frame
    h = hashlib.sha256()
    for col in ("user", "item"):
        h.update("\x1f".join(f[col].tolist()).encode())
    h.update(f["timestamp"].to_numpy("float64").tobytes())
    h.update(f["weight"].to_numpy("float32").tobytes())
    assert inter.fingerprint() == h.hexdigest()[:16]
