"""EmbeddingCache: hits and misses, damaged entries, invalidation, interrupted writes, catalog helpers."""

from __future__ import annotations

import hashlib
import os
import threading
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xrec.data.catalog import Catalog
from xrec.encoders import _fill as fill_module
from xrec.encoders.base import Encoder
from xrec.encoders.cache import (
    CacheCorruptionWarning,
    EmbeddingCache,
    catalog_texts,
    content_hash,
    encode_catalog_images,
    encode_catalog_text,
)
from xrec.errors import ConfigError, DataError


class FakeEncoder(Encoder):
    """Deterministic vectors from the content's hash; records what it was asked to encode."""

    def __init__(self, *, modality: str = "text", identity: str = "fake", version: str = "1", on_error: str = "raise", dim: int = 6):
        self.modality = modality
        self.identity = identity
        self.version = version
        self.on_error = on_error
        self._dim = dim
        self.seen: list = []
        self.calls = 0

    @property
    def dim(self) -> int:
        return self._dim

    def _vector(self, content) -> np.ndarray:
        raw = content.encode() if isinstance(content, str) else bytes(content)
        seed = int.from_bytes(hashlib.sha256(raw + self.version.encode()).digest()[:8], "little")
        v = np.random.default_rng(seed).normal(size=self._dim)
        return (v / np.linalg.norm(v)).astype(np.float32)

    def encode(self, contents, *, progress=False):
        self.calls += 1
        self.seen.extend(contents)
        out = np.zeros((len(contents), self._dim), dtype=np.float32)
        for i, c in enumerate(contents):
            if isinstance(c, (bytes, bytearray)) and c.startswith(b"BROKEN"):
                if self.on_error == "raise":
                    raise DataError(f"fake: cannot decode #{i}")
                warnings.warn(f"fake: skipped 1 of {len(contents)}: #{i} cannot decode", UserWarning)
                continue
            out[i] = self._vector(c)
        return out


TEXTS = [f"item number {i} is a {'red' if i % 2 else 'blue'} thing" for i in range(12)]


@pytest.fixture
def cache(tmp_path) -> EmbeddingCache:
    return EmbeddingCache(tmp_path / "cache", batch_size=5)


def _entries(cache: EmbeddingCache, encoder: Encoder) -> list[Path]:
    return sorted(cache.folder(encoder).glob("??/*.vec"))


def test_content_hash_is_sha256_of_utf8_or_bytes():
    # Outside reference: FIPS 180-2, Appendix B.1, SHA-256 of the message "abc".
    expected = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert content_hash("abc") == expected
    assert content_hash(b"abc") == expected
    assert content_hash(None) is None and content_hash(3) is None


def test_cold_then_warm_counts_hits_and_misses(cache):
    enc = FakeEncoder()
    cold = cache.encode(enc, TEXTS)
    s = cache.last_stats
    assert (s.hits, s.misses, s.encoded, s.written, s.corrupt) == (0, 12, 12, 12, 0)
    assert enc.calls == 3  # batches of 5, 5, 2
    np.testing.assert_array_equal(cold, enc.encode(TEXTS))
    enc.seen.clear()
    warm = cache.encode(enc, TEXTS)
    s = cache.last_stats
    assert (s.hits, s.misses, s.encoded, s.written) == (12, 0, 0, 0)
    assert enc.seen == []
    np.testing.assert_array_equal(warm, cold)
    assert warm.dtype == np.float32 and warm.shape == (12, 6)
    assert cache.count(enc) == 12


def test_input_order_and_duplicates(cache):
    enc = FakeEncoder()
    cache.encode(enc, TEXTS[:4])
    enc.seen.clear()
    contents = [TEXTS[5], TEXTS[0], TEXTS[5], TEXTS[3], TEXTS[6]]
    out = cache.encode(enc, contents)
    assert sorted(enc.seen) == sorted([TEXTS[5], TEXTS[6]])  # each new content encoded once
    s = cache.last_stats
    assert (s.hits, s.misses, s.encoded) == (2, 3, 2)
    np.testing.assert_array_equal(out, np.stack([enc._vector(c) for c in contents]))


