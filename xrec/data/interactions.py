"""Interactions: who did what, when, and how strongly."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
import pandas as pd

from xrec.data._columns import column_name
from xrec.data._report import raise_if_any, unstorable_text_mask
from xrec.data.catalog import ITEM, Catalog
from xrec.errors import DataError

USER = "user"
TIME = "timestamp"
WEIGHT = "weight"

_DUPLICATE_RULES = ("error", "last", "sum")
_HASH_CHUNK = 1_000_000


@dataclass(frozen=True)
class Interactions:
    """A validated table with columns ``user``, ``item`` (str), ``timestamp`` (float64) and ``weight`` (float32).

    Build with :meth:`from_frame`.
    """

    frame: pd.DataFrame

    @classmethod
    def from_frame(
        cls,
        frame: pd.DataFrame,
        *,
        user_col: str = "user",
        item_col: str = "item",
        time_col: str = "timestamp",
        weight_col: str | None = None,
        catalog: Catalog | None = None,
        on_duplicate: str = "error",
    ) -> Interactions:
        """Validate ``frame`` and build interactions.

        Parameters
        ----------
        frame
            One row per (user, item) event.
        user_col, item_col
            Columns of user and item ids (stored as str).
        time_col
            Column of timestamps: numbers (read as seconds) or datetimes (converted to epoch seconds).
        weight_col
            Optional column of ratings or strengths; missing means weight 1.
        catalog
            When given, every item must be in it.
        on_duplicate
            What to do with repeated (user, item) pairs: ``"error"`` (default), keep the
            ``"last"`` by time, or ``"sum"`` their weights (keeping the last time).

        Raises
        ------
        DataError
            On empty input, missing columns, missing ids, ids that cannot be stored as text
            (``bytes``, lone surrogates), timestamps that are missing, infinite, neither a number
            nor a date, or a date pandas cannot represent, weights that are missing, non-numeric
            or not finite as float32 (the dtype they are stored in), duplicates (with
            ``on_duplicate="error"``) or unknown items. Messages name the rows, numbered from 1.
        ConfigError
            A column name is not a non-empty string.
        """
        if not isinstance(frame, pd.DataFrame):
            raise DataError(f"interactions must be a pandas DataFrame, got {type(frame).__name__}")
        if on_duplicate not in _DUPLICATE_RULES:
            raise DataError(f"on_duplicate must be one of {_DUPLICATE_RULES}, got {on_duplicate!r}")
        if frame.empty:
            raise DataError("interactions are empty: at least one row is needed")
        user_col, item_col, time_col = (column_name(v, k) for k, v in (("user_col", user_col), ("item_col", item_col), ("time_col", time_col)))
        weight_col = column_name(weight_col, "weight_col", optional=True)
        needed = [user_col, item_col, time_col] + ([weight_col] if weight_col else [])
        missing = [c for c in needed if c not in frame.columns]
        if missing:
            raise DataError(f"interactions lack columns {missing}; they have {list(frame.columns)}")
        repeated = sorted({c for c in needed if list(frame.columns).count(c) > 1 or needed.count(c) > 1})
        if repeated:
            raise DataError(f"interactions: columns {repeated} are named twice (in the frame or in the column mapping)")
        raw = frame.reset_index(drop=True)
        for col, what in ((user_col, "user id"), (item_col, "item id")):
            raise_if_any(raw, raw[col].isna(), f"have no {what}", [user_col, item_col], "interactions")
            raise_if_any(raw, unstorable_text_mask(raw[col]), f"have a {what} that is not text (bytes, or a lone surrogate)", [col], "interactions")
        times, out_of_range = _to_seconds(raw[time_col])
        raise_if_any(raw, out_of_range, f"have a date in {time_col!r} outside the range pandas can represent", needed, "interactions")
        raise_if_any(raw, np.isnan(times) & raw[time_col].notna().to_numpy(), f"have a timestamp that is neither a number nor a date in {time_col!r}", needed, "interactions")
        raise_if_any(raw, np.isnan(times), f"have no timestamp in {time_col!r}", needed, "interactions")
        raise_if_any(raw, np.isinf(times), f"have an infinite timestamp in {time_col!r}", needed, "interactions")
        if weight_col:
            numbers = _to_numbers(raw[weight_col])
            raise_if_any(raw, np.isnan(numbers), f"have a missing or non-numeric weight in {weight_col!r}", needed, "interactions")
            # Checked in the dtype the weights are stored in: 1e39 is finite as float64, inf as float32.
            with np.errstate(over="ignore"):
                weights = numbers.astype("float32")
            raise_if_any(raw, ~np.isfinite(weights), f"have a weight in {weight_col!r} that is not a finite float32 (|w| < 3.4e38)", needed, "interactions")
            del numbers
        else:
            weights = np.ones(len(raw), dtype="float32")
        # Ids stay pandas text columns (Arrow-backed): no Python object per row.
        out = pd.DataFrame(
            {
                USER: raw[user_col].astype(str),
                ITEM: raw[item_col].astype(str),
                TIME: times,
                WEIGHT: weights,
            },
            copy=False,
        )
        # From here on only the converted columns are needed: the input's own columns are
        # released (when the caller holds no other reference to them, as read_interactions does not).
        del times, weights, raw, frame
        # Handed over in a list so that no local name keeps the unsorted columns alive while
        # their sorted copies are made.
        handed = [out]
        del out
        return cls(frame=_checked_and_sorted(handed, catalog, on_duplicate))

    def __len__(self) -> int:
        return len(self.frame)

    @property
    def n_users(self) -> int:
        """Number of distinct users."""
        return int(self.frame[USER].nunique())

    def fingerprint(self) -> str:
        """SHA-256 (first 16 hex digits) of the sorted (user, item, timestamp, weight) rows."""
        f = self.frame
        h = hashlib.sha256()
        for col in (USER, ITEM):
            # The same bytes as "\x1f".join(ids).encode(), fed a million ids at a time so that
            # 20M ids never exist as Python strings all at once.
            for start in range(0, len(f), _HASH_CHUNK):
                if start:
                    h.update(b"\x1f")
                h.update("\x1f".join(f[col].iloc[start : start + _HASH_CHUNK].tolist()).encode())
        h.update(np.ascontiguousarray(f[TIME].to_numpy(dtype="float64")).tobytes())
        h.update(np.ascontiguousarray(f[WEIGHT].to_numpy(dtype="float32")).tobytes())
        return h.hexdigest()[:16]


def _checked_and_sorted(handed: list[pd.DataFrame], catalog: Catalog | None, on_duplicate: str) -> pd.DataFrame:
    """The converted frame (the one item of ``handed``, taken out of it) checked against the
    catalog and for repeated pairs, merged per ``on_duplicate``, and ordered by user, time and
    item, as a new frame; the unsorted columns are released as their sorted copies are made."""
    out = handed.pop()
    # Each id column is factorized once, in sorted order; the catalog check, the duplicate
    # check and the final ordering all work on these integer codes.
    user_codes, users = _sorted_codes(out[USER])
    item_codes, items = _sorted_codes(out[ITEM])
    if catalog is not None:
        known = np.asarray(items.isin(catalog.item_ids))[item_codes]
        raise_if_any(out, ~known, "name an item that is not in the catalog", [USER, ITEM], "interactions")
    pairs = user_codes.astype(np.int64) * len(items) + item_codes
    pairs.sort()  # a sorted copy finds repeats with less memory than hashing every pair
    repeated = bool((pairs[1:] == pairs[:-1]).any())
    del pairs
    if repeated:
        dup = out.duplicated([USER, ITEM], keep=False).to_numpy()
        if on_duplicate == "error":
            raise_if_any(out, dup, "repeat a (user, item) pair (pass on_duplicate='last' or 'sum' to merge)", [USER, ITEM, TIME], "interactions")
        out = out.sort_values([USER, ITEM, TIME], kind="stable")
        if on_duplicate == "sum":
            with np.errstate(over="ignore"):  # an overflow to inf is reported below, with its rows
                summed = out.groupby([USER, ITEM], sort=False)[WEIGHT].transform("sum")
            out = out.assign(**{WEIGHT: summed.astype("float32")})
        out = out.drop_duplicates([USER, ITEM], keep="last").reset_index(drop=True)
        raise_if_any(out, ~np.isfinite(out[WEIGHT].to_numpy()), "have summed weights that are not a finite float32 (|w| < 3.4e38)", [USER, ITEM], "interactions (after on_duplicate='sum')")
        user_codes, users = _sorted_codes(out[USER])
        item_codes, items = _sorted_codes(out[ITEM])
    order = _order(user_codes, out[TIME].to_numpy(), item_codes)
    _release_arrow_memory()  # the coding's scratch buffers, before the sorted copy is made
    # The sorted id columns are taken from the few distinct ids by their codes: taking from
    # the whole (chunked) column would first join its chunks into one more copy.
    # Built one column at a time, each unsorted column dropped as soon as its sorted copy exists.
    sorted_columns = {}
    for name, codes, values in ((USER, user_codes, users), (ITEM, item_codes, items)):
        sorted_columns[name] = values.take(codes[order]).array
        out = out.drop(columns=name)
    del user_codes, item_codes
    for name in (TIME, WEIGHT):
        sorted_columns[name] = out[name].to_numpy()[order]
        out = out.drop(columns=name)
    return pd.DataFrame(sorted_columns, copy=False)


def _release_arrow_memory() -> None:
    """Hand memory that Arrow's allocator keeps for reuse back to the system (peak memory of large loads)."""
    try:
        import pyarrow as pa
    except ImportError:
        return
    pa.default_memory_pool().release_unused()


