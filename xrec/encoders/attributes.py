"""Structured attributes (categorical, multi-label, numeric catalog columns) to item vectors."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from itertools import chain
from typing import Self

import numpy as np
import pandas as pd

from xrec._validation import check_fitted, check_int
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError

CATEGORICAL = "categorical"
MULTILABEL = "multilabel"
NUMERIC = "numeric"


class AttributeEncoder:
    """Encodes a catalog's attribute columns into one float32 item × feature matrix.

    Each column becomes one block of features:

    * categorical: one-hot over the categories seen in :meth:`fit` (sorted);
    * multi-label: multi-hot over the labels seen in :meth:`fit` (sorted);
    * numeric: ``(x - median) / IQR`` clipped to ``[-clip, clip]``, or, with
      ``numeric_bins``, one-hot over quantile bins learned in :meth:`fit`.

    Categories or labels unseen in :meth:`fit` give zeros in their block and are
    counted in ``unseen_counts_``.

    Parameters
    ----------
    columns
        Attribute columns to encode; ``None`` takes every attribute column of the
        catalog schema (categorical, then multi-label, then numeric).
    numeric_bins
        When set (>= 2), numeric columns are one-hot quantile bins instead of scaled values.
    clip
        Bound on scaled numeric values, in IQR units; ``None`` keeps them unbounded.
    balance
        Scale each block so that its mean squared row norm on the fit catalog is 1, so a
        column with many labels or large values does not dominate dot products.
    block_weights
        Extra multiplier per column name (default 1), applied after balancing.

    Attributes
    ----------
    columns_
        Encoded columns, in block order.
    kinds_
        Kind of each encoded column (``"categorical"``, ``"multilabel"``, ``"numeric"``).
    categories_
        Column -> sorted array of known categories / labels (or bin labels for binned numerics).
    center_, scale_
        Column -> median and IQR of numeric columns (IQR 0 falls back to the standard
        deviation, then to 1).
    bin_edges_
        Column -> quantile edges of binned numeric columns.
    block_scale_
        Column -> multiplier applied to the block (balance × weight).
    block_slices_
        Column -> slice of the block in the output.
    feature_names_
        One name per output feature: ``column=value``, ``column`` for scaled numerics,
        ``column[bin b]`` for bins.
    unseen_counts_
        Column -> number of unseen categories (items for categorical columns, label
        occurrences for multi-label columns) met by the latest :meth:`transform`.
    """

    def __init__(
        self,
        columns: Sequence[str] | None = None,
        numeric_bins: int | None = None,
        clip: float | None = 3.0,
        balance: bool = True,
        block_weights: Mapping[str, float] | None = None,
    ) -> None:
        self.columns = columns
        self.numeric_bins = numeric_bins
        self.clip = clip
        self.balance = balance
        self.block_weights = block_weights

    # ------------------------------------------------------------------ fit
    def _check_settings(self, catalog: Catalog) -> list[tuple[str, str]]:
        schema = catalog.schema
        kind_of = {c: CATEGORICAL for c in schema.categorical}
        kind_of.update({c: MULTILABEL for c in schema.multilabel})
        kind_of.update({c: NUMERIC for c in schema.numeric})
        if self.columns is None:
            columns = list(schema.attribute_columns)
        else:
            if isinstance(self.columns, str):
                raise ConfigError(f"attribute setting 'columns' must be a list of column names, got the string {self.columns!r}")
            columns = list(self.columns)
            bad = [c for c in columns if c not in kind_of]
            if bad:
                raise ConfigError(f"attribute setting 'columns' names {bad}, which are not attribute columns of the catalog; those are {list(schema.attribute_columns)}")
            dupes = sorted({c for c in columns if columns.count(c) > 1})
            if dupes:
                raise ConfigError(f"attribute setting 'columns' repeats {dupes}")
        if not columns:
            raise ConfigError("no attribute columns to encode: the catalog schema declares none and 'columns' names none")
        check_int(self.numeric_bins, "attribute setting 'numeric_bins'", low=2, allow_none=True)
        if self.clip is not None and not (np.isfinite(self.clip) and self.clip > 0):
            raise ConfigError(f"attribute setting 'clip' must be a positive number or None, got {self.clip!r}")
        for name, weight in (self.block_weights or {}).items():
            if name not in columns:
                raise ConfigError(f"attribute setting 'block_weights' names {name!r}, which is not an encoded column {columns}")
            if not (np.isfinite(weight) and weight >= 0):
                raise ConfigError(f"attribute setting 'block_weights[{name!r}]' must be a number >= 0, got {weight!r}")
        return [(c, kind_of[c]) for c in columns]

    def fit(self, catalog: Catalog) -> Self:
        """Learn categories, labels, medians / IQRs or bin edges and block scales; returns ``self``."""
        pairs = self._check_settings(catalog)
        self.columns_ = tuple(c for c, _ in pairs)
        self.kinds_ = {c: k for c, k in pairs}
        self.categories_: dict[str, np.ndarray] = {}
        self.center_: dict[str, float] = {}
        self.scale_: dict[str, float] = {}
        self.bin_edges_: dict[str, np.ndarray] = {}
        items = catalog.items
        for col, kind in pairs:
            if kind == CATEGORICAL:
                self.categories_[col] = np.unique(items[col].astype(str).to_numpy())
            elif kind == MULTILABEL:
                labels = sorted(set(chain.from_iterable(items[col])))
                self.categories_[col] = np.asarray(labels, dtype=object).astype(str) if labels else np.array([], dtype=str)
            elif self.numeric_bins is None:
                x = items[col].to_numpy(dtype=np.float64)
                q25, median, q75 = np.percentile(x, [25.0, 50.0, 75.0])
                scale = q75 - q25
                if not scale > 0:
                    scale = float(np.std(x))
                self.center_[col] = float(median)
                self.scale_[col] = float(scale) if scale > 0 else 1.0
            else:
                x = items[col].to_numpy(dtype=np.float64)
                levels = np.linspace(0.0, 1.0, int(self.numeric_bins) + 1)
                # an averaged inverse CDF puts edges between observed values, not on them
                edges = np.unique(np.quantile(x, levels, method="averaged_inverted_cdf"))
                if len(edges) < 2:
                    edges = np.array([edges[0], edges[0]])
                self.bin_edges_[col] = edges
                self.categories_[col] = np.array([f"bin {b}" for b in range(len(edges) - 1)])
        self.block_scale_ = {col: 1.0 for col in self.columns_}
        self.block_slices_: dict[str, slice] = {}
        names: list[str] = []
        for col in self.columns_:
            start = len(names)
            if self.kinds_[col] == NUMERIC and self.numeric_bins is None:
                names.append(col)
            elif self.kinds_[col] == NUMERIC:
                names.extend(f"{col}[{b}]" for b in self.categories_[col])
            else:
                names.extend(f"{col}={v}" for v in self.categories_[col])
            self.block_slices_[col] = slice(start, len(names))
        self.feature_names_ = names
        if self.balance:
            raw = self._encode(catalog, count_unseen=False)
            for col, sl in self.block_slices_.items():
                mean_sq = float(np.mean(np.sum(raw[:, sl].astype(np.float64) ** 2, axis=1)))
                self.block_scale_[col] = 1.0 / np.sqrt(mean_sq) if mean_sq > 0 else 1.0
        for col, weight in (self.block_weights or {}).items():
            self.block_scale_[col] *= float(weight)
        self.fitted_ = True
        return self

    # ------------------------------------------------------------ transform
    def _encode(self, catalog: Catalog, *, count_unseen: bool) -> np.ndarray:
        items = catalog.items
        missing = [c for c in self.columns_ if c not in items.columns]
        if missing:
            raise DataError(f"catalog lacks the attribute columns {missing} the encoder was fitted on")
        out = np.zeros((len(items), len(self.feature_names_)), dtype=np.float32)
        unseen: dict[str, int] = {}
        rows_all = np.arange(len(items))
        for col in self.columns_:
            sl = self.block_slices_[col]
            block = out[:, sl]
            kind = self.kinds_[col]
            if kind == CATEGORICAL:
                codes = pd.Index(self.categories_[col]).get_indexer(items[col].astype(str).to_numpy()).astype(np.int64)
                known = codes >= 0
                block[rows_all[known], codes[known]] = 1.0
                unseen[col] = int((~known).sum())
            elif kind == MULTILABEL:
                position = {label: j for j, label in enumerate(self.categories_[col])}
                values = [tuple(v) for v in items[col]]
                lengths = np.fromiter((len(v) for v in values), dtype=np.int64, count=len(values))
                rows = np.repeat(rows_all, lengths)
                cols = np.fromiter((position.get(str(label), -1) for label in chain.from_iterable(values)), dtype=np.int64, count=int(lengths.sum()))
                known = cols >= 0
                block[rows[known], cols[known]] = 1.0
                unseen[col] = int((~known).sum())
            elif self.numeric_bins is None:
                x = (items[col].to_numpy(dtype=np.float64) - self.center_[col]) / self.scale_[col]
                if self.clip is not None:
                    x = np.clip(x, -self.clip, self.clip)
                block[:, 0] = x
                unseen[col] = 0
            else:
                edges = self.bin_edges_[col]
                n_bins = len(edges) - 1
                bins = np.clip(np.searchsorted(edges[1:-1], items[col].to_numpy(dtype=np.float64), side="right"), 0, n_bins - 1)
                block[rows_all, bins] = 1.0
                unseen[col] = 0
            if self.block_scale_[col] != 1.0:
                block *= np.float32(self.block_scale_[col])
        if count_unseen:
            self.unseen_counts_ = unseen
        return out

    def transform(self, catalog: Catalog) -> np.ndarray:
        """Item × feature matrix (float32, rows in catalog order); sets ``unseen_counts_``.

        Raises
        ------
        NotFittedError
            When called before :meth:`fit` (also a ``RuntimeError``).
        DataError
            When ``catalog`` lacks a fitted column.
        """
        check_fitted(self, how="call fit(catalog) first")
        return self._encode(catalog, count_unseen=True)

    def fit_transform(self, catalog: Catalog) -> np.ndarray:
        """Same as ``fit(catalog).transform(catalog)``."""
        return self.fit(catalog).transform(catalog)
