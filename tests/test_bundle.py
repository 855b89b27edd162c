"""Bundles: every source kind round-trips exactly, files are verified, writes are all-or-nothing."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Self

import numpy as np
import pandas as pd
import pytest
from _bundles import small_dataset

from xrec.blend import Blend, CombMNZ, ReciprocalRankFusion
from xrec.blend.gating import GatedBlend
from xrec.bundle import load_bundle, save_bundle, sweep_stale
from xrec.data.demo import load_demo_shop
from xrec.errors import BundleError, ConfigError
from xrec.fold import Fold
from xrec.sources import make_source
from xrec.sources.base import Source, source_class, source_kinds
from xrec.split import split_dataset

ROOT = Path(__file__).resolve().parents[1]

# Every built-in kind the demo and the MovieLens specs use, with cheap settings.
KINDS = {
    "popularity": ("popularity", {}),
    "als": ("als", {"factors": 16, "iterations": 4, "random_state": 0}),
    "bpr": ("bpr", {"factors": 8, "iterations": 5, "random_state": 0}),
    "item_knn": ("item_knn", {"neighbors": 30}),
    "attributes": ("attributes", {}),
    "text": ("text", {"columns": ["name", "description"], "center": True}),
    "image": ("image", {"center": True}),
    "ridge": ("cross_modal", {"profile": "text", "items": "image", "bridge": "ridge"}),
    "fusion": ("early_fusion", {"modalities": ["text", "image", "attributes"], "weights": {"image": 0.5}}),
    # A plain low-rank source: the bundle holds its placed factors (known and mapped new items).
    "mapped": ("mapped_factors", {"modalities": ["attributes"], "als": {"factors": 8, "iterations": 4, "random_state": 0}}),
}
# The slower bridges (tens of seconds on a busy 2-core machine), in their own slow test.
SLOW_BRIDGES = {
    "cca": ("cross_modal", {"profile": "text", "items": "image", "bridge": "cca", "n_components": 8, "pca_components": 32}),
    "conse": ("cross_modal", {"profile": "image", "items": "text", "bridge": "conse", "prior_correction": True}),
}


def fit_kinds(kinds: dict, fold, cache_dir: str) -> dict:
    sources = {}
    for name, (kind, params) in kinds.items():
        params = dict(params)
        if kind in ("text", "image", "cross_modal", "early_fusion", "mapped_factors"):
            params["cache_dir"] = cache_dir
        sources[name] = make_source(kind, **params).fit(fold)
    return sources


@pytest.fixture(scope="module")
def cache_dir(request: pytest.FixtureRequest) -> str:
    return os.environ.get("XREC_CACHE_DIR") or str(request.config.cache.mkdir("xrec-content-embeddings"))


@pytest.fixture(scope="module")
def shop(cache_dir):
    dataset = load_demo_shop()
    split = split_dataset(dataset, "leave_last", seed=0)
    sources = fit_kinds(KINDS, split.test, cache_dir)
    weights = {name: 1.0 / (i + 1) for i, name in enumerate(sources)}
    blend = Blend(sources, weights, "zscore").fit(split.test)
    return dataset, split, sources, blend


@pytest.fixture(scope="module")
def written(shop, tmp_path_factory):
    dataset, split, _, blend = shop
    path = tmp_path_factory.mktemp("bundles") / "shop"
    save_bundle(path, blend, dataset=dataset, split_settings=split.settings, fold="test", evidence={"note": "test"})
    return path


def test_the_kinds_cover_every_registered_built_in():
    built_in = {k for k in source_kinds() if source_class(k).__module__.startswith("xrec.")}
    # ranking and vectors: test_ranking_and_vectors_kinds_restore_exactly
    assert built_in <= {kind for kind, _ in KINDS.values()} | {kind for kind, _ in SLOW_BRIDGES.values()} | {"ranking", "vectors"}


def test_every_kind_restores_its_exact_scores(shop, written):
    _, split, sources, blend = shop
    bundle = load_bundle(written)
    users = np.arange(split.test.n_users)
    for name, src in sources.items():
        assert np.array_equal(bundle.scorer.sources[name].score(users[:300]), src.score(users[:300])), name
    assert np.array_equal(bundle.scorer.score(users), blend.score(users))


def test_gated_blend_and_fusion_rules_restore_their_rankings(shop, tmp_path):
    dataset, split, sources, _ = shop
    part = {n: sources[n] for n in ("popularity", "als", "item_knn", "text")}
    bands = {b: {n: w for n, w in zip(part, ws, strict=True)} for b, ws in
             (("new", (0.0, 0.0, 0.0, 1.0)), ("tail", (0.1, 1.0, 0.5, 0.5)), ("head", (0.3, 1.0, 0.2, 0.1)))}
    scorers = {
        "gated": GatedBlend(part, bands, "zscore", head_min=20).fit(split.test),
        "rrf": ReciprocalRankFusion(part, depth=50).fit(split.test),
        "combmnz": CombMNZ(part, "rank", depth=40).fit(split.test),
    }
    users = np.arange(0, split.test.n_users, 7)
    for name, scorer in scorers.items():
        save_bundle(tmp_path / name, scorer, dataset=dataset, split_settings=split.settings, fold="test")
        restored = load_bundle(tmp_path / name).scorer
        assert type(restored) is type(scorer)
        assert np.array_equal(restored.score(users), scorer.score(users)), name


def test_checksums_equal_hashlib_and_identity_is_the_manifest_hash(written):
    raw = (written / "manifest.json").read_bytes()
    manifest = json.loads(raw)
    on_disk = sorted(p.relative_to(written).as_posix() for p in written.rglob("*") if p.is_file())
    assert on_disk == sorted([*manifest["files"], "manifest.json"])
    for name, entry in manifest["files"].items():
        data = (written / name).read_bytes()
        # outside reference: Python's hashlib SHA-256 of the file's bytes
        assert entry["sha256"] == hashlib.sha256(data).hexdigest(), name
        assert entry["bytes"] == len(data)
    assert load_bundle(written).identity == hashlib.sha256(raw).hexdigest()


def test_artifacts_are_readable_by_safetensors_and_pyarrow_own_readers(shop, written):
    import pyarrow.parquet as pq
    from safetensors import safe_open
    from safetensors.numpy import load_file

    dataset, split, sources, _ = shop
    manifest = json.loads((written / "manifest.json").read_text())
    files = {name: written / entry["file"] for name, entry in manifest["sources"].items()}
    # outside reference: the safetensors package's own loaders (file-based, and lazy by key)
    als = load_file(files["als"])
    assert np.array_equal(als["user_factors"], sources["als"].user_factors_)
    assert np.array_equal(als["item_factors"], sources["als"].item_factors_)
    with safe_open(files["ridge"], framework="numpy") as fh:  # lazy, by key
        assert np.array_equal(fh.get_tensor("bridge.coef_"), sources["ridge"].bridge_.coef_)
        assert np.array_equal(fh.get_tensor("has_content"), sources["ridge"].has_content_)
    knn = load_file(files["item_knn"])
    sim = sources["item_knn"].similarity_
    assert np.array_equal(knn["similarity_indptr"], sim.indptr) and np.array_equal(knn["similarity_data"], sim.data)
    # outside reference: pyarrow's Parquet reader
    items = pq.read_table(written / "items.parquet").to_pandas()
    assert items["item"].tolist() == dataset.catalog.item_ids.tolist()
    assert np.array_equal(items["price"].to_numpy(), dataset.catalog.items["price"].to_numpy())
    users = pq.read_table(written / "users.parquet").to_pandas()
    assert users["user"].tolist() == [str(u) for u in split.test.user_ids]
    train = pq.read_table(written / "train.parquet").to_pandas()
    assert len(train) == len(split.test.train)


def test_loading_refits_nothing(written, monkeypatch):
    def refuse(self, fold):
        raise AssertionError(f"{type(self).__name__}.fit called while loading a bundle")

    for kind in source_kinds():
        monkeypatch.setattr(source_class(kind), "fit", refuse)
    monkeypatch.setattr("xrec.split.split_dataset", lambda *a, **k: pytest.fail("split_dataset called"))
    bundle = load_bundle(written)
    assert len(bundle.recommend(bundle.user_ids[0], 10)) == 10


def _copy(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


def test_changed_missing_and_extra_files_are_refused_by_name(written, tmp_path):
    changed = _copy(written, tmp_path / "changed")
    target = changed / "sources" / "01.safetensors"
    data = bytearray(target.read_bytes())
    data[-1] ^= 0x01
    target.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"sources/01\.safetensors: SHA-256 differs"):
        load_bundle(changed)

    missing = _copy(written, tmp_path / "missing")
    (missing / "users.parquet").unlink()
    with pytest.raises(BundleError, match=r"users\.parquet: listed in the bundle's manifest but missing"):
        load_bundle(missing)

    extra = _copy(written, tmp_path / "extra")
    (extra / "sources" / "notes.txt").write_text("hello")
    with pytest.raises(BundleError, match=r"sources/notes\.txt: extra file"):
        load_bundle(extra)

    no_manifest = _copy(written, tmp_path / "no-manifest")
    (no_manifest / "manifest.json").unlink()
    with pytest.raises(BundleError, match=r"manifest\.json: missing"):
        load_bundle(no_manifest)


def test_an_artifact_changed_with_a_matching_checksum_fails_the_ranking_digest(written, tmp_path):
    from safetensors.numpy import load_file, save_file

    forged = _copy(written, tmp_path / "forged")
    manifest = json.loads((forged / "manifest.json").read_text())
    name = manifest["sources"]["als"]["file"]
    arrays = load_file(forged / name)
    arrays["item_factors"] = arrays["item_factors"][::-1].copy()
    save_file(arrays, forged / name)
    manifest["files"][name]["sha256"] = hashlib.sha256((forged / name).read_bytes()).hexdigest()
    manifest["files"][name]["bytes"] = (forged / name).stat().st_size
    (forged / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(BundleError, match=r"blend\.toml: check\.digest"):
        load_bundle(forged)


class OpaqueScores(Source):
    """A registered kind whose learned state a bundle cannot read (scores from a private table)."""

    kind = "test_bundle_opaque"

    def __init__(self, seed: int = 0) -> None:
        self.seed = seed

    def fit(self, fold: Fold) -> Self:
        self._table = np.random.default_rng(self.seed).random((fold.n_users, fold.n_items), dtype=np.float32)
        self.fitted_ = True
        return self

    def score(self, users):
        return self._table[np.asarray(users)]


def test_a_kind_without_exportable_state_is_refused_by_name(shop, tmp_path):
    dataset, split, sources, _ = shop
    blend = Blend({"als": sources["als"], "odd": OpaqueScores().fit(split.test)}, {"als": 1.0, "odd": 1.0}).fit(split.test)
    with pytest.raises(ConfigError, match=r"sources\.odd: source kind 'test_bundle_opaque'"):
        save_bundle(tmp_path / "b", blend, dataset=dataset, split_settings=split.settings, fold="test")
    assert list(tmp_path.iterdir()) == []  # nothing written, not even a temporary folder


def test_replacing_a_bundle_and_refusing_other_folders(shop, written, tmp_path):
    dataset, split, sources, _ = shop
    target = _copy(written, tmp_path / "b")
    small = Blend({"als": sources["als"]}, {"als": 1.0}).fit(split.test)
    save_bundle(target, small, dataset=dataset, split_settings=split.settings, fold="test")
    assert list(load_bundle(target).scorer.sources) == ["als"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b"]  # the old one and the temporary folder are gone
    other = tmp_path / "photos"
    other.mkdir()
    (other / "cat.png").write_bytes(b"x")
    with pytest.raises(ConfigError, match="neither empty nor a bundle"):
        save_bundle(other, small, dataset=dataset, split_settings=split.settings, fold="test")


def test_leftovers_of_killed_writers_are_swept_when_old(shop, written, tmp_path):
    dataset, split, sources, _ = shop
    target = _copy(written, tmp_path / "b")
    old = tmp_path / ".b.abc123.partial"
    fresh = tmp_path / ".b.def456.partial"
    other = tmp_path / ".c.abc123.partial"
    for folder in (old, fresh, other):
        folder.mkdir()
        (folder / "users.parquet").write_bytes(b"half")
    os.utime(old, (time.time() - 7200, time.time() - 7200))
    os.utime(other, (time.time() - 7200, time.time() - 7200))
    assert sweep_stale(target) == [old]
    assert fresh.exists() and other.exists()  # a writer may still be filling it; another bundle's
    save_bundle(target, Blend({"als": sources["als"]}, {"als": 1.0}).fit(split.test), dataset=dataset,
                split_settings=split.settings, fold="test")
    assert load_bundle(target).spec.method == "weighted"


_WRITER = """
import sys
from xrec.blend import Blend
from xrec.bundle import save_bundle
from xrec.data.demo import load_demo_shop
from xrec.sources import make_source
from xrec.split import split_dataset

