"""Writing and loading bundles: a blend file plus everything its scorer learned.

Folder layout (format version 1)::

    manifest.json          format, what the bundle holds, and every other file's SHA-256 and size
    blend.toml             the blend file, as xrec.blendfile.save_blend writes it
    users.parquet          column "user": user ids, row u = user index u
    items.parquet          column "item" (ids, row j = item index j) and the catalog's
                           filterable columns (categorical: string, multi-label: list of
                           strings, numeric: float64)
    train.parquet          the training rows: user_idx, item_idx (int64), timestamp (float64),
                           weight (float32); they mark each user's seen items
    sources/NN.safetensors one file per source (NN = position in the blend), the arrays that
                           source learned (see xrec.bundle._artifacts)

``manifest.json`` (JSON object) keys: ``format`` ("xrec-bundle"), ``format_version`` (1),
``written_by``, ``created`` (UTC, ISO 8601), ``blend_file``, ``dataset`` (name,
fingerprint), ``method``, ``n_users``, ``n_items``, ``fold_settings`` (how the training fold
was made), ``catalog`` (the filterable columns by type), ``sources`` (name -> kind, file and
a small JSON ``state``) and ``files`` (name -> ``sha256``, ``bytes``).
"""

from __future__ import annotations

import datetime as _dt
import io
import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xrec.bundle._artifacts import check_exportable, load_source, save_source
from xrec.bundle._filters import ItemTable
from xrec.bundle._manifest import FORMAT, FORMAT_VERSION, FolderWriter, read_verified
from xrec.bundle._runtime import Bundle
from xrec.errors import BundleError, ConfigError, XrecError

BLEND_FILE = "blend.toml"
_TRAIN_COLUMNS = {"user_idx": np.int64, "item_idx": np.int64, "timestamp": np.float64, "weight": np.float32}


def save_bundle(
    path: str | os.PathLike,
    blend_or_fusion: Any,
    *,
    dataset: Any,
    split_settings: Mapping[str, Any] | None = None,
    evidence: Mapping[str, Any] | None = None,
    fold: str | None = None,
    dataset_load: Mapping[str, Any] | None = None,
) -> Path:
    """Write a bundle folder: the blend file plus every learned artifact its scorer needs.

    Parameters
    ----------
    path
        The bundle folder to create (or replace: an existing bundle is swapped out only
        once the new one is complete). Its parent folder must exist.
    blend_or_fusion
        A fitted :class:`~xrec.blend.Blend`, gated blend or fusion rule.
    dataset, split_settings, evidence, fold, dataset_load
        As for :func:`xrec.blendfile.save_blend`; ``dataset`` also gives the item ids and
        the catalog's filterable columns.

    Returns
    -------
    pathlib.Path
        The bundle folder.

    Raises
    ------
    ConfigError
        When a source's kind cannot be bundled (the message names the source and kind), the
        scorer is not fitted, or it was fitted on training rows other than its recorded split's.
    """
    from xrec.blendfile import save_blend, spec_from_scorer

    if not getattr(blend_or_fusion, "fitted_", False):
        raise ConfigError("blend: not fitted; fit it on its fold before writing a bundle")
    for name, src in getattr(blend_or_fusion, "sources", {}).items():
        check_exportable(name, src)
    spec = spec_from_scorer(
        blend_or_fusion, dataset=dataset, split_settings=split_settings, fold=fold, evidence=evidence, dataset_load=dataset_load
    )
    train_fold = _recreate_fold(spec, dataset, blend_or_fusion)

    source_files, source_arrays = {}, {}
    for i, (name, src) in enumerate(blend_or_fusion.sources.items()):
        arrays, state = save_source(name, src, train_fold)
        source_arrays[f"sources/{i:02d}.safetensors"] = arrays
        source_files[name] = {"kind": src.kind, "file": f"sources/{i:02d}.safetensors", "state": state}

    schema = dataset.catalog.schema
    columns = {"categorical": list(schema.categorical), "multilabel": list(schema.multilabel), "numeric": list(schema.numeric)}
    items = dataset.catalog.items[["item", *schema.attribute_columns]].copy()
    for col in schema.multilabel:
        items[col] = [list(v) for v in items[col]]
    users = pd.DataFrame({"user": [str(u) for u in train_fold.user_ids]})
    train = pd.DataFrame({c: train_fold.train[c].to_numpy(dtype=t) for c, t in _TRAIN_COLUMNS.items()})

    from xrec import __version__

    manifest = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "written_by": f"xrec {__version__}",
        "created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
        "blend_file": BLEND_FILE,
        "dataset": {"name": spec.dataset_name, "fingerprint": spec.fingerprint},
        "method": spec.method,
        "n_users": int(train_fold.n_users),
        "n_items": int(train_fold.n_items),
        "fold_settings": _json_ready(dict(blend_or_fusion.fold_settings_)),
        "catalog": columns,
        "sources": source_files,
    }
    writer = FolderWriter(path)
    try:
        # the blend file exactly as save_blend writes it (its own format and checks)
        blend_path = save_blend(
            writer.tmp / BLEND_FILE, blend_or_fusion, dataset=dataset, split_settings=split_settings,
            evidence=evidence, fold=fold, dataset_load=dataset_load,
        )
        writer.write(BLEND_FILE, blend_path.read_bytes())
        writer.write("users.parquet", _parquet(users))
        writer.write("items.parquet", _parquet(items))
        writer.write("train.parquet", _parquet(train))
        from safetensors.numpy import save as tensors_to_bytes

        for file, arrays in source_arrays.items():
            writer.write(file, tensors_to_bytes(arrays))
        return writer.commit(manifest)
    except BaseException:
        writer.abort()
        raise


