"""Catalog and interactions read from CSV and Parquet files (xrec.data.files)."""

from __future__ import annotations

import calendar
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from xrec.data import Dataset, Interactions, read_catalog, read_interactions
from xrec.errors import ConfigError, DataError

COLUMNS = dict(user_col="customer", item_col="sku", time_col="ts", weight_col="qty")


def _frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    # Invented rows (behaviour, not a reference); ids with leading zeros, a brand called "NA".
    items = pd.DataFrame({
        "sku": ["007", "010", "100", "200"],
        "brand": ["NA", "null", "None", "acme"],
        "tags": ["red|sale", "blue", "red", "green|blue"],
        "price": [1.5, 20.0, 3.25, 4.0],
        "title": ["Red pin", "Blue patch", "Red sticker", "Green pin"],
    })
    events = pd.DataFrame({
        "customer": ["c1", "c1", "c2", "c2", "c3"],
        "sku": ["007", "010", "007", "200", "100"],
        "ts": [100, 200, 150, 50, 75],
        "qty": [1.0, 2.0, 1.0, 3.0, 0.5],
    })
    return items, events


def _read_both(folder: Path, items: pd.DataFrame, events: pd.DataFrame, ext: str):
    if ext == "parquet":
        pq.write_table(pa.Table.from_pandas(items, preserve_index=False), folder / "items.parquet")
        pq.write_table(pa.Table.from_pandas(events, preserve_index=False), folder / "events.parquet")
    else:
        items.to_csv(folder / f"items.{ext}", index=False, sep="\t" if ext == "tsv" else ",")
        events.to_csv(folder / f"events.{ext}", index=False, sep="\t" if ext == "tsv" else ",")
    catalog = read_catalog(folder / f"items.{ext}", item_col="sku", categorical="brand", multilabel=["tags"],
                           numeric=["price"], text=["title"])
    interactions = read_interactions(folder / f"events.{ext}", catalog=catalog, **COLUMNS)
    return Dataset(catalog, interactions, name="shop")


def test_csv_tsv_and_parquet_give_the_same_dataset(tmp_path):
    items, events = _frames()
    got = {ext: _read_both(tmp_path, items, events, ext) for ext in ("csv", "tsv", "parquet")}
    csv = got["csv"]
    for other in (got["tsv"], got["parquet"]):
        pd.testing.assert_frame_equal(csv.catalog.items, other.catalog.items)
        pd.testing.assert_frame_equal(csv.interactions.frame, other.interactions.frame)
        assert csv.fingerprint() == other.fingerprint()
    # Ids are text in every format, so "007" stays "007"; "NA", "null" and "None" are brands.
    assert list(csv.catalog.item_ids) == ["007", "010", "100", "200"]
    assert csv.catalog.items["brand"].tolist() == ["NA", "null", "None", "acme"]


def test_parquet_round_trip_matches_pyarrows_own_reader(tmp_path):
    # Reference: pyarrow's own Parquet reader (pyarrow.parquet.read_table), independent of xrec's
    # conversion; xrec must hand back the same values in its own dtypes.
    rng = np.random.default_rng(0)
    n = 500
    table = pa.table({
        "customer": pa.array(rng.integers(0, 40, n)),                                   # int64 ids
        "sku": pa.array([f"i{j}" for j in rng.permutation(n) % 60]).dictionary_encode(),  # dictionary text ids
        "ts": pa.array(rng.integers(0, 10**9, n) * 1_000_000, pa.timestamp("us", tz="UTC")),
        "qty": pa.array(rng.random(n), pa.float32()),
        "unused": pa.array(rng.random(n)),
    })
    table = table.take(pa.array(_first_of_each_pair(table)))
    path = tmp_path / "events.parquet"
    pq.write_table(table, path, row_group_size=97)
    got = read_interactions(path, **COLUMNS).frame
    ref = pq.read_table(path).to_pandas()
    ref = pd.DataFrame({
        "user": ref["customer"].map(str),
        "item": ref["sku"].astype(str),
        # epoch seconds from the standard library's calendar.timegm, not pandas
        "timestamp": [float(calendar.timegm(t.utctimetuple())) + t.microsecond / 1e6 for t in ref["ts"]],
        "weight": ref["qty"].to_numpy(np.float32),
    })
    ref = ref.sort_values(["user", "timestamp", "item"], kind="stable").reset_index(drop=True)
    assert got["user"].tolist() == ref["user"].tolist()
    assert got["item"].tolist() == ref["item"].tolist()
    np.testing.assert_array_equal(got["timestamp"].to_numpy(), ref["timestamp"].to_numpy())
    np.testing.assert_array_equal(got["weight"].to_numpy(), ref["weight"].to_numpy())
    assert got["weight"].dtype == np.float32


