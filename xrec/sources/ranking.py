"""Your current ranking as a source: a production top-N list per user, read from a file.

The ``"ranking"`` kind (:class:`RankingSource`) reads rows of (user, item, score) or
(user, item, rank) from CSV or Parquet — what a live system logged for each user — and
scores every catalog item, so xrec's evaluator can measure the live ranking, a blend can
mix it with other sources, and every comparison can use it as its baseline.

How every item gets a score (a rule that never favours the file):

- A user's listed items are ordered by the file (higher score first, or lower rank
  first). The item at position ``p`` of a list of ``L`` known items (``p = 1`` is the
  best; items with equal values share the best position among them) scores
  ``L + 1 - p``, so listed items score from ``L`` down to at least 1.
- Every item outside a user's list scores 0: below all listed items, all tied. The
  evaluator breaks ties against the scorer, so a held-out item the file did not list
  gets the worst rank among the user's candidates, never a lucky one.
- A user absent from the file gets 0 for every item: all tied, so the worst rank.
- Items the user trained on may be listed; the evaluator leaves them out anyway.

Rows naming users not in the fold or items not in the catalog are left out, counted in
``skipped_`` and reported in a warning. With ``depth``, only each user's first ``depth``
rows of the file (in the file's own order of score or rank) count, before unknown items
are left out, so an unknown item never lets a lower one into the top-N.

The file must come from a system that did not see the held-out interactions (for
instance a ranking logged before the test period); xrec cannot check that.

Example spec table (paths are relative to the spec file)::

    [sources.current]
    kind = "ranking"
    path = "current.csv"      # columns user, item and score (or rank)
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import ClassVar, Self

import numpy as np
import pandas as pd
import scipy.sparse as sp

from xrec._validation import check_int
from xrec.errors import ConfigError, DataError
from xrec.fold import Fold
from xrec.sources.base import Source

_SHOW = 5


def _rows_message(frame: pd.DataFrame, mask: np.ndarray, what: str, label: str) -> str:
    bad = frame.loc[mask]
    shown = "; ".join(
        f"row {i}: " + ", ".join(f"{c}={v!r}" for c, v in row.items()) for i, row in bad.head(_SHOW).iterrows()
    )
    more = f" (and {len(bad) - _SHOW} more)" if len(bad) > _SHOW else ""
    return f"{label}: {len(bad)} row(s) {what} (rows counted from 0 after the header): {shown}{more}"


def read_ranking_file(
    path: str | Path,
    *,
    user_col: str = "user",
    item_col: str = "item",
    score_col: str | None = None,
    rank_col: str | None = None,
) -> tuple[pd.DataFrame, str]:
    """Read and check a ranking file; returns ``(frame, by)``.

    ``frame`` has columns ``user``, ``item`` (text) and ``value`` (float64); ``by`` is
    ``"score"`` (higher is better) or ``"rank"`` (lower is better). Without ``score_col``
    and ``rank_col`` the file must have exactly one of the columns ``score`` and ``rank``.

    Raises
    ------
    ConfigError
        A missing file, an unknown extension, both ``score_col`` and ``rank_col`` given.
    DataError
        Naming the rows: an unreadable or empty file, missing columns, both a ``score``
        and a ``rank`` column (and neither named), empty users or items, non-numeric, NaN
        or infinite values, a repeated (user, item) pair.
    """
    path = Path(path)
    label = str(path)
    if score_col is not None and rank_col is not None:
        raise ConfigError("ranking settings 'score_col' and 'rank_col': give one, not both")
    if not path.is_file():
        raise ConfigError(f"ranking setting 'path': file not found: {path}")
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".parquet", ".pq"):
        raise ConfigError(f"ranking setting 'path': {path.name!r} must end in .csv, .parquet or .pq")
    columns = _file_columns(path, suffix == ".csv")
    if score_col is None and rank_col is None:
        present = [c for c in ("score", "rank") if c in columns]
        if len(present) == 2:
            raise DataError(f"{label}: has both a 'score' and a 'rank' column; say which orders the list with the setting 'score_col' or 'rank_col'")
        if not present:
            raise DataError(f"{label}: no 'score' or 'rank' column (or set 'score_col' / 'rank_col'); columns: {columns}")
        by, value_col = present[0], present[0]
    else:
        by, value_col = ("score", score_col) if score_col is not None else ("rank", rank_col)
    missing = [c for c in (user_col, item_col, value_col) if c not in columns]
    if missing:
        raise DataError(f"{label}: lacks column(s) {missing}; columns: {columns}")
    wanted = [user_col, item_col, value_col]
    if suffix == ".csv":
        try:  # only the three columns are read; ids as text, so "007" stays "007"
            frame = pd.read_csv(path, usecols=wanted, dtype={user_col: str, item_col: str})
        except (pd.errors.ParserError, UnicodeDecodeError) as exc:
            raise DataError(f"{label}: cannot read as CSV: {exc}") from exc
    else:
        frame = pd.read_parquet(path, columns=wanted)
    if frame.empty:
        raise DataError(f"{label}: holds no rows")
    frame = frame[[user_col, item_col, value_col]].rename(columns={user_col: "user", item_col: "item", value_col: by})
    for col in ("user", "item"):
        empty = frame[col].isna().to_numpy()
        if empty.any():
            raise DataError(_rows_message(frame, empty, f"have no {col}", label))
        if not pd.api.types.is_string_dtype(frame[col]):
            frame[col] = frame[col].astype(str)
    values = pd.to_numeric(frame[by], errors="coerce")
    non_numeric = (values.isna() & frame[by].notna()).to_numpy()
    if non_numeric.any():
        raise DataError(_rows_message(frame, non_numeric, f"have a non-numeric {by}", label))
    values = values.to_numpy(dtype=np.float64)
    if not np.isfinite(values).all():
        raise DataError(_rows_message(frame, ~np.isfinite(values), f"have a missing (NaN) or infinite {by}", label))
    users, items = pd.factorize(frame["user"])[0], pd.factorize(frame["item"])[0]
    dup = pd.Series(users.astype(np.int64) * (int(items.max()) + 1) + items).duplicated(keep=False).to_numpy()
    if dup.any():
        raise DataError(_rows_message(frame, dup, "repeat a (user, item) pair", label))
    return pd.DataFrame({"user": frame["user"].to_numpy(), "item": frame["item"].to_numpy(), "value": values}), by


def _file_columns(path: Path, csv: bool) -> list[str]:
    """Column names of a CSV (its header) or Parquet file (its schema), read without the rows."""
    if csv:
        try:
            return [str(c) for c in pd.read_csv(path, nrows=0).columns]
        except (pd.errors.EmptyDataError, pd.errors.ParserError, UnicodeDecodeError) as exc:
            raise DataError(f"{path}: cannot read as CSV: {exc}") from exc
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        return list(pq.read_schema(path).names)
    except (pa.ArrowInvalid, OSError) as exc:
        raise DataError(f"{path}: not a readable Parquet file ({exc})") from exc


def _within_group(groups: np.ndarray, values: np.ndarray | None = None) -> np.ndarray:
    """0-based place of each row in its run of equal ``groups`` (rows sorted by group, then value).

    With ``values``, rows with equal values share the place of the first of them.
    """
    n = len(groups)
    index = np.arange(n)
    new_group = np.r_[True, groups[1:] != groups[:-1]] if n else np.zeros(0, dtype=bool)
    group_start = np.maximum.accumulate(np.where(new_group, index, 0)) if n else index
    if values is None:
        return index - group_start
    new_value = new_group | np.r_[True, values[1:] != values[:-1]]
    return np.maximum.accumulate(np.where(new_value, index, 0)) - group_start


class RankingSource(Source):
    """A production ranking (top-N items per user) read from a file, scoring every item.

    See the module docstring for the scoring rule: listed items score ``L + 1 - p`` by
    their position ``p`` in the user's list of ``L``, everything else 0 (tied, so the
    evaluator ranks an unlisted held-out item last among the user's candidates).

    Parameters
    ----------
    path
        CSV (``.csv``) or Parquet (``.parquet`` / ``.pq``) file with one row per (user,
        item). In a spec, relative to the spec file.
    user_col, item_col
        Columns of user and item ids (read as text).
    score_col
        Column of scores, higher is better.
    rank_col
        Column of ranks, lower is better. With neither ``score_col`` nor ``rank_col``, the
        file's ``score`` or ``rank`` column (exactly one of them must be there).
    depth
        Keep only each user's first ``depth`` rows in the file's order (its top-N);
        ``None`` keeps every row.

    Attributes
    ----------
    list_scores_
        Users × items CSR matrix of the listed items' scores (``L + 1 - p``).
    list_lengths_
        ``(n_users,)`` int64, known items listed per user (0: not in the file).
    skipped_
        ``{"unknown_user": rows, "unknown_item": rows}``: rows left out because their user
        is not in the fold or their item is not in the catalog (a row with both counts in both).
    by_
        ``"score"`` or ``"rank"``: which column ordered the lists.
    """

    kind = "ranking"
    path_settings: ClassVar[tuple[str, ...]] = ("path",)

    def __init__(
        self,
        path: str,
        user_col: str = "user",
        item_col: str = "item",
        score_col: str | None = None,
        rank_col: str | None = None,
        depth: int | None = None,
    ) -> None:
        self.path = path
        self.user_col = user_col
        self.item_col = item_col
        self.score_col = score_col
        self.rank_col = rank_col
        self.depth = depth

    def fit(self, fold: Fold) -> Self:
        """Read the file and place each user's list on the fold's user and item index; returns ``self``."""
        depth = check_int(self.depth, "ranking setting 'depth'", low=1, allow_none=True)
        frame, self.by_ = read_ranking_file(
            self.path, user_col=self.user_col, item_col=self.item_col, score_col=self.score_col, rank_col=self.rank_col
        )
        # best first within each user; equal values keep the file's order here (their scores tie below)
        key = -frame["value"].to_numpy() if self.by_ == "score" else frame["value"].to_numpy()
        # ids are looked up once per distinct id, through their codes
        file_users, user_names = pd.factorize(frame["user"])
        file_items, item_names = pd.factorize(frame["item"])
        order = np.lexsort((key, file_users))
        if depth is not None:
            order = order[_within_group(file_users[order]) < depth]
        users = pd.Index(np.asarray(fold.user_ids).astype(str)).get_indexer(user_names)[file_users[order]]
        items = pd.Index(fold.catalog.item_ids.astype(str)).get_indexer(item_names)[file_items[order]]
        unknown_user, unknown_item = users < 0, items < 0
        self.skipped_ = {"unknown_user": int(unknown_user.sum()), "unknown_item": int(unknown_item.sum())}
        if unknown_user.any() or unknown_item.any():
            warnings.warn(
                f"{self.path}: left out {int((unknown_user | unknown_item).sum())} of {len(order)} rows: "
                f"{self.skipped_['unknown_user']} name a user not in the data, "
                f"{self.skipped_['unknown_item']} an item not in the catalog",
                stacklevel=2,
            )
        keep = ~(unknown_user | unknown_item)
        u, i, k = users[keep].astype(np.int64), items[keep].astype(np.int64), key[order][keep]
        # position = 1 + number of the user's items strictly better ("min" ranking: ties share the best)
        position = _within_group(u, k) + 1
        lengths = np.bincount(u, minlength=fold.n_users).astype(np.int64)
        values = (lengths[u] + 1 - position).astype(np.float32)
        matrix = sp.csr_matrix((values, (u, i)), shape=(fold.n_users, fold.n_items), dtype=np.float32)
        matrix.sort_indices()
        self.list_scores_ = matrix
        self.list_lengths_ = lengths
        self.fitted_ = True
        return self

    def score(self, users: np.ndarray) -> np.ndarray:
        """Scores of shape ``(len(users), n_items)``, float32: ``L + 1 - p`` for listed items, 0 elsewhere."""
        self._check_fitted()
        return self.list_scores_[np.asarray(users)].toarray().astype(np.float32, copy=False)
