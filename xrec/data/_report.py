"""Turn a boolean mask of bad rows into an error message naming the rows.

Rows are numbered from 1 in the order of the input: row 1 is the first row of a DataFrame,
or the first data row of a file (the line after a CSV header). Values are shown as the input
holds them; a missing value is shown by a marker (``<missing>`` by default, ``<empty>`` while
a CSV file is being checked, ``<null>`` for Parquet), never as ``nan``. While a file from
outside the spec's folder is being checked, no value is shown at all (:func:`reporting`).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from numbers import Real

import numpy as np
import pandas as pd

from xrec.errors import DataError

_SHOW = 5
_MISSING_MARKER: ContextVar[str] = ContextVar("xrec_missing_marker", default="<missing>")
_HIDE_VALUES: ContextVar[bool] = ContextVar("xrec_hide_values", default=False)


@contextmanager
def reporting(*, missing: str = "<missing>", hide_values: bool = False) -> Iterator[None]:
    """While active, row messages show missing values as ``missing`` and, with ``hide_values``, no values."""
    marker, hide = _MISSING_MARKER.set(missing), _HIDE_VALUES.set(hide_values)
    try:
        yield
    finally:
        _MISSING_MARKER.reset(marker)
        _HIDE_VALUES.reset(hide)


def values_hidden() -> bool:
    """Whether messages may quote nothing from the input (see :func:`reporting`)."""
    return _HIDE_VALUES.get()


def show_value(value) -> str:
    """One cell as the input holds it: text quoted, numbers plain, missing values as the marker."""
    if value is None or value is pd.NA or value is pd.NaT:
        return _MISSING_MARKER.get()
    if isinstance(value, (float, np.floating)) and np.isnan(value):
        return _MISSING_MARKER.get()
    if isinstance(value, (str, bytes)):
        return repr(value)  # escapes control characters and lone surrogates
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, Real):
        return repr(float(value))
    if isinstance(value, (dt.datetime, dt.date, np.datetime64)):
        try:
            return str(value)
        except (ValueError, OverflowError, NotImplementedError):  # e.g. a pandas Timestamp in year 0
            year = getattr(value, "year", None)
            return f"<a date in year {year}>" if year is not None else f"<{type(value).__name__}>"
    try:
        return repr(value)
    except Exception:  # a value whose repr fails must not hide the message about its row
        return f"<{type(value).__name__}>"


def _singular(what: str) -> str:
    """Agree the leading plural verb of ``what`` with one row ("have" -> "has", "share" -> "shares")."""
    verb, sep, rest = what.partition(" ")
    if verb == "have":
        verb = "has"
    elif verb in ("are", "were"):
        verb = {"are": "is", "were": "was"}[verb]
    elif verb.isalpha() and verb.islower() and not verb.endswith("s"):
        verb += "s"
    return verb + sep + rest


def describe_rows(frame: pd.DataFrame, mask: np.ndarray | pd.Series, what: str, columns: list[str] | None = None) -> str:
    """Message ``"<count> rows <what>: ..."`` listing the first few offending rows (numbered from 1).

    ``what`` is a plural verb phrase ("have no item id"); for a single row its verb is made
    singular ("1 row has no item id").
    """
    mask = np.asarray(mask, dtype=bool)
    count = int(mask.sum())
    positions = np.flatnonzero(mask)[:_SHOW]
    columns = list(frame.columns) if columns is None else columns
    if values_hidden():
        shown = ", ".join(f"row {p + 1}" for p in positions)
        shown += " (values not shown: the file lies outside the spec's folder)"
    else:
        shown = "; ".join(
            f"row {p + 1}: " + ", ".join(f"{col}={show_value(frame[col].iat[p])}" for col in columns) for p in positions
        )
    more = f" (and {count - _SHOW} more)" if count > _SHOW else ""
    if count == 1:
        return f"1 row {_singular(what)}: {shown}"
    return f"{count} rows {what}: {shown}{more}"


def raise_if_any(frame: pd.DataFrame, mask, what: str, columns: list[str] | None = None, context: str = "") -> None:
    """Raise :class:`DataError` when ``mask`` flags any row."""
    mask = np.asarray(mask, dtype=bool)
    if mask.any():
        prefix = f"{context}: " if context else ""
        raise DataError(prefix + describe_rows(frame, mask, what, columns))


def unstorable_text_mask(column: pd.Series) -> np.ndarray:
    """Rows holding a value that cannot be stored as text: ``bytes``, or text that is not valid
    Unicode (lone surrogates), alone or inside a list of labels.

    Columns of numbers or of Arrow-backed strings (always valid UTF-8) cannot hold such values
    and are passed without looking at each one.
    """
    python_strings = isinstance(column.dtype, pd.StringDtype) and column.dtype.storage == "python"
    if column.dtype != object and not python_strings:
        return np.zeros(len(column), dtype=bool)
    return np.fromiter((not _storable(v) for v in column), dtype=bool, count=len(column))


def _storable(value) -> bool:
    if isinstance(value, (bytes, bytearray, memoryview)):
        return False
    if isinstance(value, str):
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            return False
    if isinstance(value, (list, tuple, set, frozenset, np.ndarray)):
        return all(_storable(v) for v in (value.tolist() if isinstance(value, np.ndarray) else value))
    return True
