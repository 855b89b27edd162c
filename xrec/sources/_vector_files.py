"""Readers for files of precomputed item vectors, and their alignment with a catalog.

Three layouts are read (the format is chosen by the file's extension):

- ``.npy``: a 2-D numeric array, one row per item, memory-mapped (``np.load(mmap_mode="r")``,
  never with pickle). The ids come from a separate file: a text file with one id per
  line (UTF-8; surrounding blanks stripped), or a 1-D ``.npy`` array of integers or
  strings, in row order.
- ``.parquet`` / ``.pq``: an id column plus either one list column (fixed-size or
  variable-size lists of numbers; every row must have the same length) or one numeric
  column per dimension (every column except the id column, in file order).
- ``.safetensors``: a 2-D numeric tensor (default name ``"vectors"``), read in row
  ranges through ``safe_open`` (memory-mapped). The ids are a 1-D integer tensor named
  ``"ids"`` in the same file, or a separate id file as for ``.npy``.

Ids are compared with catalog ids as text (``7`` matches the catalog id ``"7"``).
Rows are read in chunks straight into the catalog-ordered output, so a memory-mapped
file is never copied whole.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xrec.errors import ConfigError, DataError

_SHOW = 5
_CHUNK = 65536
NPY_SUFFIXES = (".npy",)
PARQUET_SUFFIXES = (".parquet", ".pq")
SAFETENSORS_SUFFIXES = (".safetensors",)


def _first(values: Any) -> str:
    values = list(values)
    more = f" (and {len(values) - _SHOW} more)" if len(values) > _SHOW else ""
    return ", ".join(repr(v.item() if isinstance(v, np.generic) else v) for v in values[:_SHOW]) + more


@dataclass
class VectorTable:
    """One vector file, opened: ids in row order and a reader of row ranges."""

    label: str
    ids: np.ndarray
    n_rows: int
    dim: int
    read: Callable[[int, int], np.ndarray]


def _check_numeric_dtype(dtype: np.dtype, label: str) -> None:
    if dtype.kind not in "fiu":
        raise DataError(f"{label}: vectors must be numbers (float or integer), got dtype {dtype}")


def _ids_as_text(raw: np.ndarray, label: str) -> np.ndarray:
    raw = np.asarray(raw)
    if raw.ndim != 1:
        raise DataError(f"{label}: ids must be one-dimensional, got shape {raw.shape}")
    if raw.dtype.kind not in "iuUS":
        raise DataError(f"{label}: ids must be integers or text, got dtype {raw.dtype}")
    if raw.dtype.kind == "S":
        return np.array([v.decode("utf-8").strip() for v in raw], dtype=object)
    return np.array([str(v).strip() for v in raw.tolist()], dtype=object)


def read_id_file(path: Path) -> np.ndarray:
    """Ids from a text file (one per line) or a 1-D ``.npy`` array of integers or strings."""
    if not path.is_file():
        raise ConfigError(f"vectors setting 'ids': file not found: {path}")
    if path.suffix.lower() == ".npy":
        try:
            raw = np.load(path, allow_pickle=False)
        except ValueError as exc:  # object arrays need pickle, which is never used on user files
            raise DataError(f"{path}: cannot read the ids without pickle ({exc}); save them as integers or fixed-width text") from exc
        return _ids_as_text(raw, str(path))
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except UnicodeDecodeError as exc:
        raise DataError(f"{path}: the id file is not UTF-8 text: {exc}") from exc
    while lines and not lines[-1].strip():
        lines.pop()
    ids = np.array([line.strip() for line in lines], dtype=object)
    blank = np.flatnonzero(ids == "")
    if len(blank):
        raise DataError(f"{path}: {len(blank)} blank id line(s), first at line(s) {_first(blank + 1)}")
    return ids


def _open_npy(path: Path, ids_path: Path | None) -> VectorTable:
    if ids_path is None:
        raise ConfigError(f"vectors setting 'ids': a .npy file of vectors needs an id file (text, one id per line, or .npy); got none for {path}")
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as exc:
        raise DataError(f"{path}: not a numeric .npy array ({exc})") from exc
    _check_numeric_dtype(arr.dtype, str(path))
    if arr.ndim != 2:
        raise DataError(f"{path}: vectors must be a 2-D array (items × dimensions), got shape {arr.shape}")
    return VectorTable(str(path), read_id_file(ids_path), int(arr.shape[0]), int(arr.shape[1]), lambda a, b: np.asarray(arr[a:b]))


def _open_safetensors(path: Path, ids_path: Path | None, tensor: str) -> VectorTable:
    from safetensors import safe_open

    try:
        handle = safe_open(str(path), framework="numpy")
    except Exception as exc:  # the library raises its own error types for malformed headers
        raise DataError(f"{path}: not a readable .safetensors file ({exc})") from exc
    keys = list(handle.keys())
    if tensor not in keys:
        raise DataError(f"{path}: no tensor named {tensor!r} (set the vectors setting 'tensor'); tensors: {keys}")
    part = handle.get_slice(tensor)
    shape, dtype_name = list(part.get_shape()), part.get_dtype()
    if dtype_name not in ("F16", "F32", "F64", "I8", "I16", "I32", "I64", "U8", "U16", "U32", "U64"):
        raise DataError(f"{path}: tensor {tensor!r} has dtype {dtype_name}; vectors must be float16/32/64 or integers")
    if len(shape) != 2:
        raise DataError(f"{path}: tensor {tensor!r} must be 2-D (items × dimensions), got shape {shape}")
    if ids_path is not None:
        if "ids" in keys:
            raise ConfigError(f"vectors setting 'ids': {path} holds its own 'ids' tensor; remove the setting or the tensor")
        ids = read_id_file(ids_path)
    elif "ids" in keys:
        ids = _ids_as_text(handle.get_tensor("ids"), f"{path} tensor 'ids'")
    else:
        raise DataError(f"{path}: no 'ids' tensor (1-D integers) and no vectors setting 'ids' naming an id file")
    return VectorTable(str(path), ids, int(shape[0]), int(shape[1]), lambda a, b: np.asarray(part[a:b]))


def _open_parquet(path: Path, id_col: str, vector_col: str | None) -> VectorTable:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        schema = pq.read_schema(path)
    except (pa.ArrowInvalid, OSError) as exc:
        raise DataError(f"{path}: not a readable Parquet file ({exc})") from exc
    names = list(schema.names)
    if id_col not in names:
        raise DataError(f"{path}: no id column {id_col!r} (set the vectors setting 'id_col'); columns: {names}")
    lists = [n for n in names if n != id_col and _is_list(schema.field(n).type)]
    if vector_col is not None:
        if vector_col not in names:
            raise DataError(f"{path}: no vector column {vector_col!r}; columns: {names}")
        columns = [vector_col]
    elif len(lists) == 1:
        columns = lists
    elif len(lists) > 1:
        raise DataError(f"{path}: several list columns {lists}; name the one holding the vectors with the setting 'vector_col'")
    else:
        columns = [n for n in names if n != id_col]
    table = pq.read_table(path, columns=[id_col, *columns])
    label = str(path)
    id_array = table.column(id_col)
    if id_array.null_count:
        nulls = np.flatnonzero(id_array.is_null().to_numpy(zero_copy_only=False))
        raise DataError(f"{label}: {len(nulls)} row(s) have no id in {id_col!r}, first at row(s) {_first(nulls)}")
    ids = np.array([str(v).strip() for v in id_array.to_pylist()], dtype=object)
    if not columns:
        raise DataError(f"{label}: no vector columns besides the id column {id_col!r}")
    if len(columns) == 1 and _is_list(table.schema.field(columns[0]).type):
        matrix = _list_column(table.column(columns[0]).combine_chunks(), ids, f"{label} column {columns[0]!r}")
    else:
        for name in columns:
            typ = table.schema.field(name).type
            if not (pa.types.is_integer(typ) or pa.types.is_floating(typ)):
                raise DataError(f"{label}: column {name!r} has type {typ}; every column besides {id_col!r} must be a number (one per dimension)")
            if table.column(name).null_count:
                raise DataError(f"{label}: column {name!r} has {table.column(name).null_count} empty (null) value(s)")
        matrix = np.column_stack([table.column(n).to_numpy() for n in columns]) if len(table) else np.zeros((0, len(columns)))
    return VectorTable(label, ids, int(matrix.shape[0]), int(matrix.shape[1]), lambda a, b: matrix[a:b])


def _is_list(typ: Any) -> bool:
    import pyarrow as pa

    return bool(pa.types.is_list(typ) or pa.types.is_large_list(typ) or pa.types.is_fixed_size_list(typ))


def _list_column(column: Any, ids: np.ndarray, label: str) -> np.ndarray:
    import pyarrow as pa
    import pyarrow.compute as pc

    value_type = column.type.value_type
    if not (pa.types.is_integer(value_type) or pa.types.is_floating(value_type)):
        raise DataError(f"{label}: list values have type {value_type}; vectors must be numbers")
    if column.null_count:
        rows = np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))
        raise DataError(f"{label}: {len(rows)} row(s) have no vector, ids {_first(ids[rows])}")
    if len(column) == 0:
        return np.zeros((0, 0))
    if pa.types.is_fixed_size_list(column.type):
        dim = column.type.list_size
    else:
        lengths = pc.list_value_length(column).to_numpy(zero_copy_only=False)
        dim = int(np.bincount(lengths).argmax())  # the most common length is taken as the intended one
        odd = np.flatnonzero(lengths != dim)
        if len(odd):
            raise DataError(
                f"{label}: vectors of mixed lengths: most have {dim} dimensions, but {len(odd)} row(s) differ, "
                f"ids {_first(f'{ids[r]} ({lengths[r]})' for r in odd)}"
            )
    values = column.flatten()
    if values.null_count:
        raise DataError(f"{label}: {values.null_count} empty (null) value(s) inside the vectors")
    return values.to_numpy(zero_copy_only=False).reshape(len(column), dim)


def open_vector_file(
    path: Path, *, ids_path: Path | None = None, id_col: str = "item", vector_col: str | None = None, tensor: str = "vectors"
) -> VectorTable:
    """Open a vector file by its extension (see the module docstring for the layouts)."""
    if not path.is_file():
        raise ConfigError(f"vectors setting 'path': file not found: {path}")
    suffix = path.suffix.lower()
    if suffix in NPY_SUFFIXES:
        table = _open_npy(path, ids_path)
    elif suffix in SAFETENSORS_SUFFIXES:
        table = _open_safetensors(path, ids_path, tensor)
    elif suffix in PARQUET_SUFFIXES:
        if ids_path is not None:
            raise ConfigError(f"vectors setting 'ids': a Parquet file carries its ids in column {id_col!r}; remove the setting")
        table = _open_parquet(path, id_col, vector_col)
    else:
        known = [*NPY_SUFFIXES, *PARQUET_SUFFIXES, *SAFETENSORS_SUFFIXES]
        raise ConfigError(f"vectors setting 'path': {path.name!r} has an unknown extension; known: {known}")
    if len(table.ids) != table.n_rows:
        raise DataError(f"{table.label}: {len(table.ids)} ids for {table.n_rows} vectors; there must be one id per row")
    if table.n_rows == 0 or table.dim == 0:
        raise DataError(f"{table.label}: the file holds no vectors ({table.n_rows} rows × {table.dim} dimensions)")
    return table


def _chunks(n: int, progress: bool, desc: str) -> Iterator[tuple[int, int]]:
    starts = range(0, n, _CHUNK)
    if progress:
        from tqdm.auto import tqdm

        starts = tqdm(starts, desc=desc, total=len(starts))
    for a in starts:
        yield a, min(a + _CHUNK, n)


def align_vectors(
    table: VectorTable,
    catalog_ids: np.ndarray,
    *,
    dim: int | None = None,
    on_missing: str = "error",
    on_extra: str = "error",
    progress: bool = False,
) -> tuple[np.ndarray, np.ndarray, int]:
    """The file's vectors in catalog order, float32.

    Returns ``(vectors, has_vector, n_extra)``: catalog items without a vector get a zero
    row and ``False`` (only with ``on_missing="skip"``); ``n_extra`` counts file ids that
    are not in the catalog (only with ``on_extra="ignore"``).
    """
    label = table.label
    if dim is not None and table.dim != dim:
        raise DataError(f"{label}: vectors have {table.dim} dimensions, the setting 'dim' expects {dim}")
    ids = table.ids
    file_ids = pd.Index(ids.astype(str))
    repeated = file_ids.duplicated(keep="first")
    if repeated.any():
        dupes = file_ids[repeated].unique()
        raise DataError(f"{label}: {len(dupes)} id(s) appear more than once: {_first(dupes)}")
    target = pd.Index(np.asarray(catalog_ids).astype(str)).get_indexer(file_ids).astype(np.int64)
    extra = target < 0
    if extra.any() and on_extra == "error":
        raise DataError(
            f"{label}: {int(extra.sum())} id(s) are not in the catalog: {_first(ids[extra])} "
            "(set on_extra = \"ignore\" to leave them out)"
        )
    has = np.zeros(len(catalog_ids), dtype=bool)
    has[target[~extra]] = True
    if not has.all() and on_missing == "error":
        missing = np.asarray(catalog_ids)[~has]
        raise DataError(
            f"{label}: {len(missing)} catalog item(s) have no vector: {_first(missing)} "
            "(set on_missing = \"skip\" to give them zero rows)"
        )
    out = np.zeros((len(catalog_ids), table.dim), dtype=np.float32)
    bad: list[int] = []
    for a, b in _chunks(table.n_rows, progress, "reading vectors"):
        rows = np.asarray(table.read(a, b))
        _check_numeric_dtype(rows.dtype, label)
        finite = np.isfinite(rows).all(axis=1) if rows.dtype.kind == "f" else np.ones(len(rows), dtype=bool)
        bad.extend((a + np.flatnonzero(~finite)).tolist())
        keep = target[a:b] >= 0
        out[target[a:b][keep]] = rows[keep]
    if bad:
        raise DataError(f"{label}: {len(bad)} vector(s) hold NaN or infinite values, ids {_first(ids[bad])}")
    return out, has, int(extra.sum())
