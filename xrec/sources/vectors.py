"""Your own item vectors as a source: precomputed vectors read from a file, keyed by item id.

The ``"vectors"`` kind (:class:`VectorSource`) scores like the text and image sources
(:mod:`xrec.sources.content`): a user's profile is the (optionally recency-weighted)
mean of the L2-normalized vectors of the items in their training history, and an
item's score is the cosine between that profile and the item's vector. Only the
vectors come from a file instead of an encoder.

File layouts (chosen by extension; see :func:`read_item_vectors`):

- ``.npy`` + id file: a 2-D array (items × dimensions), memory-mapped, and the ids in row
  order in a text file (one per line) or a 1-D ``.npy`` of integers or strings;
- ``.parquet``: an id column plus one list column (fixed-size or same-length lists),
  or one numeric column per dimension;
- ``.safetensors``: a 2-D tensor ``"vectors"`` (name settable) and a 1-D integer tensor
  ``"ids"`` in the same file, or an id file as for ``.npy``; read through ``safe_open``.

Example spec table (paths are relative to the spec file)::

    [sources.my_vectors]
    kind = "vectors"
    path = "item_vectors.npy"
    ids = "item_ids.txt"
    center = true
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any, ClassVar

import numpy as np

from xrec._validation import check_choice, check_int
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError
from xrec.sources._vector_files import align_vectors, open_vector_file
from xrec.sources._profiles import ProfileSource

ON_MISSING = ("error", "skip")
ON_EXTRA = ("error", "ignore")


def read_item_vectors(
    catalog: Catalog,
    path: str | Path,
    *,
    ids: str | Path | None = None,
    id_col: str = "item",
    vector_col: str | None = None,
    tensor: str = "vectors",
    dim: int | None = None,
    on_missing: str = "error",
    on_extra: str = "error",
    progress: bool = False,
) -> tuple[np.ndarray, np.ndarray]:
    """Read a file of item vectors and put its rows in catalog order.

    Parameters
    ----------
    catalog
        The items; row ``j`` of the result is the vector of ``catalog.item_ids[j]``.
    path
        ``.npy``, ``.parquet`` / ``.pq`` or ``.safetensors`` file (see the module docstring).
    ids
        Id file for ``.npy`` (required) and ``.safetensors`` (when the file has no ``"ids"``
        tensor): text, one id per line, or a 1-D ``.npy`` of integers or strings.
    id_col, vector_col
        Parquet: the id column, and the list column holding the vectors (``None``: the only
        list column, or, with none, every other column as one dimension each).
    tensor
        Safetensors: name of the 2-D tensor of vectors.
    dim
        Expected number of dimensions (checked when given).
    on_missing
        Catalog items with no vector in the file: ``"error"`` or ``"skip"`` (zero row,
        ``False`` in the mask).
    on_extra
        File ids that are not catalog items: ``"error"`` or ``"ignore"`` (left out, with a
        warning giving their count).
    progress
        Progress bar over the file's row chunks.

    Returns
    -------
    vectors, has_vector
        ``(n_items, dim)`` float32 and ``(n_items,)`` bool (``False``: no vector, or an
        all-zero one).

    Raises
    ------
    DataError
        Naming the ids or rows: duplicate ids, ids missing from the catalog or catalog items
        with no vector (unless told to skip), wrong or mixed dimensions, NaN or infinite
        values, non-numeric values, an empty file, id and vector counts that differ.
    ConfigError
        A missing file, an unknown extension, or a bad setting.
    """
    import warnings

    check_choice(on_missing, "vectors setting 'on_missing'", ON_MISSING)
    check_choice(on_extra, "vectors setting 'on_extra'", ON_EXTRA)
    dim = check_int(dim, "vectors setting 'dim'", low=1, allow_none=True)
    table = open_vector_file(
        Path(path), ids_path=None if ids is None else Path(ids), id_col=id_col, vector_col=vector_col, tensor=tensor
    )
    vectors, has, n_extra = align_vectors(
        table, catalog.item_ids, dim=dim, on_missing=on_missing, on_extra=on_extra, progress=progress
    )
    if n_extra:
        warnings.warn(f"{table.label}: {n_extra} vector id(s) are not in the catalog and were left out", stacklevel=2)
    if not has.all():
        warnings.warn(f"{table.label}: {int((~has).sum())} catalog item(s) have no vector and get a zero row", stacklevel=2)
    return vectors, has & np.any(vectors != 0, axis=1)


FILE_KEYS = ("path", "ids", "id_col", "vector_col", "tensor", "dim", "on_missing", "on_extra")


def vectors_from_setting(catalog: Catalog, setting: Any, field: str, *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Item vectors named by a source setting: a path, or a table of :func:`read_item_vectors` options.

    How other sources take your vectors in place of an encoder's (e.g. the ``cross_modal``
    source's ``text_vectors``): ``"items.parquet"``, or ``{ path = "v.npy", ids = "ids.txt" }``
    with any of the keys in :data:`FILE_KEYS`.

    Raises
    ------
    ConfigError
        Naming ``field`` when the setting is neither a path nor such a table.
    """
    if isinstance(setting, (str, Path)):
        setting = {"path": str(setting)}
    if not isinstance(setting, Mapping) or not isinstance(setting.get("path"), (str, Path)):
        raise ConfigError(f"setting {field!r}: a vector file path, or a table with 'path' (and {list(FILE_KEYS[1:])}), got {setting!r}")
    unknown = sorted(set(setting) - set(FILE_KEYS))
    if unknown:
        raise ConfigError(f"setting {field!r}: unknown key(s) {unknown}; allowed: {list(FILE_KEYS)}")
    options = dict(setting)
    return read_item_vectors(catalog, options.pop("path"), progress=progress, **options)


