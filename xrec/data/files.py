"""Catalog and interactions from your own files: CSV or Parquet, chosen by the file's extension.

Extensions: ``.csv`` and ``.tsv`` (optionally compressed: ``.csv.gz``, ``.csv.zip``, ...),
``.parquet`` and ``.pq``. Your column names are mapped onto xrec's with ``item_col``,
``user_col``, ``time_col`` and ``weight_col``; the same checks as
:meth:`Catalog.from_frame` and :meth:`Interactions.from_frame` follow.

Missing values
--------------
In a CSV file only an empty field is missing. ``NA``, ``null``, ``None``, ``nan`` and every
other text are data (a brand called "NA" is a brand); error messages show an empty field as
``<empty>``. In a Parquet file a null is missing (shown as ``<null>``).

Rows in error messages are numbered from 1: row 1 is the first data row (for a CSV file
with one line per row, row N is line N + 1, after the header).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

from xrec.data._columns import column_name, column_names
from xrec.data._readers import FORMATS, KNOWN_SUFFIXES, MISSING_MARKERS, checked_format, read_frame
from xrec.data._report import reporting
from xrec.data.catalog import Catalog
from xrec.data.interactions import Interactions
from xrec.errors import DataError

__all__ = ["FORMATS", "KNOWN_SUFFIXES", "read_catalog", "read_interactions"]


def read_catalog(
    path: str | os.PathLike,
    *,
    item_col: str = "item",
    categorical: str | Sequence[str] = (),
    multilabel: str | Sequence[str] = (),
    numeric: str | Sequence[str] = (),
    text: str | Sequence[str] = (),
    image: str | None = None,
    image_root: str | os.PathLike | None = None,
    multilabel_sep: str = "|",
    check_images: bool = True,
    show_values: bool = True,
) -> Catalog:
    """Read and check a catalog file (CSV or Parquet, by extension).

    Parameters
    ----------
    path
        The file; every column is read (undeclared columns are kept, as in :meth:`Catalog.from_frame`).
    item_col, categorical, multilabel, numeric, text, image, multilabel_sep, check_images
        As in :meth:`Catalog.from_frame`; the item id column is read as text (``"007"`` stays
        ``"007"``, integer ids in Parquet are written in decimal).
    image_root
        Folder that relative image paths are read from; default: the file's folder.
    show_values
        ``False``: error messages name rows and columns but quote nothing from the file
        (used for files outside a spec's folder).

    Raises
    ------
    DataError
        The path is not a regular file (saying what it is), its extension is unknown, it cannot
        be parsed, or the rows break a check (rows named, numbered from 1).
    """
    path = Path(path)
    fmt = checked_format(path, "catalog")
    with reporting(missing=MISSING_MARKERS[fmt], hide_values=not show_values):
        declared = [column_name(item_col, "item_col")]
        for key, value in (("categorical", categorical), ("multilabel", multilabel), ("numeric", numeric), ("text", text)):
            declared += column_names(value, key)
        if column_name(image, "image", optional=True) is not None:
            declared.append(image)
        frame = read_frame(path, fmt, columns=None, required=declared, text_columns=[item_col], what="catalog",
                           show_details=show_values)
        try:
            return Catalog.from_frame(
                frame, item_col=item_col, categorical=categorical, multilabel=multilabel, numeric=numeric, text=text,
                image=image, image_root=path.parent if image_root is None else image_root,
                multilabel_sep=multilabel_sep, check_images=check_images,
            )
        except DataError as exc:
            raise DataError(f"{path}: {str(exc).removeprefix('catalog: ')}") from None


def read_interactions(
    path: str | os.PathLike,
    *,
    user_col: str = "user",
    item_col: str = "item",
    time_col: str = "timestamp",
    weight_col: str | None = None,
    catalog: Catalog | None = None,
    on_duplicate: str = "error",
    show_values: bool = True,
) -> Interactions:
    """Read and check an interactions file (CSV or Parquet, by extension).

    Only the mapped columns are read. A Parquet file is read with pyarrow and converted to
    pandas once, releasing each Arrow column as it is converted, so its rows are never held twice.

    Parameters
    ----------
    path
        The file.
    user_col, item_col, time_col, weight_col, catalog, on_duplicate
        As in :meth:`Interactions.from_frame`; user and item ids are read as text.
    show_values
        ``False``: error messages name rows and columns but quote nothing from the file.

    Raises
    ------
    DataError
        As :func:`read_catalog`.
    """
    path = Path(path)
    fmt = checked_format(path, "interactions")
    names = [column_name(user_col, "user_col"), column_name(item_col, "item_col"), column_name(time_col, "time_col")]
    if column_name(weight_col, "weight_col", optional=True) is not None:
        names.append(weight_col)
    with reporting(missing=MISSING_MARKERS[fmt], hide_values=not show_values):
        handed = [read_frame(path, fmt, columns=names, required=names, text_columns=[user_col, item_col], what="interactions",
                             show_details=show_values)]
        try:
            # Handed over without a name, so the file's columns can be released inside
            # from_frame once they are converted.
            return Interactions.from_frame(
                handed.pop(), user_col=user_col, item_col=item_col, time_col=time_col, weight_col=weight_col,
                catalog=catalog, on_duplicate=on_duplicate,
            )
        except DataError as exc:
            raise DataError(f"{path}: {str(exc).removeprefix('interactions: ')}") from None
