"""The main job, ``xrec demo``, end to end on the shipped demo shop."""

from __future__ import annotations

import json

import pytest

from xrec.data.demo import load_demo_shop
from xrec.demo import DEMO_SOURCES, run_demo
from xrec.runtime import load_blend


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo-out")
    summary = run_demo(out, progress=False)
    return out, summary


def test_demo_writes_scorecards_blend_file_and_report(demo):
    out, summary = demo
    for name in ("scorecards.json", "blend.toml", "report.html"):
        assert (out / name).is_file() and (out / name).stat().st_size > 0
    payload = json.loads((out / "scorecards.json").read_text(encoding="utf-8"))
    assert set(DEMO_SOURCES) | {"learned blend", "gated blend", "rank fusion"} <= set(payload["scorecards"])
    assert {row["taste"].split()[0] for row in payload["tastes"]} >= {"look", "theme", "spec", "circle"}
    html = (out / "report.html").read_text(encoding="utf-8")
    for heading in ("Which signal finds which taste", "Known vs new items", "Learned blend weights"):
        assert heading in html
    assert "<script src=\"http" not in html  # viewable offline


def test_demo_report_and_json_break_results_down_by_segment(demo):
    import numpy as np
    import pandas as pd

    out, _ = demo
    payload = json.loads((out / "scorecards.json").read_text(encoding="utf-8"))
    rows = pd.DataFrame(payload["by_segment"]["scorecards"])
    assert set(rows["by"]) == {"item_segment", "user_segment", "product_type"}
    for (by, scorer), block in rows.groupby(["by", "scorer"]):
        per_user = np.asarray(payload["scorecards"][scorer]["per_user"]["hit_rate@10"])
        assert block["n_users"].sum() == len(per_user)  # every test user in one segment
        # Size-weighted segment means give back the overall mean (the groupby identity; numpy as the reference).
        assert (block["mean"] * block["n_users"]).sum() / len(per_user) == pytest.approx(per_user.mean())
        assert (block["ci_low"].isna() == block["small"]).all()
    segs = pd.DataFrame(payload["by_segment"]["comparison"])
    assert {"learned blend", "gated blend"} == set(segs["candidate"]) and "p_holm_segments" in segs
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Results by segment (hit_rate@10)" in html and "Reading the segment panels" in html


def test_blend_file_reproduces_the_evaluated_rankings(demo):
    out, _ = demo
    # load_blend refits the sources and verifies the recorded top-10 digest; a mismatch raises.
    runtime = load_blend(out / "blend.toml", load_demo_shop())
    recs = runtime.recommend(runtime.user_ids[0], k=10)
    assert len(recs) == 10 and recs["rank"].tolist() == list(range(1, 11))


def test_demo_bundle_holds_the_same_blend_and_loads_without_data(demo):
    from xrec.blendfile import read_blend
    from xrec.bundle import load_bundle

    out, summary = demo
    assert summary["paths"]["bundle"] == str(out / "bundle")
    bundle = load_bundle(out / "bundle")  # verifies every file and the ranking digest, refits nothing
    assert bundle.spec.to_dict() == read_blend(out / "blend.toml").to_dict()
    recs = bundle.recommend(bundle.user_ids[0], 10)
    assert recs["item"].tolist() == load_blend(out / "blend.toml", load_demo_shop()).recommend(bundle.user_ids[0], 10)["item"].tolist()


def test_blend_beats_every_single_source(demo):
    _, summary = demo
    best = summary["vs_best_single"]["learned blend"]
    # The demo data plants tastes that no single signal sees in full: the learned blend must beat
    # the best single source (chosen on validation) with a paired 95% CI excluding zero.
    assert best["ci_low"] > 0, best
    singles = {name: summary["test"][name] for name in DEMO_SOURCES}
    assert summary["test"]["learned blend"] > max(singles.values())


def test_blend_file_of_another_shop_records_its_folder(tmp_path, monkeypatch):
    # The blend file's [dataset.load] used to say only "demo_shop", so `xrec recommend` on a
    # blend made with --shop loaded the shipped shop and failed its fingerprint check.
    from xrec.demo import _load_hints
    from xrec.errors import XrecError
    from xrec.experiment import load_spec_dataset
    from xrec.spec import parse_spec

    monkeypatch.chdir(tmp_path)
    assert _load_hints(None) == {"dataset": "demo_shop"}
    hints = _load_hints("my-shop")
    assert hints == {"dataset": "demo_shop", "folder": str(tmp_path / "my-shop")}
    spec = parse_spec({"data": hints, "sources": {"_": {"kind": "popularity"}}})
    with pytest.raises(XrecError, match="my-shop"):
        load_spec_dataset(spec)
