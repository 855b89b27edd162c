"""Property-based input tests: xrec's readers fed generated frames, files, bytes and TOML.

The one property: whatever the input, a reader either returns a checked object or raises one of
xrec's own errors (the ``XrecError`` family). Any other exception fails the test; hypothesis
then shrinks the input to a small example. Where a reader succeeds, a few invariants of its
output are checked too.

Layout: shared strategies and the ``only_xrec_errors`` helper first, then one section per
reader (data loaders, data location and spec reader). A new reader (for instance the blend-file
reader) gets its own section at the end, reusing ``SETTINGS``, ``only_xrec_errors``,
``toml_values`` and ``scratch_folder``.

Budget: each test runs ``max_examples`` inputs (100 by default, under a minute for the whole
module on a loaded 2-core machine; ``XREC_PROPERTY_EXAMPLES`` sets another number); ``deadline=None``
because file writes vary in time.
"""

from __future__ import annotations

import datetime as dt
import os
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import tomli_w
from hypothesis import HealthCheck, event, given, settings
from hypothesis.control import currently_in_test_context
from hypothesis import strategies as st

from xrec.data import Catalog, Interactions, read_catalog, read_interactions
from xrec.data.location import KEYS, DataLocation, load_dataset
from xrec.errors import XrecError
from xrec.spec import load_spec, parse_spec

# XREC_PROPERTY_EXAMPLES=2000 python -m pytest tests/test_input_properties.py digs deeper (minutes).
# In CI (CI set) the examples are derived from the test names, so a run there is repeatable;
# elsewhere each run draws new ones.
SETTINGS = settings(max_examples=int(os.environ.get("XREC_PROPERTY_EXAMPLES", "100")), deadline=None,
                    derandomize=bool(os.environ.get("CI")), suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def only_xrec_errors(call: Callable[..., Any], *args, **kwargs) -> Any:
    """``call(*args, **kwargs)``; an ``XrecError`` gives ``None``, any other exception propagates (and fails)."""
    name = getattr(call, "__name__", "call")
    try:
        got = call(*args, **kwargs)
    except XrecError as exc:
        _count(f"{name}: refused ({type(exc).__name__})")
        return None
    _count(f"{name}: accepted")
    return got


def _count(outcome: str) -> None:
    """Tally outcomes, shown by ``pytest --hypothesis-show-statistics`` (inputs should reach both)."""
    if currently_in_test_context():
        event(outcome)


@contextmanager
def scratch_folder() -> Iterator[Path]:
    """A fresh folder per example (pytest's tmp_path is one folder per test, shared by every example)."""
    with tempfile.TemporaryDirectory() as folder:
        yield Path(folder)


# --- strategies ---------------------------------------------------------------------------------

surrogates = st.characters(min_codepoint=0xD800, max_codepoint=0xDFFF)
any_text = st.text(st.one_of(st.characters(), surrogates), max_size=8)
date_like = st.sampled_from([
    "2024-05-01", "2024-05-01T12:00:00+02:00", "1000-01-01", "10000-01-01", "0000-01-01", "1677-09-21",
    "2262-04-12", "9999-12-31T23:59:59.999999999", "1e400", "-1e400", "NaN", "inf", "-0", "NA", "null", "",
    "1714521600", " 12 ", "2024-13-45", "yesterday",
])
cells = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**70), max_value=2**70),
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=3e38, max_value=1e300),
    any_text,
    date_like,
    st.binary(max_size=6),
    st.datetimes(min_value=dt.datetime(1, 1, 1), max_value=dt.datetime(9999, 12, 31)),
    st.just(np.datetime64("300000-01-01", "D")),
    st.lists(st.one_of(any_text, st.integers(), st.binary(max_size=3)), max_size=3),
)
COLUMN_NAMES = ["user", "item", "timestamp", "weight", "brand", "price", "tags", "title", "image", "other"]


def mostly(valid: st.SearchStrategy, hostile: st.SearchStrategy = cells, odds: int = 8) -> st.SearchStrategy:
    """Usually ``valid``, now and then (one in ``odds``) ``hostile`` (by default: any cell at all)."""
    return st.integers(min_value=1, max_value=odds).flatmap(lambda k: hostile if k == 1 else valid)


