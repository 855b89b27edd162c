"""Which catalog items a result may show: the explorer's ``where`` argument turned into an item mask.

``where`` is one of

- ``None``: every item;
- a mapping of column → condition in the request-filter format of
  :class:`xrec.bundle.ItemTable` (``{"product_type": "patch"}``,
  ``{"product_type": ["pin", "patch"]}``, ``{"price": {"max": 10}}``, ...), or the whole
  filter structure (``{"attributes": {...}, "include_items": [...], "exclude_items": [...]}``);
- a boolean mask with one entry per catalog item, in catalog order: a numpy array or a
  pandas Series (e.g. ``catalog.items["price"] < 10``; a Series must carry the catalog
  frame's own index).

Unlike a served request, a value that no item has on a categorical or multi-label column is
refused (it is almost always a typo in a notebook), naming the column and its values.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from xrec.bundle import ItemTable
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError

__all__ = ["WHERE_KEYS", "item_table", "where_mask"]

#: Keys of the whole filter structure; any other key of ``where`` is a column name.
WHERE_KEYS = ("attributes", "include_items", "exclude_items")


def item_table(catalog: Catalog) -> ItemTable:
    """The catalog's attribute columns, encoded once for masks."""
    s = catalog.schema
    return ItemTable(catalog.items, s.categorical, s.multilabel, s.numeric)


def where_mask(where: Any, catalog: Catalog, table: ItemTable) -> np.ndarray:
    """Boolean ``(n_items,)`` of the items ``where`` admits (see the module docstring).

    Raises
    ------
    ConfigError
        For an unknown column, operator or item id, a value no item has, or a mask of the
        wrong length or type; the message names the field.
    """
    n = catalog.n_items
    if where is None:
        return np.ones(n, dtype=bool)
    if isinstance(where, Mapping):
        filters = dict(where) if where and all(k in WHERE_KEYS for k in where) else {"attributes": dict(where)}
        attributes = filters.get("attributes")
        if isinstance(attributes, Mapping):
            for column, condition in attributes.items():
                _check_values(catalog, str(column), condition)
        mask = table.mask(filters)
        return np.ones(n, dtype=bool) if mask is None else mask
    if isinstance(where, pd.Series):
        if not where.index.equals(catalog.items.index):
            raise ConfigError("where: a Series mask must carry the catalog frame's index (build it from catalog.items)")
        where = where.to_numpy()
    if isinstance(where, (np.ndarray, list, tuple)):
        arr = np.asarray(where)
        if arr.dtype != bool or arr.shape != (n,):
            raise ConfigError(f"where: a mask must be {n} booleans (one per catalog item), got dtype {arr.dtype} and shape {arr.shape}")
        return arr.copy()
    raise ConfigError(f"where: must be None, a mapping of column -> condition, or a boolean mask; got {type(where).__name__}")


def _check_values(catalog: Catalog, column: str, condition: Any) -> None:
    """A ``ConfigError`` for a categorical or multi-label value no catalog item has."""
    schema = catalog.schema
    if column in schema.categorical:
        known = set(catalog.items[column].astype(str))
    elif column in schema.multilabel:
        known = {str(label) for labels in catalog.items[column] for label in labels}
    else:
        return  # numeric or unknown columns: ItemTable checks them
    values: list[Any] = []
    for part in condition.values() if isinstance(condition, Mapping) else [condition]:
        values.extend(part if isinstance(part, list) else [part])
    unknown = [v for v in values if isinstance(v, str) and v not in known]
    if unknown:
        shown = sorted(known)
        more = f" (and {len(shown) - 20} more)" if len(shown) > 20 else ""
        raise ConfigError(f"where.{column}: no item has the value {unknown[0]!r}; its values are {shown[:20]}{more}")