class VectorSource(ProfileSource):
    """Cosine between a user's profile and each item's vector, vectors read from your file.

    Parameters
    ----------
    path
        The vector file: ``.npy``, ``.parquet`` / ``.pq`` or ``.safetensors`` (layouts in
        :func:`read_item_vectors`). In a spec, relative to the spec file.
    ids
        Id file for ``.npy`` (and ``.safetensors`` without an ``"ids"`` tensor).
    id_col, vector_col, tensor, dim, on_missing, on_extra
        See :func:`read_item_vectors`.
    center
        Subtract the mean of the catalog's normalized vectors before building profiles and
        scoring (see :func:`~xrec.sources.content.center_vectors`). Fitting reads the file,
        then builds profiles as the ``text`` and ``image`` sources do.
    half_life_days
        A training interaction's weight in the profile halves every ``half_life_days``
        days before the user's latest one; ``None`` weighs all equally.
    progress
        Progress bar while reading the file.

    Attributes
    ----------
    item_factors_
        ``(n_items, dim)`` normalized (centred) item vectors; zero rows for items without one.
    user_factors_
        ``(n_users, dim)`` normalized profiles; zero rows for users without history.
    has_content_
        ``(n_items,)`` bool, items that got a (non-zero) vector.
    """

    kind = "vectors"
    path_settings: ClassVar[tuple[str, ...]] = ("path", "ids")

    def __init__(
        self,
        path: str,
        ids: str | None = None,
        id_col: str = "item",
        vector_col: str | None = None,
        tensor: str = "vectors",
        dim: int | None = None,
        on_missing: str = "error",
        on_extra: str = "error",
        center: bool = False,
        half_life_days: float | None = None,
        progress: bool = False,
    ) -> None:
        self.path = path
        self.ids = ids
        self.id_col = id_col
        self.vector_col = vector_col
        self.tensor = tensor
        self.dim = dim
        self.on_missing = on_missing
        self.on_extra = on_extra
        self.center = center
        self.half_life_days = half_life_days
        self.progress = progress

    def read(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        """This source's file read in catalog order: ``(vectors, has_vector)`` (see :func:`read_item_vectors`)."""
        return read_item_vectors(
            catalog,
            self.path,
            ids=self.ids,
            id_col=self.id_col,
            vector_col=self.vector_col,
            tensor=self.tensor,
            dim=self.dim,
            on_missing=self.on_missing,
            on_extra=self.on_extra,
            progress=self.progress,
        )

    def _vectors(self, catalog: Catalog) -> tuple[np.ndarray, np.ndarray]:
        vectors, self.has_content_ = self.read(catalog)
        return vectors, vectors
