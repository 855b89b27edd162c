"""Encoding sharded by items on a Dask LocalCluster into the embedding cache (xrec.encoders.sharded)."""

from __future__ import annotations

import hashlib
import os
import signal
from pathlib import Path

import numpy as np
import pytest

from xrec.encoders.base import Encoder
from xrec.encoders.cache import EmbeddingCache
from xrec.encoders.sharded import encode_sharded
from xrec.errors import ConfigError, DataError


class DigestTextEncoder(Encoder):
    """A cheap text encoder: the vector is the SHA-256 digest of the text's UTF-8 bytes, bytes mapped to [-1, 1]."""

    modality = "text"
    identity = "test-sha256-text"

    @property
    def dim(self) -> int:
        return 32

    def encode(self, contents, *, progress=False):
        for text in contents:
            if not text.strip():
                raise DataError("blank text")
        return np.stack([expected_vector(t) for t in contents]) if contents else np.zeros((0, 32), np.float32)


def expected_vector(text: str) -> np.ndarray:
    # Reference: hashlib's SHA-256 (FIPS 180-4) of the text, outside xrec.
    digest = np.frombuffer(hashlib.sha256(text.encode("utf-8")).digest(), dtype=np.uint8)
    return (digest.astype(np.float32) / 127.5 - 1.0).astype(np.float32)


class DiesOnceEncoder(DigestTextEncoder):
    """Kills the worker process it runs in the first time it sees ``victim`` (a marker file records it)."""

    def __init__(self, victim: str, marker: Path) -> None:
        self.victim, self.marker, self.owner_pid = victim, marker, os.getpid()

    def encode(self, contents, *, progress=False):
        if self.victim in contents and os.getpid() != self.owner_pid and not self.marker.exists():
            self.marker.write_text(str(os.getpid()))
            os.kill(os.getpid(), signal.SIGKILL)
        return super().encode(contents, progress=progress)


def _texts(n: int = 500) -> list[str]:
    texts = [f"item {j}: a {'red' if j % 3 else 'blue'} thing, size {j % 7}" for j in range(n)]
    return texts + texts[:25]  # repeated contents are encoded once


def _entries(root: Path) -> dict[str, str]:
    """Relative path -> SHA-256 of the bytes, for every entry file under ``root``."""
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(root.rglob("*.vec"))}


def test_sharded_fill_equals_single_process_fill_and_second_run_encodes_nothing(dask_client, tmp_path):
    texts, encoder = _texts(), DigestTextEncoder()
    single = EmbeddingCache(tmp_path / "single")
    ref_vectors, ref_mask = single.encode_with_mask(encoder, texts)
    shared = EmbeddingCache(tmp_path / "shared")
    first = encode_sharded(encoder, texts, cache=shared, shard_size=64, client=dask_client)
    np.testing.assert_array_equal(first.vectors, ref_vectors)
    np.testing.assert_array_equal(first.vectors, np.stack([expected_vector(t) for t in texts]))
    assert first.mask.all() and ref_mask.all()
    assert first.stats.encoded == 500 and first.stats.written == 500 and first.stats.hits == 0
    # the same entry files with the same bytes as a single-process fill
    assert _entries(shared.root) == _entries(single.root) and len(_entries(shared.root)) == 500
    again = encode_sharded(encoder, texts, cache=shared, shard_size=64, client=dask_client)
    assert again.stats.encoded == 0 and again.stats.written == 0 and again.stats.hits == 500
    np.testing.assert_array_equal(again.vectors, ref_vectors)


def test_killed_worker_shard_is_encoded_again(dask_client, tmp_path):
    texts = _texts(300)
    marker = tmp_path / "killed"
    encoder = DiesOnceEncoder(texts[150], marker)
    result = encode_sharded(encoder, texts, cache=tmp_path / "cache", shard_size=50, client=dask_client)
    assert marker.exists() and int(marker.read_text()) != os.getpid()
    dask_client.wait_for_workers(2, timeout=60)
    np.testing.assert_array_equal(result.vectors, np.stack([expected_vector(t) for t in texts]))
    assert len(_entries(tmp_path / "cache")) == 300


def test_errors_on_workers_name_the_item(dask_client, tmp_path):
    texts = ["fine", "   ", "also fine"]
    with pytest.raises(DataError, match="blank text.*item 'b'"):
        encode_sharded(DigestTextEncoder(), texts, cache=tmp_path, labels=["item 'a'", "item 'b'", "item 'c'"], client=dask_client)
    with pytest.raises(ConfigError, match="labels"):
        encode_sharded(DigestTextEncoder(), texts, cache=tmp_path, labels=["x"], client=dask_client)
    with pytest.raises(ConfigError, match="shard_size"):
        encode_sharded(DigestTextEncoder(), texts, cache=tmp_path, shard_size=0, client=dask_client)
    with pytest.raises(ConfigError, match="Encoder"):
        encode_sharded(object(), texts, cache=tmp_path, client=dask_client)
    empty = encode_sharded(DigestTextEncoder(), [], cache=tmp_path, client=dask_client)
    assert empty.vectors.shape == (0, 32)


def test_spec_run_with_a_cluster_encodes_catalog_texts_on_the_workers(dask_client, tmp_path, monkeypatch):
    """A spec run with ``evaluate.scheduler`` fills the embedding cache on the workers, sharded by items."""
    import pandas as pd
    import tomli_w

    from xrec.encoders.text import MiniLMTextEncoder
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    rng = np.random.default_rng(3)
    words = ["red", "blue", "green", "tiny", "large", "round", "square", "soft"]
    items = pd.DataFrame({"item": [f"i{j}" for j in range(40)], "name": [" ".join(rng.choice(words, 3)) + f" no {j}" for j in range(40)]})
    items.to_csv(tmp_path / "items.csv", index=False)
    users = np.repeat(np.arange(50), 6)
    events = pd.DataFrame({"user": [f"u{u}" for u in users], "item": [f"i{j}" for j in rng.integers(0, 40, len(users))]})
    events.assign(timestamp=np.arange(len(events))).drop_duplicates(["user", "item"]).to_csv(tmp_path / "events.csv", index=False)

    def spec(folder: str, **evaluate) -> Path:
        table = {
            "data": {"dataset": "files", "catalog": "items.csv", "interactions": "events.csv", "text": ["name"]},
            "evaluate": {"ks": [5], "baseline": "pop", **evaluate},
            "sources": {"pop": {"kind": "popularity"}, "words": {"kind": "text", "columns": ["name"], "cache_dir": str(tmp_path / folder)}},
        }
        path = tmp_path / f"{folder}.toml"
        path.write_bytes(tomli_w.dumps(table).encode("utf-8"))
        return path

    in_process = run_experiment(load_spec(spec("cache-alone")))

    def refuse(self, contents, *, progress=False):
        raise AssertionError("encoded in the calling process")

    monkeypatch.setattr(MiniLMTextEncoder, "encode", refuse)  # workers are separate (spawned) processes
    on_cluster = run_experiment(load_spec(spec("cache-cluster", scheduler=dask_client.scheduler.address)))
    stored = [p for p in (tmp_path / "cache-cluster").rglob("*") if p.is_file()]
    assert len(stored) >= 40  # one entry per distinct item text
    for name, card in in_process.scorecards.items():
        pd.testing.assert_frame_equal(on_cluster.scorecards[name].per_user, card.per_user)
