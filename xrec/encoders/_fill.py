"""Filling a request from the cache: look every content up once, encode the rest, store it.

:func:`encode_through_cache` is the work behind :meth:`EmbeddingCache.encode_with_mask`
and the catalog encoders; it reports damaged entries and skipped items in warnings
naming them.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from tqdm.auto import tqdm

from xrec._files import write_bytes_atomic
from xrec._validation import is_int
from xrec.encoders._entry_file import content_hash, entry_file, pack_entry, unpack_entry
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

if TYPE_CHECKING:
    from xrec.encoders._store import EmbeddingCache

__all__ = ["CacheCorruptionWarning", "CacheStats", "encode_through_cache"]

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

def _read_entry(path: Path) -> tuple[bytes | None, str]:
    """An entry file's bytes, or ``None`` and why it is unusable (``""`` when there is none)."""
    try:
        with open(path, "rb") as fh:
            return fh.read(), ""
    except FileNotFoundError:
        return None, ""
    except IsADirectoryError:
        return None, "a folder, not an entry file"
    except OSError as exc:  # permissions, a dangling or looping link, an I/O error
        return None, f"unreadable: {exc.strerror or exc}"


def _clear_entry(path: Path) -> None:
    """Remove what stands where an entry file goes (a folder or a link), so the new entry can be renamed there."""
    import shutil

    if path.is_symlink() or not path.is_dir():
        path.unlink(missing_ok=True)
    else:
        shutil.rmtree(path)


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


def _call_encoder(encoder: Encoder, batch: list[Any]) -> tuple[np.ndarray, np.ndarray, list[str], dict[int, str]]:
    """Encode ``batch``; vectors, ok mask, the encoder's warning texts (kept for our own report)
    and, from an encoder with ``encode_with_problems``, the reason each failed item failed (by batch position)."""
    problems: dict[int, str] = {}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        if callable(getattr(encoder, "encode_with_problems", None)):
            vectors, ok, problems = encoder.encode_with_problems(batch, progress=False)  # type: ignore[attr-defined]
        elif callable(getattr(encoder, "encode_with_mask", None)):
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
    return vectors, ok, notes, dict(problems)


def encode_through_cache(
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
    if folder is not None:
        cache.sweep_once(folder)  # type: ignore[union-attr]
    found: dict[str, np.ndarray] = {}
    missing: dict[str, int] = {}  # content hash -> first input position
    in_the_way: set[Path] = set()  # damaged entries that are not plain files (a folder, a link)
    for i, key in enumerate(keys):
        if key is None or key in found or key in missing:
            continue
        vector = None
        if folder is not None and (stored is None or key in stored):
            path = entry_file(folder, key)
            data, why = _read_entry(path)
            if data is not None:
                vector, why = unpack_entry(key, data, dim)
            if why:
                stats.corrupt += 1
                stats.corrupt_paths.append(f"{path} ({why})")
                in_the_way.add(path)
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
            cache.write_meta(folder, encoder, dim)  # type: ignore[union-attr]
        step = (cache.batch_size if cache is not None else None) or getattr(encoder, "batch_size", None)
        if not is_int(step) or step < 1:
            step = 256
        bar = tqdm(total=len(todo), disable=not progress, unit="item", desc=f"encoding ({encoder.cache_key})")
        try:
            for start in range(0, len(todo), step):
                chunk = todo[start : start + step]
                try:
                    vectors, chunk_ok, chunk_notes, chunk_problems = _call_encoder(encoder, [contents[i] for _, i in chunk])
                except DataError as exc:
                    where = ", ".join(
                        f"#{j} = {labels[i] if labels is not None else '#' + str(i)}" for j, (_, i) in enumerate(chunk[:20])
                    )
                    raise DataError(
                        f"{exc} [the encoder numbered a batch of {len(chunk)} uncached items; in your input: {where}"
                        + (" ...]" if len(chunk) > 20 else "]")
                    ) from exc
                if chunk_problems and policy == "raise":  # the encoder tried every item; name them by input
                    bad = {chunk[j][1]: reason for j, reason in chunk_problems.items()}
                    raise DataError(
                        f"{encoder.modality or 'encoder'} {encoder.cache_key}: cannot encode "
                        + _describe(sorted(bad), bad, labels, n)
                        + "; pass on_error='skip' to the encoder to skip them"
                    )
                notes.extend(chunk_notes)
                stats.encoded += len(chunk)
                for j, ((key, i), vector, good) in enumerate(zip(chunk, vectors, chunk_ok)):
                    if good:
                        found[key] = vector
                        if folder is not None:
                            path = entry_file(folder, key)
                            cache.make_folder(path.parent)  # type: ignore[union-attr]
                            if path in in_the_way:
                                _clear_entry(path)
                            try:
                                write_bytes_atomic(path, pack_entry(key, vector), durable=False, sweep=False)
                            except FileNotFoundError:  # folder removed meanwhile (e.g. clear() elsewhere)
                                path.parent.mkdir(parents=True, exist_ok=True)
                                write_bytes_atomic(path, pack_entry(key, vector), durable=False, sweep=False)
                            stats.written += 1
                    else:
                        failed_reasons[i] = chunk_problems.get(j, "the encoder could not encode it")
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