def _sorted_codes(col: pd.Series) -> tuple[np.ndarray, pd.Index]:
    """Integer codes of ``col``'s values (no missing ones), numbered in sorted order of the values, and those values.

    Arrow-backed text is coded by Arrow itself (distinct values sorted, then each row looked
    up), which needs only the int32 codes besides the column; other columns go through
    ``pandas.factorize``. Both order text by code point.
    """
    if isinstance(col.dtype, pd.StringDtype) and col.dtype.storage == "pyarrow":
        import pyarrow as pa
        import pyarrow.compute as pc

        values = pa.chunked_array(col.array.__arrow_array__())
        uniques = pc.unique(values)
        uniques = uniques.take(pc.sort_indices(uniques))
        codes = pc.index_in(values, value_set=uniques)
        return codes.to_numpy().astype(np.int32, copy=False), pd.Index(uniques.to_pylist(), dtype=col.dtype)
    codes, uniques = pd.factorize(col, sort=True)
    return codes.astype(np.int32 if len(uniques) < 2**31 else np.int64), uniques


def _order(user_codes: np.ndarray, times: np.ndarray, item_codes: np.ndarray) -> np.ndarray:
    """Row order by user, then time, then item: the same as ``np.lexsort((item_codes, times, user_codes))``
    for rows whose (user, item) pairs are distinct.

    When (user code, time rank, item code) fits in 63 bits it is packed into one int64 key per
    row; the keys are distinct (so are the pairs), so numpy's fast unstable sort gives the one
    order. Otherwise three stable argsorts, least significant key first. Both are several times
    faster than ``np.lexsort`` on millions of rows with a float key.
    """
    if len(times) == 0:
        return np.zeros(0, dtype=np.int64)
    by_time = np.argsort(times)
    ordered = times[by_time]
    time_ranks = np.empty(len(times), dtype=np.int64)
    time_ranks[by_time] = np.concatenate(([0], np.cumsum(ordered[1:] != ordered[:-1])))
    del by_time, ordered
    sizes = [int(codes.max()) + 1 for codes in (user_codes, time_ranks, item_codes)]
    if sum(size.bit_length() for size in sizes) <= 63:
        key = (user_codes.astype(np.int64) * sizes[1] + time_ranks) * sizes[2] + item_codes
        del time_ranks
        return np.argsort(key)
    order = np.argsort(item_codes, kind="stable")
    order = order[np.argsort(time_ranks[order], kind="stable")]
    return order[np.argsort(user_codes[order], kind="stable")]