def load_bundle(path: str | os.PathLike) -> Bundle:
    """Load a bundle folder: verify every file, rebuild the scorer from its artifacts, check its rankings.

    Nothing is refitted and no training data is read beyond the bundle itself.

    Parameters
    ----------
    path
        A folder written by :func:`save_bundle`.

    Returns
    -------
    Bundle
        Ready to recommend (see :class:`~xrec.bundle.Bundle`).

    Raises
    ------
    BundleError
        A missing, extra or changed file (named); an unreadable artifact; rankings that
        differ from the blend file's recorded ranking digest.
    """
    from safetensors.numpy import load as tensors_from_bytes

    from xrec.blendfile import ranking_digest, read_blend
    from xrec.data.catalog import Catalog
    from xrec.fold import Fold

    folder = Path(path)
    manifest, contents, identity = read_verified(folder)
    blend_name = manifest.get("blend_file", BLEND_FILE)
    if blend_name not in contents:
        raise BundleError(f"manifest.json: blend_file {blend_name!r} is not a listed file")
    try:
        # read by xrec.blendfile itself (its format checks), after its checksum passed
        spec = read_blend(folder / blend_name)
        if (folder / blend_name).read_bytes() != contents[blend_name]:
            raise BundleError(f"{blend_name}: changed while the bundle was being read")
    except XrecError as exc:
        raise BundleError(f"{blend_name}: {exc}") from None
    if spec.check is None:
        raise BundleError(f"{blend_name}: has no [check] ranking digest; bundles are written with one")
    if manifest.get("dataset", {}).get("fingerprint") != spec.fingerprint:
        raise BundleError(f"manifest.json: dataset fingerprint differs from {blend_name}'s")

    catalog_cols = manifest.get("catalog", {})
    items = _read_parquet(contents, "items.parquet")
    users = _read_parquet(contents, "users.parquet")
    train = _read_parquet(contents, "train.parquet")
    try:
        catalog = Catalog.from_frame(items, **{k: catalog_cols.get(k, []) for k in ("categorical", "multilabel", "numeric")})
        train = pd.DataFrame({c: train[c].to_numpy(dtype=t) for c, t in _TRAIN_COLUMNS.items()})
        user_ids = users["user"].astype(str).to_numpy()
    except (KeyError, ValueError, XrecError) as exc:
        raise BundleError(f"items.parquet / users.parquet / train.parquet: {exc}") from None
    if len(user_ids) != manifest.get("n_users") or catalog.n_items != manifest.get("n_items"):
        raise BundleError("manifest.json: n_users / n_items differ from users.parquet / items.parquet")
    bad = (train["user_idx"] < 0) | (train["user_idx"] >= len(user_ids)) | (train["item_idx"] < 0) | (train["item_idx"] >= catalog.n_items)
    if bad.any():
        raise BundleError(f"train.parquet: {int(bad.sum())} rows point outside the users or items")
    fold = Fold(catalog, user_ids, train, train.iloc[:0].copy(), dict(manifest.get("fold_settings", {})))

    scorer = spec.build()
    listed = manifest.get("sources", {})
    if list(listed) != list(scorer.sources):
        raise BundleError(f"manifest.json: sources {list(listed)} differ from {blend_name}'s {list(scorer.sources)}")
    states = {}
    for name, src in scorer.sources.items():
        entry = listed[name]
        file = entry.get("file", "")
        if entry.get("kind") != src.kind or file not in contents:
            raise BundleError(f"manifest.json: sources.{name} names kind {entry.get('kind')!r} and file {file!r}; expected kind {src.kind!r} and a listed file")
        try:
            load_source(src, tensors_from_bytes(contents[file]), entry.get("state", {}), fold)
        except Exception as exc:  # a corrupt tensor file must name itself, whatever the parser raises
            raise BundleError(f"{file}: cannot restore source {name!r} ({type(exc).__name__}: {exc})") from None
        states[name] = entry.get("state", {})
    scorer.fit(fold)  # every source is restored, so this only keeps the fold's training matrix
    digest = ranking_digest(scorer, int(spec.check["users"]), int(spec.check["k"]))
    if digest != spec.check["digest"]:
        raise BundleError(
            f"{blend_name}: check.digest: the restored scorer ranks the first {spec.check['users']} users differently "
            f"({digest!r} != {spec.check['digest']!r})"
        )
    table = ItemTable(catalog.items, catalog.schema.categorical, catalog.schema.multilabel, catalog.schema.numeric)
    return Bundle(path=folder, spec=spec, manifest=manifest, identity=identity, fold=fold, scorer=scorer, items=table, states=states)


