"""Bundles: a blend file plus everything its scorer learned, loadable without the training data.

:func:`save_bundle` writes a folder (blend file, learned arrays as ``.safetensors``, tables
as Parquet, a manifest of SHA-256 checksums); :func:`load_bundle` verifies every file and
the blend file's ranking digest and returns a :class:`Bundle` that recommends with
request-time filters, lists similar items and searches by text, refitting nothing.
The folder layout is documented in :mod:`xrec.bundle._store`, the filter structure in
:mod:`xrec.bundle._filters`.
"""

from xrec.bundle._artifacts import exportable_kinds, register_artifacts
from xrec.bundle._filters import ItemTable
from xrec.bundle._manifest import sweep_stale
from xrec.bundle._runtime import Bundle, top_k
from xrec.bundle._store import load_bundle, save_bundle

__all__ = ["Bundle", "ItemTable", "exportable_kinds", "load_bundle", "register_artifacts", "save_bundle", "sweep_stale", "top_k"]