def _to_numbers(col: pd.Series) -> np.ndarray:
    """``col`` as float64; anything that is not a number (text, lists, bools in text) becomes NaN."""
    if pd.api.types.is_bool_dtype(col):
        return col.to_numpy(dtype="float64", na_value=np.nan)
    try:
        values = pd.to_numeric(col, errors="coerce")
    except (TypeError, ValueError):  # cells pandas cannot even try (lists, dicts): judged one by one
        values = pd.Series([_number_or_nan(v) for v in col], dtype="float64")
    return values.to_numpy(dtype="float64", na_value=np.nan)


def _number_or_nan(value) -> float:
    try:
        return float(pd.to_numeric(value))
    except (TypeError, ValueError, OverflowError):
        return np.nan


def _epoch_seconds(dates: pd.Series) -> np.ndarray:
    """Datetime values (any unit, with or without a time zone) as float epoch seconds; NaT -> NaN.

    Read from the stored integers, so no arithmetic leaves the column's own unit (subtracting a
    nanosecond epoch would overflow for dates outside 1677-2262).
    """
    array = dates.array
    ticks = np.asarray(array.asi8, dtype="float64")
    per_second = float(np.timedelta64(1, "s") / np.timedelta64(1, array.unit))
    seconds = ticks / per_second
    seconds[np.asarray(dates.isna())] = np.nan
    return seconds