ids = st.sampled_from(["u1", "u2", "007", "7", "a", "NA", "", " ", "é", "i10"])
VALID = {
    "user": ids,
    "item": ids,
    "timestamp": st.one_of(st.integers(min_value=0, max_value=2**40), st.floats(min_value=-1e12, max_value=1e12),
                           st.sampled_from(["2024-05-01", "2024-05-01T12:00:00+02:00", "1000-01-01", "1714521600"])),
    "weight": st.one_of(st.floats(min_value=-1e6, max_value=1e6), st.integers(min_value=-5, max_value=5)),
    "brand": st.sampled_from(["NA", "null", "None", "acme", ""]),
    "price": st.one_of(st.floats(min_value=0, max_value=1e6), st.sampled_from(["1.5", "NA", "1e39"])),
    "tags": st.one_of(st.sampled_from(["a|b", "", "b"]), st.lists(st.sampled_from(["a", "b"]), max_size=2)),
    "title": st.text(max_size=6),
    "image": st.sampled_from(["a.png", "../b.png"]),
    "other": cells,
}


@st.composite
def frames(draw, columns: list[str] = COLUMN_NAMES) -> pd.DataFrame:
    """A small frame whose columns are mostly the expected ones, with mostly valid cells.

    Kept as objects or as pandas infers the column types from the values.
    """
    names = draw(st.lists(st.sampled_from(columns), min_size=1, max_size=len(columns), unique=True))
    usual = draw(mostly(st.just(["user", "item", "timestamp", "weight"]), st.sampled_from([["item"], []]), odds=4))
    names = list(dict.fromkeys(usual + names))
    rows = draw(mostly(st.integers(min_value=1, max_value=6), st.just(0), odds=10))
    data = {name: draw(st.lists(mostly(VALID[name], odds=25), min_size=rows, max_size=rows)) for name in names}
    frame = pd.DataFrame({name: pd.Series(values, dtype=object) for name, values in data.items()})
    if draw(st.booleans()):
        try:
            frame = frame.infer_objects()
        except Exception:  # pandas itself may refuse some mixes; the object frame is input enough
            pass
    return frame


def _pick(draw, names: list[str], usual: str) -> Any:
    """A column name: usually the expected one, sometimes any other (or an absent one)."""
    return draw(mostly(st.just(usual) if usual in names else st.sampled_from(names), st.sampled_from(names + ["absent"])))


NATURAL_KIND = {"brand": "categorical", "price": "numeric", "tags": "multilabel", "title": "text"}
KINDS = ["categorical", "multilabel", "numeric", "text"]


def _declarations(draw, names: list[str], item: Any) -> dict[str, Any]:
    """Catalog column declarations: usually each column under its natural kind, sometimes odd
    (another kind, a string for a list, a number, a column declared twice or absent)."""
    out: dict[str, Any] = {kind: [] for kind in KINDS}
    for name in names:
        if name == item:
            continue
        kind = draw(mostly(st.just(NATURAL_KIND.get(name)), st.sampled_from([*KINDS, None])))
        if kind:
            out[kind].append(name)
    odd = draw(mostly(st.none(), st.sampled_from(["string", "number", "twice", "absent"])))
    kind = draw(st.sampled_from(KINDS))
    if odd == "string" and out[kind]:
        out[kind] = out[kind][0]
    elif odd == "number":
        out[kind] = 3
    elif odd == "twice" and names:
        out[kind].append(names[0])
    elif odd == "absent":
        out[kind].append("absent")
    return out


toml_scalars = st.one_of(
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=10),
    st.booleans(),
    st.datetimes(),
    st.dates(),
)
toml_values = st.recursive(
    toml_scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=6), inner, max_size=3)),
    max_leaves=8,
)


# --- data loaders -------------------------------------------------------------------------------


@SETTINGS
@given(frame=frames(), data=st.data())
def test_interactions_from_any_frame(frame, data):
    names = list(frame.columns)
    weight = data.draw(st.one_of(st.none(), st.just(_pick(data.draw, names, "weight"))))
    rule = data.draw(st.sampled_from(["error", "last", "sum"]))
    got = only_xrec_errors(
        Interactions.from_frame, frame, user_col=_pick(data.draw, names, "user"), item_col=_pick(data.draw, names, "item"),
        time_col=_pick(data.draw, names, "timestamp"), weight_col=weight, on_duplicate=rule,
    )
    if got is not None:
        f = got.frame
        assert np.isfinite(f["timestamp"].to_numpy()).all() and np.isfinite(f["weight"].to_numpy()).all()
        assert f["weight"].dtype == np.float32 and not f.duplicated(["user", "item"]).any()
        assert len(got.fingerprint()) == 16


@SETTINGS
@given(frame=frames(), data=st.data())
def test_catalog_from_any_frame(frame, data):
    names = list(frame.columns)
    got = only_xrec_errors(
        Catalog.from_frame, frame, item_col=(item := _pick(data.draw, names, "item")), **_declarations(data.draw, names, item),
        check_images=False,
    )
    if got is not None:
        assert got.items["item"].is_unique and len(got.fingerprint()) == 16
        for column in got.schema.numeric:
            assert np.isfinite(got.items[column].to_numpy()).all()


