"""Turn a boolean mask of bad rows into an error message naming the rows."""

from __future__ import annotations

import numpy as np
import pandas as pd

from xrec.errors import DataError

_SHOW = 5


def describe_rows(frame: pd.DataFrame, mask: np.ndarray | pd.Series, what: str, columns: list[str] | None = None) -> str:
    """Message ``"<count> rows <what>; first: ..."`` listing the first few offending rows."""
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
    noun = "row" if count == 1 else "rows"
    return f"{count} {noun} {what}: {shown}{more}"


def raise_if_any(frame: pd.DataFrame, mask, what: str, columns: list[str] | None = None, context: str = "") -> None:
    """Raise :class:`DataError` when ``mask`` flags any row."""
    mask = np.asarray(mask, dtype=bool)
    if mask.any():
        prefix = f"{context}: " if context else ""
        raise DataError(prefix + describe_rows(frame, mask, what, columns))
