"""Read a CSV or Parquet file into a DataFrame: format by extension, ids as text, clear errors.

Missing values: in CSV only an empty field is missing (``keep_default_na=False``,
``na_values=[""]``), so ``NA``, ``null`` or ``None`` are read as the text they are; in Parquet
a null is missing.

Parquet files are read with pyarrow, only the columns asked for, and converted to pandas
once: the Arrow buffers are released column by column as they are converted
(``self_destruct``), and text columns stay Arrow-backed (pandas' ``str`` dtype), so the file's
content is never held twice.
"""

from __future__ import annotations

import stat
from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from xrec.errors import DataError

_CSV_SUFFIXES = {".csv": ",", ".tsv": "\t"}
COMPRESSED = (".gz", ".bz2", ".xz", ".zst", ".zip")
_PARQUET_SUFFIXES = (".parquet", ".pq")
FORMATS = ("csv", "tsv", "parquet")
KNOWN_SUFFIXES = (*_CSV_SUFFIXES, *(c + z for c in _CSV_SUFFIXES for z in COMPRESSED), *_PARQUET_SUFFIXES)

# How a missing value is shown in row messages, per format (never "nan").
MISSING_MARKERS = {"csv": "<empty>", "tsv": "<empty>", "parquet": "<null>"}


def file_format(path: Path) -> str:
    """``"csv"``, ``"tsv"`` or ``"parquet"`` from the file's extension (compressed CSV allowed)."""
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in COMPRESSED:
        suffixes = suffixes[:-1]
    last = suffixes[-1] if suffixes else ""
    if last in _PARQUET_SUFFIXES and path.suffix.lower() == last:
        return "parquet"
    if last in _CSV_SUFFIXES:
        return last[1:]
    raise DataError(f"{path}: unknown file type {path.suffix!r}; known extensions: {', '.join(KNOWN_SUFFIXES)}")


def path_problem(path: Path, what: str = "data file") -> str | None:
    """Why ``path`` cannot be read as a ``what`` (``None`` when it is a regular file).

    Says what the path is: missing, a folder, a device such as ``/dev/null``, a pipe, ...
    """
    try:
        mode = path.stat().st_mode
    except FileNotFoundError:
        return f"file not found: {path}"
    except NotADirectoryError:
        return f"file not found: {path} (a folder on the way is a file)"
    except PermissionError:
        return f"{path}: permission denied"
    except OSError as exc:
        return f"{path}: cannot be examined ({exc.strerror or type(exc).__name__})"
    if stat.S_ISREG(mode):
        return None
    kinds = (
        (stat.S_ISDIR, "a folder"),
        (stat.S_ISCHR, "a character device"),
        (stat.S_ISBLK, "a block device"),
        (stat.S_ISFIFO, "a named pipe"),
        (stat.S_ISSOCK, "a socket"),
    )
    kind = next((name for test, name in kinds if test(mode)), "not a regular file")
    return f"{path} is {kind}, not a {what}"


def column_names_in(path: Path, fmt: str, *, show_details: bool = True) -> list[str]:
    """The column names the file declares (CSV header or Parquet schema), without reading the rows."""
    if fmt == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        try:
            return list(pq.read_schema(path).names)
        except (pa.ArrowException, OSError, ValueError) as exc:
            raise _unreadable(path, fmt, exc, show_details) from None
    return list(_csv(path, fmt, show_details, nrows=0).columns)


def checked_format(path: Path, what: str) -> str:
    """The format of a file that exists and is a regular file; :class:`DataError` saying what it is otherwise."""
    problem = path_problem(path)
    if problem:
        raise DataError(f"{what}: {problem}")
    return file_format(path)


def read_frame(path: Path, fmt: str, *, columns: Sequence[str] | None, required: Sequence[str], text_columns: Sequence[str],
               what: str, show_details: bool = True) -> pd.DataFrame:
    """The rows of a file in format ``fmt`` (see :func:`checked_format`), only ``columns`` (all when
    ``None``), with ``text_columns`` read as text.

    Raises
    ------
    DataError
        A ``required`` column is absent (the message lists the file's columns), or the file
        cannot be parsed. With ``show_details=False`` neither the file's columns nor the
        parser's own message (which may quote the file's bytes) are shown.
    """
    have = column_names_in(path, fmt, show_details=show_details)
    absent = [c for c in dict.fromkeys(required) if c not in have]
    if absent:
        listed = f"; it has {have}" if show_details else ""
        raise DataError(f"{what}: {path} lacks columns {absent}{listed}")
    if columns is not None:
        columns = list(dict.fromkeys(columns))
    if fmt == "parquet":
        return _parquet(path, columns, text_columns, show_details)
    return _csv(path, fmt, show_details, usecols=columns, dtype={c: str for c in text_columns if c in have})


def _csv(path: Path, fmt: str, show_details: bool, **options) -> pd.DataFrame:
    try:
        return pd.read_csv(
            path, sep=_CSV_SUFFIXES["." + fmt], keep_default_na=False, na_values=[""], encoding="utf-8",
            compression="infer", **options,
        )
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError, OSError, EOFError) as exc:
        raise _unreadable(path, fmt, exc, show_details) from None


def _parquet(path: Path, columns: list[str] | None, text_columns: Sequence[str], show_details: bool) -> pd.DataFrame:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path, columns=columns)
        for name in text_columns:
            if name in table.column_names:
                position = table.column_names.index(name)
                table = table.set_column(position, name, _as_text(table.column(name)))
        # One conversion; each Arrow column is released as soon as it is converted, and the
        # reader's buffers go back to the system rather than staying in Arrow's pool.
        frame = table.to_pandas(self_destruct=True, split_blocks=True)
        del table
        pa.default_memory_pool().release_unused()
        return frame
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise _unreadable(path, "parquet", exc, show_details) from None


def _as_text(column):
    """An id column as Arrow text: dictionary-encoded columns decoded, integers written in decimal.

    Text and binary columns pass as they are (binary ids are reported by the loaders, row by row).
    """
    import pyarrow as pa

    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.cast(kind.value_type)
        kind = column.type
    if pa.types.is_integer(kind):
        return column.cast(pa.string())
    return column


def _unreadable(path: Path, fmt: str, exc: BaseException, show_details: bool) -> DataError:
    name = "Parquet" if fmt == "parquet" else fmt.upper()
    if not show_details:
        return DataError(f"cannot read {path} as {name} (details not shown: the file lies outside the spec's folder)")
    detail = str(exc).strip() or type(exc).__name__
    return DataError(f"cannot read {path} as {name}: {detail}")
