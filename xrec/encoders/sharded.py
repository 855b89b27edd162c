"""Encoding sharded by items on a Dask cluster, into the shared on-disk embedding cache.

Each worker gets the encoder once (``broadcast``), then shards of item contents; it
encodes a shard through :meth:`EmbeddingCache.encode_with_mask` on the cache folder the
caller names, so only contents missing from the cache are encoded and every new vector is
written there (atomically: a reader sees no entry or a whole one). The caller joins the
shards in item order. The cache folder must be one that every worker can read and write
(this machine's disk for a local cluster; a shared file system for a remote one).

A second run over the same contents finds every vector on disk and encodes nothing.
When a worker dies, Dask runs its unfinished shards again; entries it had already written
are whole and are found by the retry, which encodes only the rest.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, fields
from typing import TYPE_CHECKING, Any

import numpy as np

from xrec.cluster import check_shard_size, open_client, run_shards, worker_count
from xrec.encoders.base import Encoder
from xrec.encoders.cache import CacheStats, EmbeddingCache
from xrec.errors import ConfigError, DataError

if TYPE_CHECKING:
    from distributed import Client

#: Contents per shard when ``shard_size`` is not given (rounded so each worker gets several).
DEFAULT_SHARD_SIZE = 2048


@dataclass
class ShardedEncoding:
    """What :func:`encode_sharded` returns.

    Attributes
    ----------
    vectors
        ``(len(contents), encoder.dim)`` float32 in input order; zero rows where skipped.
    mask
        ``False`` for contents the encoder skipped (its ``on_error="skip"``).
    stats
        The shards' :class:`~xrec.encoders.cache.CacheStats` added up (``encoded == 0``
        when everything was already cached). Counts are over distinct contents.
    """

    vectors: np.ndarray
    mask: np.ndarray
    stats: CacheStats


def _encode_shard(encoder: Encoder, root: str, batch_size: int | None, contents: list, labels: list | None):
    """One shard task, run on a worker: encode what the cache lacks, return vectors, mask and counts."""
    cache = EmbeddingCache(root, batch_size=batch_size)
    vectors, mask = cache.encode_with_mask(encoder, contents, labels=labels)
    return vectors, mask, cache.last_stats


def _add_stats(parts: Sequence[CacheStats]) -> CacheStats:
    total = CacheStats()
    for part in parts:
        for f in fields(CacheStats):
            setattr(total, f.name, getattr(total, f.name) + getattr(part, f.name))
    return total


def encode_sharded(
    encoder: Encoder,
    contents: Sequence[Any],
    *,
    cache: EmbeddingCache | str | os.PathLike | None = None,
    labels: Sequence[str] | None = None,
    shard_size: int | None = None,
    progress: bool = False,
    scheduler: str | None = None,
    workers: int | None = None,
    client: Client | None = None,
) -> ShardedEncoding:
    """Vectors of ``contents``, encoded by Dask workers in shards of items into the embedding cache.

    Parameters
    ----------
    encoder
        Any :class:`~xrec.encoders.base.Encoder`; it is serialized (cloudpickle) and sent
        once to every worker.
    contents
        Texts for a text encoder; image-file bytes or image paths for an image encoder
        (paths are read on the workers). Repeated contents are encoded once.
    cache
        An :class:`~xrec.encoders.cache.EmbeddingCache` or a folder; default the default
        cache (``XREC_CACHE_DIR``, else ``.xrec-cache``), as an absolute path so workers
        with another working directory use the same folder.
    labels
        One name per content (e.g. ``"item 'sku-1'"``) for errors and warnings.
    shard_size
        Distinct contents per task; default :data:`DEFAULT_SHARD_SIZE`, fewer when that
        would leave a worker idle.
    progress
        Progress bar over shards as they finish.
    scheduler, workers, client
        Which cluster (see :func:`xrec.cluster.open_client`).

    Returns
    -------
    ShardedEncoding
        The same vectors and mask as ``cache.encode_with_mask(encoder, contents)`` in one
        process, and the added-up cache counts.

    Raises
    ------
    DataError
        A content the encoder cannot encode (with its ``on_error="raise"``), raised on the
        worker and passed on here.
    ConfigError
        Bad ``labels``, ``shard_size`` or cluster options.
    """
    if not isinstance(encoder, Encoder):
        raise ConfigError(f"encoder must be an xrec Encoder, got {type(encoder).__name__}")
    if isinstance(contents, (str, bytes)):
        raise DataError("cache: expected a sequence of contents, got a single str/bytes")
    contents = list(contents)
    if labels is not None and len(labels) != len(contents):
        raise ConfigError(f"labels: {len(labels)} labels for {len(contents)} contents")
    check_shard_size(shard_size)
    if cache is None or isinstance(cache, (str, os.PathLike)):
        cache = EmbeddingCache(cache)
    elif not isinstance(cache, EmbeddingCache):
        raise ConfigError(f"cache must be an EmbeddingCache or a folder, got {type(cache).__name__}")
    root = str(cache.root.resolve())

    # Distinct contents only, so two workers never encode the same one.
    position: dict[Any, int] = {}
    for content in contents:
        position.setdefault(content, len(position))
    distinct = list(position)
    where = np.fromiter((position[c] for c in contents), dtype=np.int64, count=len(contents))
    distinct_labels = None
    if labels is not None:
        first = {}
        for content, label in zip(contents, labels):
            first.setdefault(content, label)
        distinct_labels = [first[c] for c in distinct]

    out = np.zeros((len(distinct), encoder.dim), dtype=np.float32)
    ok = np.ones(len(distinct), dtype=bool)
    if not distinct:
        return ShardedEncoding(out, ok, CacheStats())
    with open_client(scheduler, workers, client=client) as active:
        size = shard_size or max(1, min(DEFAULT_SHARD_SIZE, -(-len(distinct) // (4 * worker_count(active)))))
        starts = range(0, len(distinct), size)
        shards = [
            (distinct[a : a + size], None if distinct_labels is None else distinct_labels[a : a + size]) for a in starts
        ]
        parts = run_shards(
            active, _encode_shard, (encoder, root, cache.batch_size), shards, desc=encoder.cache_key, progress=progress
        )
    for start, (vectors, mask, _) in zip(starts, parts):
        out[start : start + len(vectors)], ok[start : start + len(vectors)] = vectors, mask
    return ShardedEncoding(out[where], ok[where], _add_stats([stats for _, _, stats in parts]))
