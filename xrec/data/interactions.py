"""Interactions: who did what, when, and how strongly."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
import pandas as pd

from xrec.data._report import raise_if_any
from xrec.data.catalog import ITEM, Catalog
from xrec.errors import DataError

USER = "user"
TIME = "timestamp"
WEIGHT = "weight"

_DUPLICATE_RULES = ("error", "last", "sum")


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
            On empty input, missing columns, missing ids, non-numeric or NaN timestamps,
            non-numeric or NaN weights, duplicates (with ``on_duplicate="error"``) or unknown items.
        """
        if not isinstance(frame, pd.DataFrame):
            raise DataError(f"interactions must be a pandas DataFrame, got {type(frame).__name__}")
        if on_duplicate not in _DUPLICATE_RULES:
            raise DataError(f"on_duplicate must be one of {_DUPLICATE_RULES}, got {on_duplicate!r}")
        if frame.empty:
            raise DataError("interactions are empty: at least one row is needed")
        needed = [user_col, item_col, time_col] + ([weight_col] if weight_col else [])
        missing = [c for c in needed if c not in frame.columns]
        if missing:
            raise DataError(f"interactions lack columns {missing}; they have {list(frame.columns)}")
        raw = frame.reset_index(drop=True)
        raise_if_any(raw, raw[user_col].isna(), "have no user id", [user_col, item_col], "interactions")
        raise_if_any(raw, raw[item_col].isna(), "have no item id", [user_col, item_col], "interactions")
        times = _to_seconds(raw[time_col])
        raise_if_any(raw, np.isnan(times) & raw[time_col].notna().to_numpy(), f"have a timestamp that is neither a number nor a date in {time_col!r}", needed, "interactions")
        raise_if_any(raw, np.isnan(times), f"have no timestamp in {time_col!r}", needed, "interactions")
        raise_if_any(raw, np.isinf(times), f"have an infinite timestamp in {time_col!r}", needed, "interactions")
        if weight_col:
            weights = pd.to_numeric(raw[weight_col], errors="coerce").to_numpy(dtype="float64")
            raise_if_any(raw, ~np.isfinite(weights), f"have a missing or non-numeric weight in {weight_col!r}", needed, "interactions")
        else:
            weights = np.ones(len(raw))
        out = pd.DataFrame(
            {
                USER: raw[user_col].astype(str).to_numpy(),
                ITEM: raw[item_col].astype(str).to_numpy(),
                TIME: times,
                WEIGHT: weights.astype("float32"),
            }
        )
        if catalog is not None:
            known = out[ITEM].isin(set(catalog.item_ids))
            raise_if_any(out, ~known, "name an item that is not in the catalog", [USER, ITEM], "interactions")
        dup = out.duplicated([USER, ITEM], keep=False)
        if dup.any():
            if on_duplicate == "error":
                raise_if_any(out, dup, "repeat a (user, item) pair (pass on_duplicate='last' or 'sum' to merge)", [USER, ITEM, TIME], "interactions")
            out = out.sort_values([USER, ITEM, TIME], kind="stable")
            if on_duplicate == "sum":
                summed = out.groupby([USER, ITEM], sort=False)[WEIGHT].transform("sum")
                out = out.assign(**{WEIGHT: summed.astype("float32")})
            out = out.drop_duplicates([USER, ITEM], keep="last")
        out = out.sort_values([USER, TIME, ITEM], kind="stable").reset_index(drop=True)
        return cls(frame=out)

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
            h.update("\x1f".join(f[col].tolist()).encode())
        h.update(np.ascontiguousarray(f[TIME].to_numpy(dtype="float64")).tobytes())
        h.update(np.ascontiguousarray(f[WEIGHT].to_numpy(dtype="float32")).tobytes())
        return h.hexdigest()[:16]


def _to_seconds(col: pd.Series) -> np.ndarray:
    """Timestamps as float seconds: numbers pass through; datetimes and date strings become epoch seconds."""
    if pd.api.types.is_datetime64_any_dtype(col):
        # Subtracting the epoch works whatever the stored unit (pandas 3 defaults to us, not ns)
        # and whether or not the column carries a time zone; NaT becomes NaN.
        epoch = pd.Timestamp(0, tz=getattr(col.dt, "tz", None))
        return ((col - epoch) / pd.Timedelta(1, "s")).to_numpy(dtype="float64", na_value=np.nan)
    values = pd.to_numeric(col, errors="coerce").to_numpy(dtype="float64", copy=True)
    unparsed = np.isnan(values) & col.notna().to_numpy()
    if unparsed.any() and (col.dtype == object or pd.api.types.is_string_dtype(col)):
        # Date strings such as "2024-05-01 12:00" (read as UTC when they carry no zone).
        dates = pd.to_datetime(col[unparsed], errors="coerce", utc=True, format="mixed")
        seconds = ((dates - pd.Timestamp(0, tz="UTC")) / pd.Timedelta(1, "s")).to_numpy(dtype="float64", na_value=np.nan)
        values[unparsed] = seconds
    return values
