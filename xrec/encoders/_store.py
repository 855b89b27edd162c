"""The embedding cache's folder layout and its :class:`EmbeddingCache` front (see :mod:`xrec.encoders.cache`)."""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from xrec._files import sweep_temp_files, write_bytes_atomic
from xrec._validation import check_int
from xrec.encoders._entry_file import content_hash, entry_file
from xrec.encoders._fill import CacheStats, encode_through_cache
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

__all__ = ["DEFAULT_DIR", "ENV_VAR", "EmbeddingCache"]

ENV_VAR = "XREC_CACHE_DIR"
DEFAULT_DIR = ".xrec-cache"
_SWEPT: set[Path] = set()  # encoder folders already swept by this process


def _sweep_tree(folder: Path) -> list[Path]:
    """Stale temporary files removed from an encoder folder and its two-letter fan-out folders."""
    if not folder.is_dir():
        return []
    removed = sweep_temp_files(folder)
    with os.scandir(folder) as subs:
        for sub in subs:
            if len(sub.name) == 2 and sub.is_dir(follow_symlinks=False):
                removed += sweep_temp_files(sub.path)
    return removed


class EmbeddingCache:
    """Vectors on disk so each (encoder, content) pair is encoded once.

    Parameters
    ----------
    root
        Cache folder. Default: the environment variable ``XREC_CACHE_DIR``, else
        ``.xrec-cache`` in the working directory. Created on first write.
    batch_size
        Uncached contents handed to the encoder per call; entries are written (and the
        progress bar moves) after each call, so an interrupted run keeps what it
        finished. Default: the encoder's own ``batch_size`` when it has one, else 256.

    Attributes
    ----------
    last_stats : CacheStats
        Counts of the most recent :meth:`encode` / :meth:`encode_with_mask` call.
    """

    def __init__(self, root: str | os.PathLike | None = None, *, batch_size: int | None = None) -> None:
        batch_size = check_int(batch_size, "cache: batch_size", low=1, allow_none=True, expected="a positive int")
        self.root = Path(root if root is not None else os.environ.get(ENV_VAR) or DEFAULT_DIR)
        self.batch_size = batch_size
        self.last_stats = CacheStats()
        self._made: set[Path] = set()

    def __repr__(self) -> str:
        return f"EmbeddingCache({str(self.root)!r}, batch_size={self.batch_size})"

    # -- layout -----------------------------------------------------------------------------

    def folder(self, encoder: Encoder) -> Path:
        """Folder holding ``encoder``'s entries (one per identity + version)."""
        key = encoder.cache_key
        if not encoder.identity:
            raise ConfigError(f"cache: encoder {type(encoder).__name__} has an empty identity; set one to cache its vectors")
        slug = re.sub(r"[^A-Za-z0-9._@+-]+", "_", key).strip("._")[:60] or "encoder"
        return self.root / f"{slug}-{hashlib.sha256(key.encode('utf-8')).hexdigest()[:8]}"

    def entry_path(self, encoder: Encoder, content: str | bytes) -> Path:
        """File that holds (or would hold) the vector of ``content``."""
        key = content_hash(content)
        if key is None:
            raise DataError(f"cache: content must be str or bytes, got {type(content).__name__}")
        return self._entry(self.folder(encoder), key)

    @staticmethod
    def _entry(folder: Path, key: str) -> Path:
        return entry_file(folder, key)

    def count(self, encoder: Encoder) -> int:
        """Number of entries stored for ``encoder``."""
        folder = self.folder(encoder)
        return sum(1 for _ in folder.glob("??/*.vec")) if folder.is_dir() else 0

    def clear(self, encoder: Encoder | None = None) -> int:
        """Delete the entries of ``encoder`` (or of every encoder). Returns how many files went."""
        # Only folders this cache made (they hold encoder.json), whatever else lives under root.
        folders = [self.folder(encoder)] if encoder is not None else [p.parent for p in self.root.glob("*/encoder.json")]
        removed = 0
        for folder in folders:
            if folder.is_dir():
                removed += sum(1 for _ in folder.glob("??/*.vec"))
                shutil.rmtree(folder, ignore_errors=True)
        self._made.clear()
        return removed

    def sweep_temp_files(self, encoder: Encoder | None = None) -> list[Path]:
        """Remove stale temporary files left by writers killed mid-write; return them.

        Looks in ``encoder``'s folder (or every encoder folder under the root) and its
        fan-out subfolders; only xrec's own temporary names are touched, and only when
        stale (see :func:`xrec._files.sweep_temp_files`). Done automatically the first time
        a process uses a folder (:meth:`sweep_once`).
        """
        folders = [self.folder(encoder)] if encoder is not None else [p.parent for p in self.root.glob("*/encoder.json")]
        removed: list[Path] = []
        for folder in folders:
            removed += _sweep_tree(folder)
            _SWEPT.add(folder.resolve())
        return removed

    def sweep_once(self, folder: Path) -> None:
        """Sweep an encoder folder's stale temporary files, the first time this process uses it."""
        key = folder.resolve()
        if key not in _SWEPT:
            _SWEPT.add(key)
            _sweep_tree(folder)

    def make_folder(self, path: Path) -> None:
        """Create ``path`` (an entry's fan-out folder) once per cache object."""
        if path not in self._made:
            path.mkdir(parents=True, exist_ok=True)
            self._made.add(path)

    def write_meta(self, folder: Path, encoder: Encoder, dim: int) -> None:
        """Write ``encoder.json`` (identity, version, modality, dim) into ``folder`` unless it is there."""
        meta = folder / "encoder.json"
        if meta.is_file():
            return
        folder.mkdir(parents=True, exist_ok=True)
        info = {
            "identity": encoder.identity,
            "version": encoder.version,
            "modality": encoder.modality,
            "dim": dim,
            "class": f"{type(encoder).__module__}.{type(encoder).__qualname__}",
        }
        write_bytes_atomic(meta, (json.dumps(info, indent=2) + "\n").encode("utf-8"))
        self._made.add(meta)

    # -- encoding ---------------------------------------------------------------------------

    def encode(self, encoder: Encoder, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Vectors of ``contents`` in input order, encoding only what is not cached.

        Parameters
        ----------
        encoder
            Any :class:`~xrec.encoders.base.Encoder`; its ``cache_key`` selects the folder.
        contents
            ``str`` for text encoders; image-file ``bytes`` for image encoders (a path
            is read, so the key is the file's content, not its name).
        progress
            Show a progress bar over the uncached items.

        Returns
        -------
        np.ndarray
            ``(len(contents), encoder.dim)`` float32. Items the encoder skipped (its
            ``on_error="skip"``) are all-zero rows; use :meth:`encode_with_mask` to get them.
        """
        return self.encode_with_mask(encoder, contents, progress=progress)[0]

    def encode_with_mask(
        self,
        encoder: Encoder,
        contents: Sequence[Any],
        *,
        progress: bool = False,
        labels: Sequence[str] | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Like :meth:`encode`, plus a bool mask, ``False`` for items that were skipped.

        ``labels`` (one per content, e.g. item ids) name items in errors and warnings
        instead of their positions.

        Raises
        ------
        DataError
            When an item cannot be encoded and the encoder's ``on_error`` is ``"raise"``
            (the default when an encoder has no such setting).
        """
        return encode_through_cache(encoder, contents, cache=self, progress=progress, labels=labels)

