"""On-disk cache of item vectors, keyed by (encoder identity + version, content hash).

Layout under the root folder::

    <root>/<encoder slug>-<8 hex of its cache key>/
        encoder.json            identity, version, modality, dim (for people reading the folder)
        ab/abcdef....vec        one entry per content; name = sha256 of the content

Each entry file is a 24-byte header — magic ``XRV1``, the vector length (uint32,
little-endian), a 16-byte BLAKE2b digest of (content hash, vector bytes) — followed by
the float32 little-endian vector. Entries are written to a temporary file in the same
folder and renamed over the final name (``os.replace``), so a reader sees either no
entry or a whole one; a damaged entry (disk fault, a copy cut short) fails its digest,
is reported in a warning naming the file and is recomputed. Changing an encoder's
identity or version moves it to another folder: other encoders' entries stay valid.
No pickle anywhere.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
import secrets
import shutil
import struct
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from tqdm.auto import tqdm

from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

if TYPE_CHECKING:
    from xrec.data.catalog import Catalog

ENV_VAR = "XREC_CACHE_DIR"
DEFAULT_DIR = ".xrec-cache"
_MAGIC = b"XRV1"
_HEADER = struct.Struct("<4sI16s")
_SHOW = 5
_LIST_FROM = 1024  # lookups from which the entry folders are listed instead of probed


class CacheCorruptionWarning(UserWarning):
    """A cache entry was damaged; it is named in the message and recomputed."""


@dataclass
class CacheStats:
    """What one :meth:`EmbeddingCache.encode` call did.

    Attributes
    ----------
    hits
        Input items served from disk.
    misses
        Input items not on disk (or corrupt) that went to the encoder.
    encoded
        Distinct contents sent to the encoder (repeated contents are encoded once).
    corrupt
        Entries found damaged, reported and recomputed.
    failed
        Input items that could not be encoded and were skipped (zero rows).
    written
        Entries written to disk.
    corrupt_paths
        Files of the damaged entries.
    """

    hits: int = 0
    misses: int = 0
    encoded: int = 0
    corrupt: int = 0
    failed: int = 0
    written: int = 0
    corrupt_paths: list[str] = field(default_factory=list)


def content_hash(content: Any) -> str | None:
    """sha256 hex of a text (utf-8) or of raw bytes; ``None`` for anything else."""
    if isinstance(content, str):
        try:
            return hashlib.sha256(content.encode("utf-8")).hexdigest()
        except UnicodeEncodeError:  # lone surrogates: not valid text
            return None
    if isinstance(content, (bytes, bytearray, memoryview)):
        return hashlib.sha256(content).hexdigest()
    return None


def _digest(key: str, payload: bytes) -> bytes:
    h = hashlib.blake2b(key.encode("ascii"), digest_size=16)
    h.update(payload)
    return h.digest()


def _pack(key: str, vector: np.ndarray) -> bytes:
    payload = np.ascontiguousarray(vector, dtype="<f4").tobytes()
    return _HEADER.pack(_MAGIC, vector.shape[0], _digest(key, payload)) + payload


def _unpack(key: str, data: bytes, dim: int) -> tuple[np.ndarray | None, str]:
    """The stored vector, or ``None`` and why the entry is unusable."""
    if len(data) < _HEADER.size:
        return None, f"truncated ({len(data)} bytes)"
    magic, stored_dim, digest = _HEADER.unpack_from(data)
    if magic != _MAGIC:
        return None, "unknown header"
    if stored_dim != dim:
        return None, f"holds {stored_dim} values, the encoder gives {dim}"
    payload = data[_HEADER.size :]
    if len(payload) != 4 * dim:
        return None, f"truncated ({len(data)} bytes)"
    if _digest(key, payload) != digest:
        return None, "checksum mismatch"
    return np.frombuffer(payload, dtype="<f4"), ""


def _atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that readers never see a partial file."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _describe(keys: Sequence[int], reasons: dict[int, str], labels: Sequence[str] | None, total: int) -> str:
    shown = "; ".join(
        f"{labels[k] if labels is not None else '#' + str(k)}: {reasons.get(k, 'the encoder flagged it')}" for k in keys[:_SHOW]
    )
    more = f" (and {len(keys) - _SHOW} more)" if len(keys) > _SHOW else ""
    return f"{len(keys)} of {total} items: {shown}{more}"


def _rows_ok(vectors: np.ndarray) -> np.ndarray:
    # Encoders without a mask mark skipped items by all-zero (or non-finite) rows.
    finite = np.isfinite(vectors).all(axis=1)
    return finite & (np.abs(np.where(np.isfinite(vectors), vectors, 0)).sum(axis=1) > 0)


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
        if batch_size is not None and (not isinstance(batch_size, int) or batch_size < 1):
            raise ConfigError(f"cache: batch_size must be a positive int, got {batch_size!r}")
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
        return folder / key[:2] / f"{key}.vec"

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

    def _mkdir(self, path: Path) -> None:
        if path not in self._made:
            path.mkdir(parents=True, exist_ok=True)
            self._made.add(path)

    def _write_meta(self, folder: Path, encoder: Encoder, dim: int) -> None:
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
        _atomic_write(meta, (json.dumps(info, indent=2) + "\n").encode("utf-8"))
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
        return _encode(encoder, contents, cache=self, progress=progress, labels=labels)


def _read_if_path(content: Any) -> Any:
    """Bytes of the file a path names; anything else (or an unreadable path) unchanged."""
    if isinstance(content, (str, os.PathLike)):
        try:
            return Path(content).read_bytes()
        except OSError:
            return content  # the encoder's checks name the missing file
    return content


def _stored_names(folder: Path, n_lookups: int) -> set[str] | None:
    """Hashes stored in ``folder`` when listing it beats probing each entry, else ``None``.

    Probing a missing file costs a failed open; on some file systems (sandboxes,
    network mounts) that is far slower than reading a directory, and a cold run probes
    every item. Listing the fan-out folders costs ~256 directory reads, so it is done
    only for large requests or when the folder does not exist at all.
    """
    if not folder.is_dir():
        return set()
    if n_lookups < _LIST_FROM:
        return None
    names: set[str] = set()
    with os.scandir(folder) as subs:
        for sub in subs:
            if len(sub.name) == 2 and sub.is_dir():
                with os.scandir(sub.path) as entries:
                    names.update(e.name[:-4] for e in entries if e.name.endswith(".vec"))
    return names


def _call_encoder(encoder: Encoder, batch: list[Any]) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Encode ``batch``; vectors, ok mask and the encoder's warning texts (kept for our own report)."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        if callable(getattr(encoder, "encode_with_mask", None)):
            vectors, ok = encoder.encode_with_mask(batch, progress=False)  # type: ignore[attr-defined]
        else:
            vectors = encoder.encode(batch, progress=False)
            ok = None
    vectors = np.asarray(vectors, dtype=np.float32)
    if vectors.shape != (len(batch), encoder.dim):
        raise ConfigError(
            f"cache: encoder {encoder.cache_key} returned shape {vectors.shape} for {len(batch)} items, "
            f"expected ({len(batch)}, {encoder.dim})"
        )
    # Trust an encoder's own mask (a zero vector may be a valid answer for it); without
    # one, the Encoder convention of all-zero rows for skipped items tells.
    ok = _rows_ok(vectors) if ok is None else np.asarray(ok, dtype=bool) & np.isfinite(vectors).all(axis=1)
    notes = [str(w.message) for w in caught if issubclass(w.category, UserWarning)]
    others = [w for w in caught if not issubclass(w.category, UserWarning)]
    for w in others:
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return vectors, ok, notes


def _encode(
    encoder: Encoder,
    contents: Sequence[Any],
    *,
    cache: EmbeddingCache | None,
    progress: bool,
    labels: Sequence[str] | None = None,
    known_problems: dict[int, str] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(contents, (str, bytes)):
        raise DataError("cache: expected a sequence of contents, got a single str/bytes")
    contents = list(contents)
    n = len(contents)
    if labels is not None and len(labels) != n:
        raise ConfigError(f"cache: {len(labels)} labels for {n} contents")
    policy = getattr(encoder, "on_error", "raise")
    stats = CacheStats()
    if cache is not None:
        cache.last_stats = stats
    dim = encoder.dim
    out = np.zeros((n, dim), dtype=np.float32)
    ok = np.ones(n, dtype=bool)

    if encoder.modality == "image":
        # Key images by their bytes, not by a path string that may point at changed content.
        contents = [_read_if_path(c) for c in contents]
    problems = dict(known_problems or {})
    keys: list[str | None] = []
    for i, content in enumerate(contents):
        key = None if i in problems else content_hash(content)
        if key is None and i not in problems:
            problems[i] = f"no usable content ({type(content).__name__}: {content!r:.40})"
        keys.append(key)

    # Look each content up once; later duplicates reuse the first lookup.
    folder = cache.folder(encoder) if cache is not None else None
    stored = _stored_names(folder, sum(k is not None for k in keys)) if folder is not None else set()
    found: dict[str, np.ndarray] = {}
    missing: dict[str, int] = {}  # content hash -> first input position
    for i, key in enumerate(keys):
        if key is None or key in found or key in missing:
            continue
        vector = None
        if folder is not None and (stored is None or key in stored):
            path = EmbeddingCache._entry(folder, key)
            try:
                with open(path, "rb") as fh:
                    data = fh.read()
            except FileNotFoundError:
                data = None
            if data is not None:
                vector, why = _unpack(key, data, dim)
                if vector is None:
                    stats.corrupt += 1
                    stats.corrupt_paths.append(f"{path} ({why})")
        if vector is None:
            missing[key] = i
        else:
            found[key] = vector
    if stats.corrupt:
        shown = "; ".join(stats.corrupt_paths[:_SHOW])
        more = f" (and {stats.corrupt - _SHOW} more)" if stats.corrupt > _SHOW else ""
        warnings.warn(
            f"embedding cache: {stats.corrupt} damaged entr{'y' if stats.corrupt == 1 else 'ies'} "
            f"of {encoder.cache_key} will be recomputed: {shown}{more}",
            CacheCorruptionWarning,
            stacklevel=3,
        )

    # Only uncached contents need the encoder's own checks (cached ones were encoded before).
    finder = getattr(encoder, "problems", None)
    if missing and callable(finder):
        firsts = list(missing.items())
        flagged = {firsts[j][0]: reason for j, reason in finder([contents[i] for _, i in firsts]).items()}
        for i, key in enumerate(keys):
            if key in flagged:
                problems[i] = flagged[key]
                keys[i] = None
        for key in flagged:
            del missing[key]
    if problems and policy == "raise":
        raise DataError(
            f"{encoder.modality or 'encoder'} {encoder.cache_key}: cannot encode "
            + _describe(sorted(problems), problems, labels, n)
            + "; pass on_error='skip' to the encoder to skip them"
        )
    ok[list(problems)] = False

    failed_reasons: dict[int, str] = dict(problems)
    notes: list[str] = []
    todo = list(missing.items())
    if todo:
        if folder is not None:
            cache._write_meta(folder, encoder, dim)  # type: ignore[union-attr]
        step = (cache.batch_size if cache is not None else None) or getattr(encoder, "batch_size", None)
        if not isinstance(step, int) or step < 1:
            step = 256
        bar = tqdm(total=len(todo), disable=not progress, unit="item", desc=f"encoding ({encoder.cache_key})")
        try:
            for start in range(0, len(todo), step):
                chunk = todo[start : start + step]
                try:
                    vectors, chunk_ok, chunk_notes = _call_encoder(encoder, [contents[i] for _, i in chunk])
                except DataError as exc:
                    where = ", ".join(
                        f"#{j} = {labels[i] if labels is not None else '#' + str(i)}" for j, (_, i) in enumerate(chunk[:20])
                    )
                    raise DataError(
                        f"{exc} [the encoder numbered a batch of {len(chunk)} uncached items; in your input: {where}"
                        + (" ...]" if len(chunk) > 20 else "]")
                    ) from exc
                notes.extend(chunk_notes)
                stats.encoded += len(chunk)
                for (key, i), vector, good in zip(chunk, vectors, chunk_ok):
                    if good:
                        found[key] = vector
                        if folder is not None:
                            path = EmbeddingCache._entry(folder, key)
                            cache._mkdir(path.parent)  # type: ignore[union-attr]
                            try:
                                _atomic_write(path, _pack(key, vector))
                            except FileNotFoundError:  # folder removed meanwhile (e.g. clear() elsewhere)
                                path.parent.mkdir(parents=True, exist_ok=True)
                                _atomic_write(path, _pack(key, vector))
                            stats.written += 1
                    else:
                        failed_reasons[i] = "the encoder could not encode it"
                bar.update(len(chunk))
        finally:
            bar.close()

    for i, key in enumerate(keys):
        if key is None:
            continue
        if key in missing:
            stats.misses += 1
        else:
            stats.hits += 1
        vector = found.get(key)
        if vector is None:
            ok[i] = False
            failed_reasons.setdefault(i, failed_reasons.get(missing.get(key, -1), "the encoder could not encode it"))
            continue
        out[i] = vector
    stats.failed = int((~ok).sum())
    if stats.failed:
        said = f" The encoder said: {notes[0]}" if notes else ""
        warnings.warn(
            f"{encoder.modality or 'encoder'} {encoder.cache_key}: skipped "
            + _describe(list(np.flatnonzero(~ok)), failed_reasons, labels, n)
            + "; their rows are zero."
            + said,
            stacklevel=3,
        )
    else:
        for note in notes:
            warnings.warn(note, stacklevel=3)
    return out, ok


def _resolve_cache(cache: EmbeddingCache | str | os.PathLike | bool | None) -> EmbeddingCache | None:
    if cache is True:
        return EmbeddingCache()
    if cache is False or cache is None:
        return None
    if isinstance(cache, EmbeddingCache):
        return cache
    if isinstance(cache, (str, os.PathLike)):
        return EmbeddingCache(cache)
    raise ConfigError(f"cache must be an EmbeddingCache, a folder path, True or False; got {type(cache).__name__}")


def catalog_texts(catalog: Catalog, columns: Sequence[str] | None = None, *, sep: str = "\n") -> list[str]:
    """One string per item: the non-blank values of ``columns`` (default: the declared text columns), joined by ``sep``.

    Raises
    ------
    ConfigError
        When no text column is declared or given, or a given column is not in the catalog.
    """
    cols = list(catalog.schema.text if columns is None else columns)
    if not cols:
        raise ConfigError("catalog declares no text columns; declare text=[...] or pass columns=[...]")
    unknown = [c for c in cols if c not in catalog.items.columns]
    if unknown:
        raise ConfigError(f"columns {unknown} are not in the catalog; it has {list(catalog.items.columns)}")
    frame = catalog.items[cols]
    texts = []
    for row in frame.itertuples(index=False, name=None):
        parts = [v.strip() for v in row if isinstance(v, str) and v.strip()]
        texts.append(sep.join(parts))
    return texts


def encode_catalog_text(
    catalog: Catalog,
    encoder: Encoder,
    columns: Sequence[str] | None = None,
    *,
    cache: EmbeddingCache | str | os.PathLike | bool | None = True,
    sep: str = "\n",
    progress: bool = False,
    return_mask: bool = False,
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Text vectors of every catalog item, in catalog order.

    Parameters
    ----------
    catalog
        The items.
    encoder
        A text encoder (e.g. :class:`~xrec.encoders.text.MiniLMTextEncoder`).
    columns
        Text columns to join per item (default: the catalog's declared text columns).
    cache
        An :class:`EmbeddingCache`, a cache folder, ``True`` for the default cache or
        ``False`` to encode everything without storing it.
    sep
        Placed between the columns' values.
    progress
        Progress bar over the uncached items.
    return_mask
        Also return the bool mask of items that got a vector.

    Returns
    -------
    np.ndarray or (np.ndarray, np.ndarray)
        ``(n_items, dim)`` float32 (zero rows for skipped items), and the mask if asked.

    Raises
    ------
    DataError
        Items with no text in ``columns``, named by item id, when the encoder's
        ``on_error`` is ``"raise"`` (with ``"skip"`` they get zero rows and a warning).
    """
    texts = catalog_texts(catalog, columns, sep=sep)
    cols = ", ".join(catalog.schema.text if columns is None else columns)
    blank = {i: f"no text in {cols}" for i, text in enumerate(texts) if not text}
    labels = [f"item {i!r}" for i in catalog.item_ids]
    vectors, ok = _encode(
        encoder, texts, cache=_resolve_cache(cache), progress=progress, labels=labels, known_problems=blank
    )
    return (vectors, ok) if return_mask else vectors


