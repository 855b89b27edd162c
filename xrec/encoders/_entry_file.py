"""One cache entry file: its name (the content's sha256) and its checked binary layout.

Each entry file is a 24-byte header — magic ``XRV1``, the vector length (uint32,
little-endian), a 16-byte BLAKE2b digest of (content hash, vector bytes) — followed by
the float32 little-endian vector.
"""

from __future__ import annotations

import hashlib
import struct
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["content_hash", "entry_file", "pack_entry", "unpack_entry"]

_MAGIC = b"XRV1"
_HEADER = struct.Struct("<4sI16s")


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


def pack_entry(key: str, vector: np.ndarray) -> bytes:
    payload = np.ascontiguousarray(vector, dtype="<f4").tobytes()
    return _HEADER.pack(_MAGIC, vector.shape[0], _digest(key, payload)) + payload


def unpack_entry(key: str, data: bytes, dim: int) -> tuple[np.ndarray | None, str]:
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



def entry_file(folder: Path, key: str) -> Path:
    """File of the entry whose content hash is ``key`` in an encoder's ``folder``."""
    return folder / key[:2] / f"{key}.vec"