def test_only_changed_item_is_reencoded(cache):
    enc = FakeEncoder()
    cache.encode(enc, TEXTS)
    enc.seen.clear()
    changed = list(TEXTS)
    changed[7] = "item number 7 got a new description"
    out = cache.encode(enc, changed)
    assert enc.seen == [changed[7]]
    assert (cache.last_stats.hits, cache.last_stats.misses) == (11, 1)
    np.testing.assert_array_equal(out[7], enc._vector(changed[7]))


def test_new_encoder_version_invalidates_only_its_own_entries(cache):
    v1, v2, other = FakeEncoder(version="1"), FakeEncoder(version="2"), FakeEncoder(identity="other")
    cache.encode(v1, TEXTS)
    cache.encode(other, TEXTS[:3])
    before = {p: p.read_bytes() for p in _entries(cache, v1)}
    out2 = cache.encode(v2, TEXTS)
    assert cache.last_stats.misses == 12 and cache.last_stats.hits == 0
    assert cache.folder(v2) != cache.folder(v1)
    assert {p: p.read_bytes() for p in _entries(cache, v1)} == before
    v1.seen.clear()
    cache.encode(v1, TEXTS)
    assert cache.last_stats.hits == 12 and v1.seen == []
    cache.encode(other, TEXTS[:3])
    assert cache.last_stats.hits == 3
    assert not np.allclose(out2, cache.encode(v1, TEXTS))


@pytest.mark.parametrize(
    "damage, reason",
    [
        (lambda b: b[:-3], "truncated"),
        (lambda b: b[:30] + bytes([b[30] ^ 0xFF]) + b[31:], "checksum"),
        (lambda b: b"JUNK" + b[4:], "header"),
        (lambda b: b"", "truncated"),
    ],
)
def test_damaged_entry_is_reported_and_recomputed(cache, damage, reason):
    enc = FakeEncoder()
    good = cache.encode(enc, TEXTS[:4])
    victim = cache.entry_path(enc, TEXTS[2])
    victim.write_bytes(damage(victim.read_bytes()))
    enc.seen.clear()
    with pytest.warns(CacheCorruptionWarning, match=reason) as record:
        out = cache.encode(enc, TEXTS[:4])
    assert str(victim) in str(record[0].message)
    assert enc.seen == [TEXTS[2]]
    assert cache.last_stats.corrupt == 1 and cache.last_stats.hits == 3
    np.testing.assert_array_equal(out, good)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        cache.encode(enc, TEXTS[:4])  # repaired: no warning any more
    assert cache.last_stats.hits == 4


@pytest.mark.parametrize("kind", ["folder", "folder with files", "link to a folder"])
def test_something_else_where_an_entry_should_be_is_a_damaged_entry_recomputed(cache, kind):
    enc = FakeEncoder()
    good = cache.encode(enc, TEXTS[:4])
    victim = cache.entry_path(enc, TEXTS[2])
    victim.unlink()
    if kind == "link to a folder":
        victim.symlink_to(cache.root)  # only the link is removed, never what it points to
    else:
        victim.mkdir()
        if kind == "folder with files":
            (victim / "note.txt").write_text("x")
    reason = "a folder, not an entry file"
    enc.seen.clear()
    with pytest.warns(CacheCorruptionWarning, match=rf"1 damaged entry .*{victim.name} \({reason}"):
        out = cache.encode(enc, TEXTS[:4])
    assert enc.seen == [TEXTS[2]] and cache.last_stats.corrupt == 1
    np.testing.assert_array_equal(out, good)
    assert victim.is_file() and not victim.is_symlink() and cache.root.is_dir()  # replaced by a real entry
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        cache.encode(enc, TEXTS[:4])
    assert cache.last_stats.hits == 4