def _first_of_each_pair(table: pa.Table) -> list[int]:
    seen, keep = set(), []
    for row, pair in enumerate(zip(table["customer"].to_pylist(), table["sku"].to_pylist())):
        if pair not in seen:
            seen.add(pair)
            keep.append(row)
    return keep


def test_parquet_interactions_read_only_the_mapped_columns(tmp_path, monkeypatch):
    path = tmp_path / "events.parquet"
    _, events = _frames()
    pq.write_table(pa.Table.from_pandas(events.assign(notes=["x"] * len(events)), preserve_index=False), path)
    asked = []
    real = pq.read_table

    def spy(source, *args, columns=None, **kwargs):
        asked.append(columns)
        return real(source, *args, columns=columns, **kwargs)

    monkeypatch.setattr(pq, "read_table", spy)
    read_interactions(path, **COLUMNS)
    assert asked == [["customer", "sku", "ts", "qty"]]


def test_interactions_order_matches_pandas_sort(tmp_path):
    # Reference: pandas' stable sort_values on (user, timestamp, item); xrec orders rows with
    # integer codes and its own argsorts instead.
    rng = np.random.default_rng(3)
    n = 2000
    frame = pd.DataFrame({"user": rng.choice(["u1", "u10", "u2", "é", "Z"], n), "item": [f"i{j}" for j in range(n)],
                          "timestamp": rng.integers(0, 20, n)})
    got = Interactions.from_frame(frame).frame
    ref = frame.astype({"timestamp": float}).sort_values(["user", "timestamp", "item"], kind="stable")
    assert got["item"].tolist() == ref["item"].tolist()