def encode_catalog_images(
    catalog: Catalog,
    encoder: Encoder,
    *,
    cache: EmbeddingCache | str | os.PathLike | bool | None = True,
    progress: bool = False,
    return_mask: bool = False,
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Image vectors of every catalog item, from the bytes of ``catalog.image_path(i)``.

    A missing or unreadable file follows the encoder's ``on_error``: ``"raise"`` raises
    :class:`DataError` naming the items and paths before anything is encoded; ``"skip"``
    gives the item a zero row and a warning. See :func:`encode_catalog_text` for the
    other parameters.
    """
    if not catalog.schema.image:
        raise ConfigError("catalog declares no image column; declare image=... when building it")
    contents: list[bytes | None] = []
    unreadable: dict[int, str] = {}
    for i in range(catalog.n_items):
        path = catalog.image_path(i)
        try:
            contents.append(path.read_bytes())
        except OSError as exc:
            contents.append(None)
            unreadable[i] = f"cannot read image file {str(path)!r} ({type(exc).__name__})"
    labels = [f"item {i!r}" for i in catalog.item_ids]
    vectors, ok = _encode(
        encoder,
        contents,
        cache=_resolve_cache(cache),
        progress=progress,
        labels=labels,
        known_problems=unreadable,
    )
    return (vectors, ok) if return_mask else vectors
