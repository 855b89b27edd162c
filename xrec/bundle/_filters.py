"""Request-time item filters: a small JSON structure, parsed and checked by xrec, turned into an item mask.

The structure (a Python dict, the ``--filters`` option's JSON, or the ``filters`` member
of an HTTP request body)::

    {
      "attributes": {                                  # optional: conditions per catalog column
        "product_type": {"one_of": ["mug", "pin"]},    #   categorical: equals | one_of | none_of
        "genres": {"any_of": ["Comedy"], "none_of": ["Horror"]},
                                                       #   multi-label: has | any_of | all_of | none_of
        "price": {"min": 5, "max": 20}                 #   numeric: min and / or max, both inclusive
      },
      "include_items": ["p0001", "p0002"],             # optional: only these items may be returned
      "exclude_items": ["p0003"]                       # optional: these items are never returned
    }

Every condition must hold (they are joined by AND, also within one column's object).
Shorthands: a string stands for ``{"equals": s}`` on a categorical column and
``{"has": s}`` on a multi-label one; a list stands for ``{"one_of": [...]}`` /
``{"any_of": [...]}``. Values are compared as strings on categorical and multi-label
columns (a value no item has simply matches nothing); numeric bounds must be finite
numbers. Unknown keys, columns, operators, item ids and wrongly typed values are refused
with a :class:`~xrec.errors.ConfigError` naming the field, e.g.
``filters.attributes.price.max: must be a finite number, got 'cheap'``.

Nothing here evaluates text as code: the structure is walked key by key and every
condition becomes a numpy comparison on arrays prepared once per bundle.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from numbers import Real
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp

from xrec.errors import ConfigError

#: Most entries a filter list may hold (ids or values), so a request cannot ask for unbounded work.
MAX_LIST = 10_000
_TOP_KEYS = ("attributes", "include_items", "exclude_items")
_OPS = {
    "categorical": ("equals", "one_of", "none_of"),
    "multilabel": ("has", "any_of", "all_of", "none_of"),
    "numeric": ("min", "max"),
}


class ItemTable:
    """The catalog's filterable columns, encoded once for fast masks.

    Parameters
    ----------
    items
        One row per item in item-index order: column ``item`` (id) and the attribute columns.
    categorical, multilabel, numeric
        Which columns are which (multi-label cells are sequences of labels).
    """

    def __init__(self, items: pd.DataFrame, categorical: Sequence[str] = (), multilabel: Sequence[str] = (), numeric: Sequence[str] = ()) -> None:
        self.item_ids = items["item"].astype(str).to_numpy()
        self.positions = {item: i for i, item in enumerate(self.item_ids)}
        self.kinds: dict[str, str] = {}
        self._codes: dict[str, tuple[np.ndarray, dict[str, int]]] = {}
        self._labels: dict[str, tuple[sp.csc_matrix, dict[str, int]]] = {}
        self._numbers: dict[str, np.ndarray] = {}
        for col in categorical:
            values, codes = np.unique(items[col].astype(str).to_numpy(), return_inverse=True)
            self._codes[col] = (codes.astype(np.int64), {v: i for i, v in enumerate(values.tolist())})
            self.kinds[col] = "categorical"
        for col in multilabel:
            vocab: dict[str, int] = {}
            rows, cols = [], []
            for i, labels in enumerate(items[col]):
                for label in labels:
                    rows.append(i)
                    cols.append(vocab.setdefault(str(label), len(vocab)))
            indicator = sp.csc_matrix((np.ones(len(rows), dtype=np.int32), (rows, cols)), shape=(len(items), len(vocab)))
            indicator.sum_duplicates()
            indicator.data[:] = 1
            self._labels[col] = (indicator, vocab)
            self.kinds[col] = "multilabel"
        for col in numeric:
            self._numbers[col] = items[col].to_numpy(dtype=np.float64)
            self.kinds[col] = "numeric"

    @property
    def n_items(self) -> int:
        """Number of items."""
        return len(self.item_ids)

    def mask(self, filters: Mapping[str, Any] | None) -> np.ndarray | None:
        """Boolean ``(n_items,)``: True for items every condition of ``filters`` admits.

        ``None`` or an empty mapping filters nothing and returns ``None``. Raises
        :class:`ConfigError` naming the field for anything malformed (see the module docstring).
        """
        if filters is None:
            return None
        if not isinstance(filters, Mapping):
            raise ConfigError(f"filters: must be an object (mapping), got {_type(filters)}")
        unknown = [k for k in filters if k not in _TOP_KEYS]
        if unknown:
            raise ConfigError(f"filters.{unknown[0]}: unknown key; allowed: {list(_TOP_KEYS)}")
        if not filters:
            return None
        mask = np.ones(self.n_items, dtype=bool)
        attributes = filters.get("attributes")
        if attributes is not None:
            if not isinstance(attributes, Mapping):
                raise ConfigError(f"filters.attributes: must be an object of column -> condition, got {_type(attributes)}")
            for column, condition in attributes.items():
                mask &= self._column_mask(str(column), condition)
        if filters.get("include_items") is not None:
            keep = np.zeros(self.n_items, dtype=bool)
            keep[self._ids(filters["include_items"], "filters.include_items")] = True
            mask &= keep
        if filters.get("exclude_items") is not None:
            mask[self._ids(filters["exclude_items"], "filters.exclude_items")] = False
        return mask

    # -- one column ---------------------------------------------------------------------------

    def _column_mask(self, column: str, condition: Any) -> np.ndarray:
        where = f"filters.attributes.{column}"
        kind = self.kinds.get(column)
        if kind is None:
            raise ConfigError(f"{where}: not a filterable column; filterable: {sorted(self.kinds)}")
        if isinstance(condition, str) and kind != "numeric":
            condition = {"equals" if kind == "categorical" else "has": condition}
        elif isinstance(condition, list) and kind != "numeric":
            condition = {"one_of" if kind == "categorical" else "any_of": condition}
        if not isinstance(condition, Mapping) or not condition:
            raise ConfigError(f"{where}: must be a non-empty object of {list(_OPS[kind])}, got {condition!r}"[:300])
        bad = [op for op in condition if op not in _OPS[kind]]
        if bad:
            raise ConfigError(f"{where}.{bad[0]}: unknown condition for a {kind} column; use {list(_OPS[kind])}")
        if kind == "numeric":
            return self._range(column, condition, where)
        if kind == "categorical":
            return self._categorical(column, condition, where)
        return self._multilabel(column, condition, where)

    def _categorical(self, column: str, condition: Mapping[str, Any], where: str) -> np.ndarray:
        codes, vocab = self._codes[column]
        mask = np.ones(len(codes), dtype=bool)
        for op, value in condition.items():
            values = [_string(value, f"{where}.{op}")] if op == "equals" else _strings(value, f"{where}.{op}")
            wanted = np.array([vocab[v] for v in values if v in vocab], dtype=np.int64)
            hit = np.isin(codes, wanted)
            mask &= ~hit if op == "none_of" else hit
        return mask

    def _multilabel(self, column: str, condition: Mapping[str, Any], where: str) -> np.ndarray:
        indicator, vocab = self._labels[column]
        mask = np.ones(indicator.shape[0], dtype=bool)
        for op, value in condition.items():
            values = [_string(value, f"{where}.{op}")] if op == "has" else _strings(value, f"{where}.{op}")
            values = list(dict.fromkeys(values))
            known = [vocab[v] for v in values if v in vocab]
            count = np.asarray(indicator[:, known].sum(axis=1)).ravel() if known else np.zeros(indicator.shape[0])
            if op in ("has", "all_of"):
                mask &= count == len(values)  # a label no item has matches nothing
            elif op == "any_of":
                mask &= count > 0
            else:
                mask &= count == 0
        return mask

    def _range(self, column: str, condition: Mapping[str, Any], where: str) -> np.ndarray:
        values = self._numbers[column]
        lo = _number(condition["min"], f"{where}.min") if "min" in condition else -math.inf
        hi = _number(condition["max"], f"{where}.max") if "max" in condition else math.inf
        if lo > hi:
            raise ConfigError(f"{where}: min {lo:g} is above max {hi:g}")
        return (values >= lo) & (values <= hi)

    def _ids(self, value: Any, where: str) -> np.ndarray:
        ids = _strings(value, where)
        unknown = [i for i in ids if i not in self.positions]
        if unknown:
            raise ConfigError(f"{where}: {len(unknown)} unknown item id(s), first: {unknown[:5]}")
        return np.fromiter((self.positions[i] for i in ids), dtype=np.int64, count=len(ids))


def _type(value: Any) -> str:
    return {dict: "an object", list: "a list", str: "a string", bool: "a boolean", int: "a number", float: "a number"}.get(
        type(value), type(value).__name__
    )


def _string(value: Any, where: str) -> str:
    if not isinstance(value, str):
        raise ConfigError(f"{where}: must be a string, got {_type(value)} {value!r}"[:300])
    return value


def _strings(value: Any, where: str) -> list[str]:
    if not isinstance(value, list):
        raise ConfigError(f"{where}: must be a list of strings, got {_type(value)}")
    if len(value) > MAX_LIST:
        raise ConfigError(f"{where}: at most {MAX_LIST} entries, got {len(value)}")
    return [_string(v, f"{where}[{i}]") for i, v in enumerate(value)]


def _number(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, Real) or not math.isfinite(float(value)):
        raise ConfigError(f"{where}: must be a finite number, got {value!r}"[:300])
    return float(value)
