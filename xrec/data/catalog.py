"""The item catalog: one row per item, with declared columns for each modality."""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from xrec.data._columns import column_name, column_names
from xrec.data._report import raise_if_any, unstorable_text_mask
from xrec.errors import DataError

ITEM = "item"
_NOT_TEXT = "have {} that is not text (bytes, or a lone surrogate)"


@dataclass(frozen=True)
class CatalogSchema:
    """Which catalog columns carry which modality.

    Parameters
    ----------
    categorical
        Columns with one label per item (e.g. product type).
    multilabel
        Columns with a set of labels per item (e.g. genres); stored as tuples of str.
    numeric
        Columns with one number per item (e.g. price, year).
    text
        Columns holding free text (title, description).
    image
        Column holding an image path, relative to ``image_root`` when relative.
    """

    categorical: tuple[str, ...] = ()
    multilabel: tuple[str, ...] = ()
    numeric: tuple[str, ...] = ()
    text: tuple[str, ...] = ()
    image: str | None = None

    @property
    def attribute_columns(self) -> tuple[str, ...]:
        """Categorical, multilabel and numeric columns, in that order."""
        return self.categorical + self.multilabel + self.numeric

    @property
    def columns(self) -> tuple[str, ...]:
        """Every declared column: attributes, then text, then the image column."""
        return self.attribute_columns + self.text + ((self.image,) if self.image else ())

    def to_dict(self) -> dict:
        """The schema as a plain dict (lists of column names)."""
        out: dict = {
            "categorical": list(self.categorical),
            "multilabel": list(self.multilabel),
            "numeric": list(self.numeric),
            "text": list(self.text),
        }
        if self.image:
            out["image"] = self.image
        return out


def _as_labels(value, sep: str) -> tuple[str, ...]:
    if isinstance(value, (list, tuple, set, np.ndarray)):
        return tuple(sorted(str(v) for v in value))
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return ()
    text = str(value).strip()
    if not text:
        return ()
    return tuple(sorted(part.strip() for part in text.split(sep) if part.strip()))