@SETTINGS
@given(header=st.sampled_from([b"a,b,1\n", b"a\tb\t1\n", b"a\n", b""]),
       body=st.one_of(st.binary(max_size=200), st.text(st.sampled_from('ab,;"\n\r\t1.eNA\\ \x00é\ud800'), max_size=80).map(
           lambda t: t.encode("utf-8", "surrogatepass"))),
       suffix=st.sampled_from([".csv", ".tsv", ".parquet", ".csv.gz", ".pq"]))
def test_readers_on_any_bytes(header, body, suffix):
    with scratch_folder() as folder:
        path = folder / f"file{suffix}"
        path.write_bytes(header + body)
        only_xrec_errors(read_catalog, path, item_col="a")
        only_xrec_errors(read_interactions, path, user_col="a", item_col="b", time_col="1")


def _arrow(values: st.SearchStrategy, kind: pa.DataType) -> st.SearchStrategy:
    return st.lists(values, min_size=3, max_size=3).map(lambda v: pa.array(v, kind))


arrow_ids = st.one_of(
    _arrow(st.integers(min_value=-(2**63), max_value=2**63 - 1), pa.int64()),
    _arrow(mostly(ids, st.none()), pa.string()),
    _arrow(ids, pa.string()).map(lambda a: a.dictionary_encode()),
    _arrow(st.one_of(st.none(), st.binary(max_size=4)), pa.binary()),
    _arrow(st.floats(), pa.float64()),
    st.just(pa.nulls(3)),
)
arrow_times = st.one_of(
    _arrow(st.integers(min_value=-(2**63), max_value=2**63 - 1), pa.int64()),
    _arrow(st.one_of(st.none(), st.floats()), pa.float64()),
    _arrow(st.integers(min_value=-(2**62), max_value=2**62), pa.timestamp("us", tz="UTC")),
    _arrow(st.integers(min_value=-(2**62) // 1000, max_value=2**62 // 1000), pa.timestamp("s")),  # Parquet stores ms
    _arrow(st.integers(min_value=-(2**31), max_value=2**31 - 1), pa.date32()),
    _arrow(date_like, pa.string()),
    _arrow(st.booleans(), pa.bool_()),
)
arrow_values = st.one_of(
    _arrow(st.one_of(st.none(), st.floats(width=32)), pa.float32()),
    _arrow(st.one_of(st.none(), st.floats()), pa.float64()),
    _arrow(st.integers(min_value=-(2**63), max_value=2**63 - 1), pa.int64()),
    _arrow(st.one_of(st.none(), st.booleans()), pa.bool_()),
    _arrow(st.one_of(st.none(), st.text(max_size=4)), pa.string()),
    _arrow(st.one_of(st.none(), st.lists(st.text(max_size=3), max_size=2)), pa.list_(pa.string())),
    _arrow(st.one_of(st.none(), st.binary(max_size=3)), pa.binary()),
    st.just(pa.nulls(3)),
)
ARROW = {"user": arrow_ids, "item": arrow_ids, "timestamp": arrow_times}


@st.composite
def arrow_tables(draw) -> pa.Table:
    """Three rows; the expected columns usually present, each in one of the Arrow types files use."""
    names = draw(st.lists(st.sampled_from(COLUMN_NAMES), max_size=5, unique=True))
    names = list(dict.fromkeys(draw(mostly(st.just(["user", "item", "timestamp"]), st.just([]))) + names))
    if not names:
        names = ["item"]
    return pa.table({name: draw(ARROW.get(name, arrow_values)) for name in names})


@SETTINGS
@given(table=arrow_tables(), data=st.data())
def test_readers_on_any_parquet_table(table, data):
    names = table.column_names
    with scratch_folder() as folder:
        path = folder / "table.parquet"
        pq.write_table(table, path)
        catalog = only_xrec_errors(
            read_catalog, path, item_col=(item := _pick(data.draw, names, "item")), **_declarations(data.draw, names, item),
            check_images=False,
        )
        weight = data.draw(st.one_of(st.none(), st.just(_pick(data.draw, names, "weight"))))
        inter = only_xrec_errors(
            read_interactions, path, user_col=_pick(data.draw, names, "user"), item_col=_pick(data.draw, names, "item"),
            time_col=_pick(data.draw, names, "timestamp"), weight_col=weight, on_duplicate="last",
        )
        for got in (catalog, inter):
            if got is not None:
                assert len(got.fingerprint()) == 16


# --- data location and spec reader --------------------------------------------------------------

_DATA_KEYS = sorted(KEYS)


data_values = mostly(
    st.sampled_from(["files", "movielens", "demo_shop", "items.csv", "events.parquet", "..", "/dev/null", ".",
                     "../outside.csv", "item", "user", "timestamp", "brand", "nowhere.csv", "items.xlsx", ""]),
    toml_values, odds=3,
)


@SETTINGS
@given(changes=st.dictionaries(st.sampled_from(_DATA_KEYS + ["other"]), data_values, max_size=3),
       drop=st.lists(st.sampled_from(["catalog", "interactions", "dataset"]), max_size=1))
def test_data_tables_load_or_raise_xrec_errors(changes, drop):
    table = {"dataset": "files", "catalog": "items.csv", "interactions": "events.parquet", "categorical": "brand", **changes}
    for key in drop:
        table.pop(key, None)
    with scratch_folder() as folder:
        pd.DataFrame({"item": ["a", "b"], "brand": ["NA", "null"], "user": ["x", "y"]}).to_csv(folder / "items.csv", index=False)
        pq.write_table(pa.table({"user": ["u", "v"], "item": ["a", "b"], "timestamp": [1, 2]}), folder / "events.parquet")
        location = only_xrec_errors(DataLocation.from_table, table, folder)
        if location is not None and location.dataset == "files":
            got = only_xrec_errors(load_dataset, location)
            if got is not None:  # what a blend file records loads the same data again
                assert load_dataset(DataLocation.from_hints(location.to_hints())).fingerprint() == got.fingerprint()


def _valid_spec() -> dict:
    return {
        "name": "generated",
        "data": {"dataset": "files", "catalog": "items.csv", "interactions": "events.csv"},
        "split": {"rule": "leave_last", "seed": 0},
        "evaluate": {"ks": [10], "metrics": ["hit_rate"], "baseline": "pop"},
        "sources": {"pop": {"kind": "popularity"}, "knn": {"kind": "item_knn"}},
        "blends": {"mix": {"weights": {"pop": 1.0, "knn": 0.5}, "normalizer": "zscore"}},
    }


_SPEC_PLACES = {
    "": ["name", "data", "split", "evaluate", "sources", "blends", "other"],
    "data": _DATA_KEYS,
    "split": ["rule", "seed", "validation", "test_fraction", "cutoff", "cold_fraction", "min_train"],
    "evaluate": ["ks", "metrics", "baseline", "primary", "protocol", "negatives", "seed", "chunk_size"],
    "sources.pop": ["kind", "other"],
    "blends.mix": ["weights", "normalizer", "sources", "method", "metric", "gated", "fusion", "k", "depth", "seed"],
}


@SETTINGS
@given(data=st.data())
def test_specs_with_one_generated_field_parse_or_raise_xrec_errors(data):
    raw = _valid_spec()
    for _ in range(data.draw(st.integers(min_value=1, max_value=3))):
        place = data.draw(st.sampled_from(sorted(_SPEC_PLACES)))
        key = data.draw(st.sampled_from(_SPEC_PLACES[place]))
        table = raw
        for part in filter(None, place.split(".")):
            table = table.setdefault(part, {}) if isinstance(table, dict) else {}
        if isinstance(table, dict):
            table[key] = data.draw(toml_values)
    with scratch_folder() as folder:
        path = folder / "spec.toml"
        path.write_text(tomli_w.dumps(raw), encoding="utf-8")
        only_xrec_errors(load_spec, path)
    only_xrec_errors(parse_spec, raw)


@SETTINGS
@given(content=st.one_of(
    st.binary(max_size=300),
    toml_values.map(lambda v: tomli_w.dumps(v if isinstance(v, dict) else {"x": v}).encode()),
    st.dictionaries(st.sampled_from(_SPEC_PLACES[""]), toml_values, max_size=6).map(lambda d: tomli_w.dumps(d).encode()),
))
def test_spec_files_of_any_bytes_load_or_raise_xrec_errors(content):
    with scratch_folder() as folder:
        path = folder / "spec.toml"
        path.write_bytes(content)
        only_xrec_errors(load_spec, path)


def test_only_xrec_errors_lets_other_exceptions_through():
    # The property's own check: a foreign exception must fail, an xrec one must not.
    assert only_xrec_errors(lambda: (_ for _ in ()).throw(XrecError("fine"))) is None
    with pytest.raises(KeyError):
        only_xrec_errors(lambda: {}["missing"])