def test_stale_temporary_files_of_killed_writers_are_swept_once_per_folder(cache):
    import time

    from xrec._files import MIN_AGE

    enc = FakeEncoder()
    cache.encode(enc, TEXTS[:3])
    entry = cache.entry_path(enc, TEXTS[0])
    stale = entry.parent / f".{entry.name}.999999999.0123abcd.tmp"  # no such pid
    fresh = entry.parent / f".{entry.name}.999999999.89abcdef.tmp"
    foreign = entry.parent / "notes.tmp"
    for p in (stale, fresh, foreign):
        p.write_bytes(b"XRV1 half")
    old = time.time() - MIN_AGE - 60
    for p in (stale, foreign):
        os.utime(p, (old, old))
    from xrec.encoders import _store

    _store._SWEPT.clear()  # a new process
    cache.encode(enc, TEXTS[:3])
    assert not stale.exists() and fresh.exists() and foreign.exists()
    os.utime(fresh, (old, old))
    cache.encode(enc, TEXTS[:3])
    assert fresh.exists()  # once per process and folder
    assert cache.sweep_temp_files(enc) == [fresh] and cache.sweep_temp_files() == []


def test_entry_of_other_content_moved_into_place_is_detected(cache):
    # A file under the wrong name (e.g. copied by hand) fails the digest, which covers the content hash.
    enc = FakeEncoder()
    cache.encode(enc, TEXTS[:2])
    a, b = cache.entry_path(enc, TEXTS[0]), cache.entry_path(enc, TEXTS[1])
    b.write_bytes(a.read_bytes())
    with pytest.warns(UserWarning, match="checksum"):
        out = cache.encode(enc, TEXTS[:2])
    np.testing.assert_array_equal(out[1], enc._vector(TEXTS[1]))


def test_interrupted_write_leaves_no_visible_entry(cache, monkeypatch):
    enc = FakeEncoder()
    real_replace = os.replace
    calls = {"n": 0}

    def dying_replace(src, dst):
        calls["n"] += 1
        if calls["n"] == 4:  # encoder.json, then entries 1-2 succeed; the third dies before rename
            raise KeyboardInterrupt
        real_replace(src, dst)

    monkeypatch.setattr(os, "replace", dying_replace)
    with pytest.raises(KeyboardInterrupt):
        cache.encode(enc, TEXTS)
    monkeypatch.setattr(os, "replace", real_replace)
    folder = cache.folder(enc)
    assert len(_entries(cache, enc)) == 2
    assert list(folder.rglob("*.tmp")) == []  # the half-written temp file was removed
    # A temp file left by a killed process (no cleanup ran) is never read as an entry.
    stray = cache.entry_path(enc, TEXTS[5])
    stray.parent.mkdir(parents=True, exist_ok=True)
    (stray.parent / f".{stray.name}.999.dead.tmp").write_bytes(b"XRV1 half")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = cache.encode(enc, TEXTS)
    assert cache.last_stats.hits == 2 and cache.last_stats.misses == 10 and cache.last_stats.corrupt == 0
    np.testing.assert_array_equal(out, np.stack([enc._vector(t) for t in TEXTS]))


def test_concurrent_writers_leave_valid_entries(tmp_path):
    enc = FakeEncoder()
    root = tmp_path / "shared"
    errors: list[BaseException] = []

    def work():
        try:
            for _ in range(3):
                EmbeddingCache(root, batch_size=3).encode(enc, TEXTS)
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    reader = EmbeddingCache(root)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = reader.encode(FakeEncoder(), TEXTS)
    assert reader.last_stats.hits == 12
    np.testing.assert_array_equal(out, np.stack([enc._vector(t) for t in TEXTS]))
    assert list(root.rglob("*.tmp")) == []


def test_bad_content_raises_with_input_positions(cache):
    enc = FakeEncoder()
    cache.encode(enc, TEXTS[:3])
    with pytest.raises(DataError) as info:
        cache.encode(enc, [TEXTS[0], None, TEXTS[1], 7])
    assert "#1" in str(info.value) and "#3" in str(info.value) and "2 of 4" in str(info.value)


def test_skip_policy_flags_and_does_not_store_failures(cache):
    enc = FakeEncoder(modality="image", on_error="skip")
    contents = [b"img-a", b"BROKEN-1", None, b"img-b"]
    with pytest.warns(UserWarning, match=r"skipped 2 of 4 items") as record:
        out, ok = cache.encode_with_mask(enc, contents)
    message = str(record[0].message)
    assert "#1" in message and "#2" in message and "cannot decode" in message
    assert ok.tolist() == [True, False, False, True]
    np.testing.assert_array_equal(out[~ok], 0.0)
    assert cache.count(enc) == 2  # failures are not cached
    assert cache.last_stats.failed == 2