@dataclass(frozen=True)
class Catalog:
    """Items and their content. Row order defines the item index used everywhere inside xrec.

    Build with :meth:`from_frame`, which validates the input.
    """

    items: pd.DataFrame
    schema: CatalogSchema
    image_root: Path | None = None
    _positions: dict = field(default=None, repr=False, compare=False)  # type: ignore[assignment]

    @classmethod
    def from_frame(
        cls,
        frame: pd.DataFrame,
        *,
        item_col: str = "item",
        categorical: str | Sequence[str] = (),
        multilabel: str | Sequence[str] = (),
        numeric: str | Sequence[str] = (),
        text: str | Sequence[str] = (),
        image: str | None = None,
        image_root: str | Path | None = None,
        multilabel_sep: str = "|",
        check_images: bool = True,
    ) -> Catalog:
        """Validate ``frame`` and build a catalog.

        Parameters
        ----------
        frame
            One row per item; undeclared columns are kept but not used as content.
        item_col
            Column of item ids (stored as str, renamed ``item``).
        categorical, multilabel, numeric, text, image
            Columns per modality (see :class:`CatalogSchema`): a list of names, or one name as a
            string (``categorical="brand"`` is the column ``brand``). Multilabel cells may be
            ``multilabel_sep``-joined strings (``"a|b|c"``) or lists; labels are stored as sorted tuples.
        image_root
            Folder that relative image paths are read from.
        multilabel_sep
            Separator of labels in multilabel strings.
        check_images
            Check that every image file exists.

        Raises
        ------
        DataError
            On an empty frame, a column declared twice, missing declared columns, duplicate
            or missing item ids, ids or text that cannot be stored as text (``bytes``, lone
            surrogates), non-numeric, missing or infinite values in numeric columns, missing
            categorical values, non-string text, or missing image files. Messages name the
            rows, numbered from 1.
        ConfigError
            A column declaration is not a name or a list of names.
        """
        if not isinstance(frame, pd.DataFrame):
            raise DataError(f"catalog must be a pandas DataFrame, got {type(frame).__name__}")
        if frame.empty:
            raise DataError("catalog is empty: it needs at least one item")
        item_col = column_name(item_col, "item_col")
        schema = CatalogSchema(
            column_names(categorical, "categorical"),
            column_names(multilabel, "multilabel"),
            column_names(numeric, "numeric"),
            column_names(text, "text"),
            column_name(image, "image", optional=True),
        )
        declared = (item_col, *schema.columns)
        dupes = sorted({c for c in declared if declared.count(c) > 1})
        if dupes:
            raise DataError(f"catalog columns declared twice: {dupes}")
        missing = [c for c in declared if c not in frame.columns]
        if missing:
            raise DataError(f"catalog lacks declared columns {missing}; it has {list(frame.columns)}")
        if item_col != ITEM and ITEM in frame.columns:
            raise DataError(f"catalog: column {ITEM!r} would clash with the item ids of {item_col!r} (stored as {ITEM!r}); rename or drop it")
        repeated = sorted({str(c) for c in frame.columns if list(frame.columns).count(c) > 1})
        if repeated:
            raise DataError(f"catalog: columns {repeated} appear more than once")
        items = frame.reset_index(drop=True).copy()
        raise_if_any(items, items[item_col].isna(), "have no item id", [item_col], "catalog")
        raise_if_any(items, unstorable_text_mask(items[item_col]), _NOT_TEXT.format("an item id"), [item_col], "catalog")
        for col in (*schema.categorical, *schema.multilabel, *schema.text, *([schema.image] if schema.image else [])):
            raise_if_any(items, unstorable_text_mask(items[col]), _NOT_TEXT.format(f"a value in {col!r}"), [item_col, col], "catalog")
        items[item_col] = items[item_col].astype(str)
        raise_if_any(items, items[item_col].duplicated(keep=False), "share an item id", [item_col], "catalog")
        for col in schema.numeric:
            values = pd.to_numeric(items[col], errors="coerce")
            raise_if_any(items, values.isna() & items[col].notna(), f"have a non-numeric {col!r}", [item_col, col], "catalog")
            raise_if_any(items, values.isna(), f"have a missing or NaN value in numeric column {col!r}", [item_col, col], "catalog")
            raise_if_any(items, np.isinf(values.to_numpy(dtype="float64")), f"have an infinite value in numeric column {col!r}", [item_col, col], "catalog")
            items[col] = values.astype("float64")
        for col in schema.categorical:
            raise_if_any(items, items[col].isna(), f"have no value in categorical column {col!r}", [item_col, col], "catalog")
            items[col] = items[col].astype(str)
        for col in schema.multilabel:
            items[col] = [_as_labels(v, multilabel_sep) for v in items[col]]
        for col in schema.text:
            raise_if_any(
                items,
                ~items[col].map(lambda v: isinstance(v, str)),
                f"have a non-string text in {col!r}",
                [item_col, col],
                "catalog",
            )
        root = Path(image_root) if image_root is not None else None
        if image and check_images:
            paths = [(root / p if root is not None and not Path(p).is_absolute() else Path(p)) for p in items[image].astype(str)]
            raise_if_any(items, [not p.is_file() for p in paths], f"point to a missing image file in {image!r}", [item_col, image], "catalog")
        items = items.rename(columns={item_col: ITEM})
        keep = [ITEM, *schema.columns] + [c for c in items.columns if c not in (ITEM, *schema.columns)]
        return cls(items=items[keep], schema=schema, image_root=root)

    @classmethod
    def from_ids(cls, ids: Iterable) -> Catalog:
        """A catalog with ids only (no content), e.g. for a purely collaborative study."""
        return cls.from_frame(pd.DataFrame({ITEM: list(ids)}))

    def __post_init__(self) -> None:
        object.__setattr__(self, "_positions", {item: i for i, item in enumerate(self.items[ITEM])})

    @property
    def item_ids(self) -> np.ndarray:
        """Item ids (str) in catalog order; position = item index."""
        return self.items[ITEM].to_numpy()

    @property
    def n_items(self) -> int:
        """Number of catalog items."""
        return len(self.items)

    def __len__(self) -> int:
        return self.n_items

    def index_of(self, ids: Iterable) -> np.ndarray:
        """Positions of ``ids``; raises :class:`DataError` naming unknown ids."""
        ids = [str(i) for i in ids]
        unknown = [i for i in ids if i not in self._positions]
        if unknown:
            raise DataError(f"{len(unknown)} unknown item ids, first: {unknown[:5]}")
        return np.fromiter((self._positions[i] for i in ids), dtype=np.int64, count=len(ids))

    def image_path(self, position: int) -> Path:
        """Path of the image of the item at ``position``, resolved against ``image_root``."""
        if not self.schema.image:
            raise DataError("catalog declares no image column")
        p = Path(str(self.items[self.schema.image].iat[position]))
        return self.image_root / p if self.image_root is not None and not p.is_absolute() else p

    def fingerprint(self) -> str:
        """Hash of item ids and declared content columns (order-sensitive)."""
        h = hashlib.sha256()
        h.update(repr(self.schema.to_dict()).encode())
        for col in (ITEM, *self.schema.columns):
            h.update(col.encode())
            h.update("\x1f".join(map(str, self.items[col].tolist())).encode())
        return h.hexdigest()[:16]