def test_csv_missing_marker_is_the_empty_field_only(tmp_path):
    path = tmp_path / "items.csv"
    path.write_text("sku,brand,price\na,NA,1\nb,null,2\nc,,3\n", encoding="utf-8")
    with pytest.raises(DataError) as err:
        read_catalog(path, item_col="sku", categorical=["brand"], numeric=["price"])
    # Row 3 is the file's line 4 (after the header); the message shows the empty field, not nan.
    assert "1 row has no value in categorical column 'brand': row 3: sku='c', brand=<empty>" in str(err.value)
    assert "nan" not in str(err.value)
    path.write_text("sku,price\na,1\nb,NA\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"1 row has a non-numeric 'price': row 2: sku='b', price='NA'"):
        read_catalog(path, item_col="sku", numeric=["price"])
    path.write_text("sku,price\na,1\n,2\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"1 row has no item id: row 2: sku=<empty>"):
        read_catalog(path, item_col="sku", numeric=["price"])


def test_parquet_nulls_are_shown_as_null(tmp_path):
    path = tmp_path / "events.parquet"
    pq.write_table(pa.table({"user": ["u", None], "item": ["a", "b"], "timestamp": [1, 2]}), path)
    with pytest.raises(DataError, match=r"1 row has no user id: row 2: user=<null>, item='b'"):
        read_interactions(path)


def test_weight_too_large_for_float32_names_the_row(tmp_path):
    # 1e39 is finite as float64 but overflows float32 (largest finite float32 ~3.4028235e38,
    # IEEE 754 binary32; numpy.finfo(np.float32).max as the check).
    with np.errstate(over="ignore"):
        assert np.isinf(np.float32(1e39)) and np.finfo(np.float32).max < 1e39
    path = tmp_path / "events.csv"
    path.write_text("user,item,timestamp,weight\nu,a,1,2\nu,b,2,1e39\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"1 row has a weight in 'weight' that is not a finite float32.*row 2: .*weight=1e\+39"):
        read_interactions(path, weight_col="weight")


def test_ids_that_are_not_text_are_named(tmp_path):
    path = tmp_path / "events.parquet"
    pq.write_table(pa.table({"user": pa.array([b"u1", b"\xff"], pa.binary()), "item": ["a", "b"], "timestamp": [1, 2]}), path)
    with pytest.raises(DataError, match=r"2 rows have a user id that is not text.*row 1: user=b'u1'; row 2"):
        read_interactions(path)


@pytest.mark.parametrize(
    ("make", "expected"),
    [
        (lambda tmp: tmp / "absent.csv", "file not found"),
        (lambda tmp: tmp / "folder.csv", "is a folder"),
        (lambda tmp: Path(os.devnull), "is a character device"),
    ],
)
def test_what_a_path_is_is_said(tmp_path, make, expected):
    (tmp_path / "folder.csv").mkdir()
    path = make(tmp_path)
    with pytest.raises(DataError, match=expected) as err:
        read_interactions(path) if path.suffix else read_catalog(path)
    if expected != "file not found":
        assert "not found" not in str(err.value)


def test_unknown_extension_and_unreadable_files(tmp_path):
    (tmp_path / "items.xlsx").write_bytes(b"PK")
    with pytest.raises(DataError, match=r"unknown file type '\.xlsx'.*\.parquet"):
        read_catalog(tmp_path / "items.xlsx")
    (tmp_path / "items.parquet").write_bytes(b"not parquet at all")
    with pytest.raises(DataError, match="cannot read .* as Parquet"):
        read_catalog(tmp_path / "items.parquet")
    (tmp_path / "items.csv").write_bytes(b"item\n\xff\xfe\n")
    with pytest.raises(DataError, match="cannot read .* as CSV"):
        read_catalog(tmp_path / "items.csv")


def test_absent_mapped_column_lists_the_files_columns(tmp_path):
    items, events = _frames()
    events.to_csv(tmp_path / "events.csv", index=False)
    with pytest.raises(DataError, match=r"lacks columns \['when'\]; it has \['customer', 'sku', 'ts', 'qty'\]"):
        read_interactions(tmp_path / "events.csv", user_col="customer", item_col="sku", time_col="when")
    with pytest.raises(ConfigError, match="time_col"):
        read_interactions(tmp_path / "events.csv", user_col="customer", item_col="sku", time_col=3)  # type: ignore[arg-type]


def test_show_values_false_quotes_nothing_from_the_file(tmp_path):
    path = tmp_path / "items.csv"
    path.write_text("item\nsecret-token\nsecret-token\n", encoding="utf-8")
    with pytest.raises(DataError) as err:
        read_catalog(path, show_values=False)
    assert "rows 1" not in str(err.value) and "row 1, row 2" in str(err.value)
    assert "secret" not in str(err.value)
    path.write_bytes(b"item\nsecret\xff\n")
    with pytest.raises(DataError) as err:
        read_catalog(path, show_values=False)
    assert "secret" not in str(err.value) and "0xff" not in str(err.value)


def test_compressed_csv_by_extension(tmp_path):
    items, _ = _frames()
    items.to_csv(tmp_path / "items.csv.gz", index=False)
    catalog = read_catalog(tmp_path / "items.csv.gz", item_col="sku")
    assert list(catalog.item_ids) == ["007", "010", "100", "200"]