dataset = load_demo_shop()
split = split_dataset(dataset, "leave_last", seed=0)
sources = {"pop": make_source("popularity").fit(split.test),
           "knn": make_source("item_knn", neighbors=1000).fit(split.test),  # ~12 MB to write
           "als": make_source("als", factors=64, iterations=1).fit(split.test)}
blend = Blend(sources, {"pop": 0.2, "knn": 1.0, "als": 1.0}).fit(split.test)
print("ready", flush=True)
while True:
    save_bundle(sys.argv[1], blend, dataset=dataset, split_settings=split.settings, fold="test")
"""


@pytest.mark.slow
def test_kill_9_while_writing_never_leaves_a_loadable_partial_bundle(tmp_path):
    script = tmp_path / "writer.py"
    script.write_text(_WRITER)
    target = tmp_path / "out" / "bundle"
    target.parent.mkdir()
    rng = np.random.default_rng(0)
    partial_seen = 0
    for attempt in range(6):
        env = {**os.environ, "PYTHONPATH": str(ROOT)}  # this checkout's xrec, whatever is installed
        proc = subprocess.Popen([sys.executable, str(script), str(target)], cwd=ROOT, env=env, stdout=subprocess.PIPE, text=True)
        assert proc.stdout.readline().strip() == "ready"
        if attempt % 2 == 0:  # kill at a random moment of the loop (the first time, after one write finished)
            deadline = time.monotonic() + 60
            while attempt == 0 and not target.exists() and time.monotonic() < deadline:
                time.sleep(0.01)
            time.sleep(float(rng.uniform(0.05, 1.5)))
        else:  # kill while a temporary folder is being filled
            deadline = time.monotonic() + 60
            while not any(p.name.endswith(".partial") for p in target.parent.iterdir()) and time.monotonic() < deadline:
                time.sleep(0.001)
            time.sleep(float(rng.uniform(0.0, 0.01)))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        proc.stdout.close()
        # once written, the target stays a complete, verified bundle whenever the writer dies
        expected = load_bundle(target).top_items(np.arange(50), 10)
        for leftover in target.parent.iterdir():
            if leftover == target:
                continue
            partial_seen += leftover.name.endswith(".partial")
            # a temporary folder of the killed write is refused; the one exception is the replaced
            # bundle in the instant between the swap and the removal of its manifest, which is whole
            try:
                whole = load_bundle(leftover)
            except BundleError:
                pass
            else:
                assert np.array_equal(whole.top_items(np.arange(50), 10), expected)
            shutil.rmtree(leftover)
    assert partial_seen >= 1  # the kills did land in the middle of writes


@pytest.mark.slow
def test_text_search_maps_a_query_as_the_source_maps_item_texts(shop, written):
    from sklearn.metrics.pairwise import cosine_similarity

    from xrec.sources.content import item_texts

    dataset, _, sources, _ = shop
    bundle = load_bundle(written)
    assert set(bundle.search_sources()) == {"text", "ridge"}
    texts = item_texts(dataset.catalog, ["name", "description"])
    rng = np.random.default_rng(0)
    picks = rng.choice(len(texts), 25, replace=False)
    items = sources["text"].item_factors_
    for j in picks:
        scores = bundle.query_scores("text", texts[j])
        # outside reference: scikit-learn's cosine of the item's own (centred) vector with every item
        assert np.allclose(scores, cosine_similarity(items[j : j + 1], items)[0], atol=1e-4)
        assert bundle.search_text(texts[j], 1, source="text")["item"].iloc[0] == dataset.catalog.item_ids[j]
    # through the ridge bridge a description finds images: its own item's image is in the top 10
    # far more often than chance (10 / n_items)
    texts_default = item_texts(dataset.catalog)
    hits = [dataset.catalog.item_ids[j] in set(bundle.search_text(texts_default[j], 10, source="ridge")["item"]) for j in picks]
    assert np.mean(hits) > 3 * 10 / len(texts)
    filtered = bundle.search_text("a small enamel pin", 5, filters={"attributes": {"product_type": "pin"}})
    assert len(filtered) == 5
    assert set(dataset.catalog.items.set_index("item").loc[filtered["item"], "product_type"]) == {"pin"}


@pytest.mark.slow
def test_cca_and_conse_bridges_restore_exactly_and_search(shop, cache_dir, tmp_path):
    from xrec.sources.content import item_texts

    dataset, split, sources, _ = shop
    bridges = fit_kinds(SLOW_BRIDGES, split.test, cache_dir)
    blend = Blend({"als": sources["als"], **bridges}, {"als": 1.0, "cca": 0.5, "conse": 0.5}).fit(split.test)
    save_bundle(tmp_path / "b", blend, dataset=dataset, split_settings=split.settings, fold="test")
    bundle = load_bundle(tmp_path / "b")
    users = np.arange(split.test.n_users)
    for name, src in bridges.items():
        assert np.array_equal(bundle.scorer.sources[name].score(users), src.score(users)), name
        probe = np.eye(384, dtype=np.float32)[:5]  # text-space inputs through each bridge's text side
        assert np.array_equal(bundle.scorer.sources[name].bridge_.transform_text(probe), src.bridge_.transform_text(probe))
    assert bundle.default_search_source() == "cca"
    texts = item_texts(dataset.catalog)
    picks = np.random.default_rng(1).choice(len(texts), 25, replace=False)
    hits = [dataset.catalog.item_ids[j] in set(bundle.search_text(texts[j], 10)["item"]) for j in picks]
    assert np.mean(hits) > 3 * 10 / len(texts)  # chance is 10 / n_items


def test_ranking_and_vectors_kinds_restore_exactly(tmp_path):
    dataset = small_dataset()
    split = split_dataset(dataset, "leave_last", seed=0)
    rng = np.random.default_rng(4)
    rows = [(u, f"i{j:02d}", float(8 - p)) for u in split.test.user_ids for p, j in enumerate(rng.choice(60, 8, replace=False))]
    pd.DataFrame(rows, columns=["user", "item", "score"]).to_csv(tmp_path / "ranking.csv", index=False)
    np.save(tmp_path / "vectors.npy", rng.normal(size=(60, 6)).astype(np.float32))
    (tmp_path / "ids.txt").write_text("\n".join(f"i{j:02d}" for j in range(60)) + "\n")
    sources = {
        "current": make_source("ranking", path=str(tmp_path / "ranking.csv")).fit(split.test),
        "mine": make_source("vectors", path=str(tmp_path / "vectors.npy"), ids=str(tmp_path / "ids.txt"), center=True).fit(split.test),
    }
    blend = Blend(sources, {"current": 1.0, "mine": 0.5}).fit(split.test)
    save_bundle(tmp_path / "b", blend, dataset=dataset, split_settings=split.settings, fold="test")
    (tmp_path / "ranking.csv").unlink()  # the bundle needs neither file
    (tmp_path / "vectors.npy").unlink()
    bundle = load_bundle(tmp_path / "b")
    users = np.arange(split.test.n_users)
    for name, src in sources.items():
        assert np.array_equal(bundle.scorer.sources[name].score(users), src.score(users)), name
    assert np.array_equal(bundle.scorer.score(users), blend.score(users))
