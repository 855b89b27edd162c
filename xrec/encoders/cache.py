"""On-disk cache of item vectors, keyed by (encoder identity + version, content hash).

Layout under the root folder::

    <root>/<encoder slug>-<8 hex of its cache key>/
        encoder.json            identity, version, modality, dim (for people reading the folder)
        ab/abcdef....vec        one entry per content; name = sha256 of the content

Each entry file is a 24-byte header — magic ``XRV1``, the vector length (uint32,
little-endian), a 16-byte BLAKE2b digest of (content hash, vector bytes) — followed by
the float32 little-endian vector. Entries are written to a temporary file in the same
folder and renamed over the final name (``os.replace``), so a reader sees either no
entry or a whole one; a damaged entry (disk fault, a copy cut short, a folder or an
unreadable file where the entry should be) fails its digest or its read, is reported in a
warning naming the file and is recomputed (what stood in its place is replaced). Entries
are not ``fsync``-ed (they are checked on every read); temporary files left by a process
killed mid-write are swept the first time a process uses an encoder's folder. Changing an encoder's
identity or version moves it to another folder: other encoders' entries stay valid.
No pickle anywhere.
"""

from xrec.encoders._entry_file import content_hash
from xrec.encoders._fill import CacheCorruptionWarning, CacheStats
from xrec.encoders._store import DEFAULT_DIR, ENV_VAR, EmbeddingCache
from xrec.encoders.catalog import catalog_texts, encode_catalog_images, encode_catalog_text

__all__ = [
    "DEFAULT_DIR",
    "ENV_VAR",
    "CacheCorruptionWarning",
    "CacheStats",
    "EmbeddingCache",
    "catalog_texts",
    "content_hash",
    "encode_catalog_images",
    "encode_catalog_text",
]
