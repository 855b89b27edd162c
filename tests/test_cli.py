"""The xrec command line on small specs: run, compare, export, recommend, errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from xrec.cli import main


def _write_files_spec(folder: Path, *, weights: str = "{ knn = 1.0, pop = 0.2 }", name: str = "tiny") -> Path:
    # A small hand-made shop: two taste groups with distinct item sets (behaviour test, not a reference).
    rows = []
    for u in range(40):
        group = u % 2
        items = [f"i{group * 20 + (u * 3 + j) % 20}" for j in range(8)]
        rows += [{"user": f"u{u}", "item": it, "timestamp": 1000 + u * 10 + j} for j, it in enumerate(items)]
    pd.DataFrame(rows).drop_duplicates(["user", "item"]).to_csv(folder / "events.csv", index=False)
    pd.DataFrame({"item": [f"i{j}" for j in range(40)], "kind": ["a" if j < 20 else "b" for j in range(40)]}).to_csv(
        folder / "items.csv", index=False
    )
    spec = folder / f"{name}.toml"
    spec.write_text(
        f"""
name = "{name}"
[data]
dataset = "files"
catalog = "items.csv"
interactions = "events.csv"
categorical = ["kind"]
[split]
rule = "leave_last"
[evaluate]
ks = [5]
baseline = "pop"
[sources.pop]
kind = "popularity"
[sources.knn]
kind = "item_knn"
neighbors = 10
[sources.kind]
kind = "attributes"
[blends.mix]
weights = {weights}
normalizer = "minmax"
""",
        encoding="utf-8",
    )
    return spec


def test_run_prints_scorecards_and_json(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    assert main(["run", str(spec), "-q"]) == 0
    out = capsys.readouterr().out
    assert "Scorecards" in out and "hit_rate@5" in out and "mix" in out and "Comparison vs 'pop'" in out
    assert main(["run", str(spec), "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert set(payload["scorecards"]) == {"pop", "knn", "kind", "mix"}
    cell = payload["scorecards"]["knn"]["hit_rate@5"]
    assert cell["ci_low"] <= cell["mean"] <= cell["ci_high"]
    assert payload["comparison"]["baseline"] == "pop"


def test_run_by_segments_prints_and_writes_the_tables(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    by = ["--by", "item_segment", "--by", "user_segment", "--by", "kind"]
    assert main(["run", str(spec), "-q", *by]) == 0
    out = capsys.readouterr().out
    assert "Results by segment (hit_rate@5" in out and "by item_segment:" in out and "by kind:" in out
    assert "Paired differences vs 'pop' by segment" in out
    assert main(["run", str(spec), "--json", *by]) == 0
    payload = json.loads(capsys.readouterr().out)
    rows = pd.DataFrame(payload["segments"])
    assert set(rows["by"]) == {"item_segment", "user_segment", "kind"}
    assert set(rows["scorer"]) == {"pop", "knn", "kind", "mix"}
    n_users = payload["scorecards"]["knn"]["n_users"]
    for _, block in rows[(rows["scorer"] == "knn") & (rows["metric"] == "hit_rate@5")].groupby("by"):
        assert block["n_users"].sum() == n_users  # every test user in exactly one segment
        # The segment means, weighted by size, give back the overall mean (pandas as the reference).
        overall = payload["scorecards"]["knn"]["hit_rate@5"]["mean"]
        assert (block["mean"] * block["n_users"]).sum() / n_users == pytest.approx(overall)
    assert set(rows.loc[rows["by"] == "kind", "segment"]) <= {"a", "b", "mixed"}
    seg = pd.DataFrame(payload["comparison"]["segments"])
    assert set(seg["by"]) == {"item_segment", "user_segment", "kind"} and "p_holm_segments" in seg
    assert main(["run", str(spec), "-q", "--by", "colour"]) == 2
    assert "catalog column" in capsys.readouterr().err


def test_export_then_recommend_round_trip(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    blend_path = tmp_path / "out" / "mix.toml"
    blend_path.parent.mkdir()
    assert main(["export", str(spec), "-o", str(blend_path), "-q"]) == 0
    assert blend_path.is_file()
    capsys.readouterr()
    assert main(["recommend", str(blend_path), "--user", "u1", "--user", "u2", "-k", "3", "--json", "-q"]) == 0
    recs = json.loads(capsys.readouterr().out)
    assert set(recs) == {"u1", "u2"} and all(len(v) == 3 for v in recs.values())
    events = pd.read_csv(tmp_path / "events.csv").query("user == 'u1'").sort_values("timestamp")
    train_u1 = set(events["item"].iloc[:-1])  # leave_last holds out the latest purchase
    assert not {r["item"] for r in recs["u1"]} & train_u1


def test_export_bundle_then_recommend_from_it_with_filters(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    folder = tmp_path / "mix-bundle"
    assert main(["export", str(spec), "--bundle", str(folder), "-q"]) == 0
    assert (folder / "manifest.json").is_file() and (folder / "blend.toml").is_file()
    capsys.readouterr()
    filters = json.dumps({"attributes": {"kind": "b"}})
    assert main(["recommend", str(folder), "--user", "u1", "-k", "4", "--filters", filters, "--json"]) == 0
    recs = json.loads(capsys.readouterr().out)["u1"]
    # u1 buys from the "a" half (i0..i19); the filter asks for "b" items (i20..i39) only
    assert len(recs) == 4 and all(int(r["item"][1:]) >= 20 for r in recs)
    assert main(["recommend", str(folder), "--user", "u1", "--filters", '{"attributes": {"kind": {"is": "b"}}}']) == 2
    assert "filters.attributes.kind.is" in capsys.readouterr().err
    assert main(["export", str(spec), "-q"]) == 2
    assert "--bundle" in capsys.readouterr().err


def test_compare_two_specs(tmp_path, capsys):
    a = _write_files_spec(tmp_path, weights="{ pop = 1.0 }", name="a")
    b = _write_files_spec(tmp_path, weights="{ knn = 1.0 }", name="b")
    assert main(["compare", str(a), str(b), "--json", "-q"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["candidates"] and payload["rows"]
    assert main(["compare", str(a), str(b), "-q", "--by", "user_segment"]) == 0
    assert "by segment" in capsys.readouterr().out


def test_errors_are_reported_without_traceback(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('[data]\ndataset = "nowhere"\n[sources.p]\nkind = "popularity"\n', encoding="utf-8")
    assert main(["run", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "data.dataset" in err and "Traceback" not in err
    assert main(["run", str(tmp_path / "missing.toml")]) == 2
    assert "no spec file" in capsys.readouterr().err


def test_help_everywhere():
    for args in ([], ["run"], ["compare"], ["export"], ["recommend"], ["demo"], ["serve"]):
        proc = subprocess.run([sys.executable, "-m", "xrec.cli", *args, "--help"], capture_output=True, text=True)
        assert proc.returncode == 0 and "usage: xrec" in proc.stdout


def test_export_checks_the_output_path_before_running(tmp_path, capsys, monkeypatch):
    # A missing folder used to surface as a FileNotFoundError traceback, after the whole run.
    import xrec.experiment

    spec = _write_files_spec(tmp_path)
    monkeypatch.setattr(xrec.experiment, "run_experiment", lambda *a, **k: pytest.fail("ran before checking the output"))
    assert main(["export", str(spec), "-o", str(tmp_path / "nowhere" / "mix.toml"), "-q"]) == 2
    err = capsys.readouterr().err
    assert "--output" in err and "does not exist" in err and "Traceback" not in err
    assert main(["export", str(spec), "-o", str(tmp_path), "-q"]) == 2
    assert "is a folder" in capsys.readouterr().err


def test_recommend_finds_moved_csv_files_with_data(tmp_path, capsys):
    # --data used to be ignored for CSV ("files") datasets: the recorded paths were read anyway.
    spec = _write_files_spec(tmp_path)
    blend_path = tmp_path / "mix.toml"
    assert main(["export", str(spec), "-o", str(blend_path), "-q"]) == 0
    moved = tmp_path / "moved"
    moved.mkdir()
    for name in ("events.csv", "items.csv"):
        (tmp_path / name).rename(moved / name)
    capsys.readouterr()
    assert main(["recommend", str(blend_path), "--user", "u1", "-k", "3", "--json", "-q"]) == 2
    assert "file not found" in capsys.readouterr().err
    assert main(["recommend", str(blend_path), "--user", "u1", "-k", "3", "--json", "-q", "--data", str(moved)]) == 0
    assert len(json.loads(capsys.readouterr().out)["u1"]) == 3


def test_recommend_rejects_k_below_one_before_loading(tmp_path, capsys):
    # The blend file does not even exist: -k is checked before any refit.
    assert main(["recommend", str(tmp_path / "absent.toml"), "--user", "u1", "-k", "0"]) == 2
    assert "-k: must be at least 1" in capsys.readouterr().err


def test_recommend_unknown_user_error_or_popular_list(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    blend_path = tmp_path / "mix.toml"
    assert main(["export", str(spec), "-o", str(blend_path), "-q"]) == 0
    capsys.readouterr()
    assert main(["recommend", str(blend_path), "--user", "stranger", "-q"]) == 2
    assert "unknown user 'stranger'" in capsys.readouterr().err
    assert main(["recommend", str(blend_path), "--user", "stranger", "--unknown", "popular", "-k", "4", "--json", "-q"]) == 0
    recs = json.loads(capsys.readouterr().out)["stranger"]
    counts = pd.read_csv(tmp_path / "events.csv")["item"].value_counts()
    # The fallback list is the most-bought items (counted on the training rows, so compare loosely:
    # every listed item is among the catalogue's best sellers).
    assert len(recs) == 4 and all(counts[r["item"]] >= counts.iloc[9] for r in recs)


def test_run_on_a_mixed_split_prints_known_and_new_parts(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    text = spec.read_text(encoding="utf-8").replace('rule = "leave_last"', 'rule = "mixed_last"\nnew_share = 0.25')
    text += '[blends.gated]\nsources = ["pop", "knn", "kind"]\nweights = "learn"\ngated = true\nobjective = "sides"\nmetric = "ndcg@5"\n'
    spec.write_text(text, encoding="utf-8")
    assert main(["run", str(spec), "-q"]) == 0
    out = capsys.readouterr().out
    assert "Known items and new items" in out and "new items (n=" in out and "gated band weights (objective" in out
    assert main(["run", str(spec), "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    result = run_experiment(load_spec(spec))
    fold = result.split.test
    # the parts by pandas: a user is on the new side when the held-out item has no training row
    trained = set(fold.train["item_idx"])
    side = fold.heldout.groupby("user_idx")["item_idx"].agg(lambda s: "new items" if not set(s) & trained else "known items")
    assert payload["known_new"]["counts"] == side.value_counts().to_dict()
    rows = pd.DataFrame(payload["known_new"]["rows"])
    per_user = result.scorecards["knn"].per_user.set_index("user")["hit_rate@5"]
    expected = per_user.groupby(side.reindex(per_user.index)).mean()  # pandas groupby of the per-user table
    got = rows[(rows["scorer"] == "knn") & (rows["metric"] == "hit_rate@5")].set_index("part")["mean"]
    assert got.to_dict() == pytest.approx(expected.to_dict())
    assert set(payload["known_new"]["comparisons"]) == set(side.unique())
    assert payload["learned"]["gated"]["bands"]["objective"] == "sides"


def test_spec_key_by_breaks_results_down_and_the_flag_replaces_it(tmp_path, capsys):
    import tomllib

    import tomli_w

    spec = _write_files_spec(tmp_path)
    table = tomllib.loads(spec.read_text(encoding="utf-8"))
    table["evaluate"]["by"] = ["item_segment", "kind"]
    keyed = tmp_path / "keyed.toml"
    keyed.write_bytes(tomli_w.dumps(table).encode("utf-8"))
    assert main(["run", str(keyed), "--json"]) == 0
    from_key = json.loads(capsys.readouterr().out)
    assert main(["run", str(spec), "--json", "--by", "item_segment", "--by", "kind"]) == 0
    from_flags = json.loads(capsys.readouterr().out)
    assert from_key["segments"] == from_flags["segments"] and from_key["comparison"] == from_flags["comparison"]
    assert main(["run", str(keyed), "--json", "--by", "user_segment"]) == 0
    assert {r["by"] for r in json.loads(capsys.readouterr().out)["segments"]} == {"user_segment"}
    assert main(["compare", str(keyed), str(keyed), "--json"]) == 0  # the baseline spec's list
    assert {r["by"] for r in json.loads(capsys.readouterr().out)["segments"]} == {"item_segment", "kind"}
    table["evaluate"]["by"] = "kind"
    keyed.write_bytes(tomli_w.dumps(table).encode("utf-8"))
    assert main(["run", str(keyed), "-q"]) == 2
    assert "evaluate.by" in capsys.readouterr().err