def test_encoder_error_inside_batch_names_input_positions(cache):
    enc = FakeEncoder(modality="image")
    cache.encode(enc, [b"img-a"])
    # The encoder sees the uncached batch [img-b, BROKEN] and blames its #1; that is input #2.
    with pytest.raises(DataError, match=r"#1 = #2"):
        cache.encode(enc, [b"img-a", b"img-b", b"BROKEN"])


def test_wrong_shape_from_encoder_is_an_error(cache):
    class Short(FakeEncoder):
        def encode(self, contents, *, progress=False):
            return np.ones((len(contents), 3), dtype=np.float32)

    with pytest.raises(ConfigError, match="shape"):
        cache.encode(Short(), ["x"])


def test_root_from_argument_env_and_default(tmp_path, monkeypatch):
    monkeypatch.delenv("XREC_CACHE_DIR", raising=False)
    monkeypatch.chdir(tmp_path)
    assert EmbeddingCache().root == Path(".xrec-cache")
    monkeypatch.setenv("XREC_CACHE_DIR", str(tmp_path / "from-env"))
    c = EmbeddingCache()
    c.encode(FakeEncoder(), ["x"])
    assert c.count(FakeEncoder()) == 1 and (tmp_path / "from-env").is_dir()
    assert EmbeddingCache(tmp_path / "arg").root == tmp_path / "arg"
    assert c.clear() == 1 and c.count(FakeEncoder()) == 0


def test_progress_is_silent_when_off(cache, capfd):
    cache.encode(FakeEncoder(), TEXTS, progress=False)
    captured = capfd.readouterr()
    assert captured.out == "" and captured.err == ""


# -- catalog helpers ---------------------------------------------------------------------


def _catalog(tmp_path, *, with_images=True):
    frame = pd.DataFrame(
        {
            "item": ["a", "b", "c"],
            "title": ["Red mug", "Blue vase", "  "],
            "desc": ["A ceramic mug.", "", " "],
            "img": ["a.jpg", "b.jpg", "missing.jpg"],
        }
    )
    if with_images:
        (tmp_path / "a.jpg").write_bytes(b"jpeg-a")
        (tmp_path / "b.jpg").write_bytes(b"jpeg-b")
    return Catalog.from_frame(frame, text=["title", "desc"], image="img", image_root=tmp_path, check_images=False)


def test_catalog_texts_join_declared_columns(tmp_path):
    cat = _catalog(tmp_path)
    assert catalog_texts(cat) == ["Red mug\nA ceramic mug.", "Blue vase", ""]
    assert catalog_texts(cat, ["desc"], sep=" | ") == ["A ceramic mug.", "", ""]
    with pytest.raises(ConfigError, match="nope"):
        catalog_texts(cat, ["nope"])
    with pytest.raises(ConfigError, match="no text columns"):
        catalog_texts(Catalog.from_ids(["x"]))


def test_encode_catalog_text_names_items_and_caches(tmp_path):
    cat = _catalog(tmp_path)
    cache = EmbeddingCache(tmp_path / "c")
    with pytest.raises(DataError, match=r"item 'c'"):
        encode_catalog_text(cat, FakeEncoder(), cache=cache)
    enc = FakeEncoder(on_error="skip")
    with pytest.warns(UserWarning, match="item 'c'"):
        vectors, ok = encode_catalog_text(cat, enc, cache=cache, return_mask=True)
    assert ok.tolist() == [True, True, False]
    np.testing.assert_array_equal(vectors[0], enc._vector("Red mug\nA ceramic mug."))
    with pytest.warns(UserWarning):
        encode_catalog_text(cat, enc, cache=cache)
    assert cache.last_stats.hits == 2
    enc.seen.clear()
    with pytest.warns(UserWarning, match="1 of 3"):
        encode_catalog_text(cat, enc, ["title"], cache=False)
    assert enc.seen == ["Red mug", "Blue vase"]  # blank text never reaches the encoder


