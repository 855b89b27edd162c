"""Turn a boolean mask of bad rows into an error message naming the rows."""

from __future__ import annotations

import numpy as np
import pandas as pd

from xrec.errors import DataError

_SHOW = 5


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
    """Message ``"<count> rows <what>: ..."`` listing the first few offending rows.

    ``what`` is a plural verb phrase ("have no item id"); for a single row its verb is made
    singular ("1 row has no item id").
    """
    mask = np.asarray(mask, dtype=bool)
    count = int(mask.sum())
    bad = frame.loc[mask]
    if columns is not None:
        bad = bad[columns]
    shown = "; ".join(
        f"row {idx}: " + ", ".join(f"{col}={val!r}" for col, val in row.items())
        for idx, row in bad.head(_SHOW).iterrows()
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