def _to_seconds(col: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Timestamps as float seconds, and a mask of date text outside the range pandas can represent.

    Numbers pass through; datetimes and date strings become epoch seconds (date strings
    without a zone are read as UTC). Unreadable values become NaN.
    """
    out_of_range = np.zeros(len(col), dtype=bool)
    if pd.api.types.is_datetime64_any_dtype(col):
        return _epoch_seconds(col), out_of_range
    values = _to_numbers(col)
    if not values.flags.owndata or not values.flags.writeable:
        values = values.copy()  # a float64 column comes back as a view; date text is written into it below
    unparsed = np.isnan(values) & col.notna().to_numpy()
    if unparsed.any() and (col.dtype == object or pd.api.types.is_string_dtype(col)):
        # Date strings such as "2024-05-01 12:00" (read as UTC when they carry no zone).
        seconds, too_far = _parse_dates(col[unparsed])
        values[unparsed] = seconds
        out_of_range[unparsed] = too_far
    return values, out_of_range


def _parse_dates(col: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Epoch seconds of date text (NaN where unreadable) and a mask of dates out of pandas' range."""
    try:
        return _epoch_seconds(pd.to_datetime(col, errors="coerce", utc=True, format="mixed")), np.zeros(len(col), dtype=bool)
    except (OverflowError, ValueError, TypeError):  # pandas' OutOfBoundsDatetime is a ValueError
        pass
    # One value is out of range or unreadable in a way pandas does not coerce: judge each
    # distinct value alone, so the rows at fault can be named.
    seconds = np.full(len(col), np.nan)
    too_far = np.zeros(len(col), dtype=bool)
    codes, uniques = pd.factorize(col)
    for code, value in enumerate(uniques):
        rows = codes == code
        try:
            seconds[rows] = _epoch_seconds(pd.to_datetime(pd.Series([value], dtype=object), errors="coerce", utc=True, format="mixed"))[0]
        except (OverflowError, ValueError):
            too_far[rows] = True
        except TypeError:
            pass  # not date text at all: left NaN, reported as neither a number nor a date
    return seconds, too_far
