"""Experiment specs: validation names the field; learned, gated and fusion blends run."""

from __future__ import annotations

import pytest

from xrec.errors import ConfigError
from xrec.experiment import run_experiment
from xrec.spec import builtin_specs, load_spec, parse_spec

from test_cli import _write_files_spec


def _raw(**blend):
    return {
        "data": {"dataset": "movielens"},
        "sources": {"a": {"kind": "popularity"}, "b": {"kind": "item_knn"}},
        "blends": {"mix": blend},
    }


@pytest.mark.parametrize(
    ("blend", "field"),
    [
        ({"weights": {"a": 1.0}, "fusion": "rrf"}, "blends.mix: give either"),
        ({}, "blends.mix: needs 'weights'"),
        ({"fusion": "vote"}, "blends.mix.fusion"),
        ({"weights": {"zzz": 1.0}}, "blends.mix.weights.zzz"),
        ({"weights": {"a": "heavy"}}, "blends.mix.weights.a"),
        ({"weights": "learn", "method": "guess"}, "blends.mix.method"),
        ({"weights": {"a": 1.0}, "gated": True}, "blends.mix.gated"),
        ({"weights": "learn", "sources": ["a", "nope"]}, "blends.mix.sources"),
        ({"weights": {"a": 1.0}, "colour": "red"}, "blends.mix: unknown key"),
    ],
)
def test_bad_blend_tables_name_the_field(blend, field):
    with pytest.raises(ConfigError, match=field.replace(".", r"\.")):
        parse_spec(_raw(**blend))


def test_learning_needs_a_validation_split():
    raw = _raw(weights="learn")
    raw["split"] = {"validation": False}
    with pytest.raises(ConfigError, match="validation split"):
        parse_spec(raw)


def test_other_spec_errors():
    with pytest.raises(ConfigError, match="sources: at least one"):
        parse_spec({"data": {"dataset": "movielens"}})
    with pytest.raises(ConfigError, match="evaluate.ks"):
        parse_spec({**_raw(weights={"a": 1.0}), "evaluate": {"ks": [0]}})
    with pytest.raises(ConfigError, match="evaluate.baseline"):
        parse_spec({**_raw(weights={"a": 1.0}), "evaluate": {"baseline": "nobody"}})
    with pytest.raises(ConfigError, match="data.catalog"):
        parse_spec({"data": {"dataset": "files"}, "sources": {"a": {"kind": "popularity"}}})


def test_builtin_specs_parse():
    assert {"movielens", "movielens_fusion", "movielens_text"} <= set(builtin_specs())
    for name in builtin_specs():
        assert load_spec(name).sources


def test_learned_gated_and_fusion_blends_run(tmp_path):
    spec_path = _write_files_spec(tmp_path)
    text = spec_path.read_text(encoding="utf-8").split("[blends.mix]")[0]
    text += """
[blends.learned]
weights = "learn"
metric = "hit_rate@5"
[blends.gated]
weights = "learn"
gated = true
sources = ["pop", "knn"]
[blends.rrf]
fusion = "rrf"
k = 10
"""
    spec_path.write_text(text, encoding="utf-8")
    result = run_experiment(load_spec(spec_path))
    assert {"learned", "gated", "rrf"} <= set(result.scorecards)
    learned = result.extras["learned"]["learned"]
    assert learned["metric"] == "hit_rate@5" and abs(sum(learned["weights"].values()) - 1) < 1e-6
    # The search includes each source alone, so its validation score is never below the best one's.
    assert learned["validation"] >= learned["best_single_validation"] - 1e-12
    assert set(result.extras["learned"]["gated"]["band_weights"]) == {"new", "tail", "head"}
    assert result.scorers["rrf"].get_params()["k"] == 10