def _recreate_fold(spec: Any, dataset: Any, scorer: Any) -> Any:
    """The fold the blend file names, checked to hold exactly the scorer's training rows."""
    from xrec.split import split_dataset

    spec.check_dataset(dataset)
    split = split_dataset(dataset, **spec.split)
    fold = split.test if spec.fold == "test" else split.validation
    if fold is None:
        raise ConfigError("split.fold: 'validation' needs split.validation = true")
    a, b = fold.train_matrix, scorer.train_matrix_
    same = a.shape == b.shape and np.array_equal(a.indptr, b.indptr) and np.array_equal(a.indices, b.indices) and np.array_equal(a.data, b.data)
    if not same:
        raise ConfigError(f"split: the blend was fitted on other training rows than the {spec.fold} fold of the split it records")
    return fold


def _parquet(frame: pd.DataFrame) -> bytes:
    import pyarrow as pa
    import pyarrow.parquet as pq

    buf = io.BytesIO()
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), buf)
    return buf.getvalue()


def _read_parquet(contents: dict[str, bytes], name: str) -> pd.DataFrame:
    import pyarrow as pa
    import pyarrow.parquet as pq

    if name not in contents:
        raise BundleError(f"{name}: not listed in the bundle's manifest")
    try:
        return pq.read_table(pa.BufferReader(contents[name])).to_pandas()
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise BundleError(f"{name}: not a readable Parquet table ({exc})") from None


def _json_ready(value: Any) -> Any:
    return json.loads(json.dumps(value, default=str))