def test_encode_catalog_images_reads_bytes_and_applies_policy(tmp_path):
    cat = _catalog(tmp_path)
    cache = EmbeddingCache(tmp_path / "c")
    with pytest.raises(DataError, match=r"item 'c'.*missing\.jpg"):
        encode_catalog_images(cat, FakeEncoder(modality="image"), cache=cache)
    enc = FakeEncoder(modality="image", on_error="skip")
    with pytest.warns(UserWarning, match="missing.jpg"):
        vectors, ok = encode_catalog_images(cat, enc, cache=cache, return_mask=True)
    assert ok.tolist() == [True, True, False]
    np.testing.assert_array_equal(vectors[1], enc._vector(b"jpeg-b"))
    assert enc.seen == [b"jpeg-a", b"jpeg-b"]


# -- with the real text encoder ----------------------------------------------------------


def test_real_text_encoder_through_the_cache(tmp_path):
    from xrec.encoders.text import MiniLMTextEncoder

    enc = MiniLMTextEncoder()
    cache = EmbeddingCache(tmp_path / "c", batch_size=4)
    texts = ["a wooden chair", "a steel table lamp", "a wooden chair", "linen curtains", "a cotton rug"]
    cold = cache.encode(enc, texts)
    assert (cache.last_stats.misses, cache.last_stats.encoded) == (5, 4)
    direct = enc.encode(texts)
    np.testing.assert_allclose(cold, direct, atol=1e-6)
    warm = cache.encode(enc, texts)
    assert cache.last_stats.hits == 5
    np.testing.assert_array_equal(warm, cold)
    assert cache.folder(enc).name.startswith("all-MiniLM-L6-v2@1-")


def test_encoder_checks_run_on_uncached_items_only_and_name_input_positions(cache):
    class Picky(FakeEncoder):
        def __init__(self, **kw):
            super().__init__(**kw)
            self.checked: list = []

        def problems(self, contents):
            self.checked.extend(contents)
            return {i: "starts with BAD" for i, c in enumerate(contents) if c.startswith("BAD")}

    enc = Picky()
    cache.encode(enc, TEXTS[:3])
    enc.checked.clear()
    contents = [TEXTS[0], "BAD one", TEXTS[4], TEXTS[1], "BAD one"]
    with pytest.raises(DataError) as info:
        cache.encode(enc, contents)
    assert "#1: starts with BAD" in str(info.value) and "#4: starts with BAD" in str(info.value)
    assert enc.checked == ["BAD one", TEXTS[4]]  # cached and repeated contents are not re-checked
    assert cache.count(enc) == 3  # nothing written when raising

    enc.on_error = "skip"
    with pytest.warns(UserWarning, match="2 of 5 items"):
        out, ok = cache.encode_with_mask(enc, contents)
    assert ok.tolist() == [True, False, True, True, False]
    assert "BAD one" not in enc.seen


def test_empty_input_and_zero_vector_from_a_masking_encoder(cache):
    assert cache.encode(FakeEncoder(), []).shape == (0, 6)

    class ZeroOk(FakeEncoder):
        # An encoder whose mask says a zero vector is a real answer (e.g. no attributes).
        def encode_with_mask(self, contents, *, progress=False):
            return np.zeros((len(contents), self.dim), np.float32), np.ones(len(contents), bool)

    enc = ZeroOk()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out, ok = cache.encode_with_mask(enc, ["x", "y"])
    assert ok.all() and cache.count(enc) == 2 and not out.any()


def test_large_requests_list_folders_instead_of_probing(cache, monkeypatch):
    monkeypatch.setattr(fill_module, "_LIST_FROM", 1)  # take the listing path for this small case
    enc = FakeEncoder()
    cache.encode(enc, TEXTS[:6])
    victim = cache.entry_path(enc, TEXTS[1])
    victim.write_bytes(victim.read_bytes()[:-1])
    enc.seen.clear()
    with pytest.warns(CacheCorruptionWarning, match=str(victim.name)):
        out = cache.encode(enc, TEXTS)
    assert sorted(enc.seen) == sorted([TEXTS[1], *TEXTS[6:]])
    assert (cache.last_stats.hits, cache.last_stats.misses, cache.last_stats.corrupt) == (5, 7, 1)
    np.testing.assert_array_equal(out, np.stack([enc._vector(t) for t in TEXTS]))
