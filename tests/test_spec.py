"""Experiment specs: validation names the field; learned, gated and fusion blends run."""

from __future__ import annotations

import pandas as pd
import pytest

from xrec.errors import ConfigError, DataError
from xrec.experiment import compare_specs, run_experiment
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
        ({"fusion": "rrf", "normalizer": "zscore"}, "blends.mix.normalizer"),
        ({"fusion": "combsum", "depth": 10}, "blends.mix.depth"),
        ({"fusion": "combmnz", "k": 60}, "blends.mix.k"),
        ({"weights": {"a": 1.0}, "k": 60}, "blends.mix: 'k' and 'depth'"),
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


@pytest.mark.parametrize(
    ("evaluate", "blend", "field"),
    [
        ({"chunk_size": "big"}, None, "evaluate.chunk_size"),
        ({"negatives": 0, "protocol": "sampled"}, None, "evaluate.negatives"),
        ({"seed": 1.5}, None, "evaluate.seed"),
        ({"metrics": "ndcg"}, None, "evaluate.metrics"),
        ({"metrics": ["ndgc"]}, None, "evaluate.metrics"),
        ({}, {"weights": "learn", "metric": 10}, "blends.mix.metric"),
        ({}, {"weights": "learn", "seed": "a"}, "blends.mix.seed"),
    ],
)
def test_evaluate_and_learning_settings_are_checked_when_parsed(evaluate, blend, field):
    # Before: ValueError / AttributeError tracebacks (or a metric list split into letters),
    # raised only after every source was fitted.
    raw = {**_raw(**(blend or {"weights": {"a": 1.0}})), "evaluate": evaluate}
    with pytest.raises(ConfigError, match=field.replace(".", r"\.")):
        parse_spec(raw)


def _tiny_files(folder, ids, item_ids=None):
    # Three users, four items each, leave-last split (behaviour test, not a reference).
    folder.mkdir(exist_ok=True)
    items = item_ids or ids
    rows = [{"user": f"u{u}", "item": items[(u + j) % len(items)], "timestamp": 10 * u + j} for u in range(3) for j in range(4)]
    pd.DataFrame(rows).to_csv(folder / "events.csv", index=False)
    pd.DataFrame({"item": ids}).to_csv(folder / "items.csv", index=False)
    spec = folder / "spec.toml"
    spec.write_text(
        '[data]\ndataset = "files"\ncatalog = "items.csv"\ninteractions = "events.csv"\n'
        '[evaluate]\nks = [2]\n[sources.pop]\nkind = "popularity"\n',
        encoding="utf-8",
    )
    return spec


def test_item_ids_with_leading_zeros_match_between_catalog_and_interactions(tmp_path):
    # The catalog's id column used to be parsed as numbers ("007" -> 7) while the interactions'
    # was read as text, so every interaction named an item "not in the catalog".
    spec = _tiny_files(tmp_path, ["001", "002", "003", "004", "005", "006"])
    result = run_experiment(load_spec(spec))
    assert list(result.dataset.catalog.item_ids) == ["001", "002", "003", "004", "005", "006"]
    assert result.scorecards["pop"].n_users == 3


def test_unreadable_csv_is_a_data_error(tmp_path):
    spec = _tiny_files(tmp_path, ["a", "b", "c", "d", "e"])
    (tmp_path / "events.csv").write_text("", encoding="utf-8")
    with pytest.raises(DataError, match=r"data\.interactions: cannot read"):
        run_experiment(load_spec(spec))


def test_compare_specs_reads_each_specs_own_files(tmp_path):
    # Two specs with the same relative paths in different folders name different data; the
    # candidate used to be run on the baseline's data (and compared with itself).
    a = _tiny_files(tmp_path / "a", ["a", "b", "c", "d", "e"])
    b = _tiny_files(tmp_path / "b", ["a", "b", "c", "d", "e", "f"])
    with pytest.raises(ConfigError, match="different data"):
        compare_specs(load_spec(a), load_spec(b))


def test_only_fits_and_evaluates_one_scorer_and_what_it_blends(tmp_path, monkeypatch):
    import xrec.experiment

    spec = load_spec(_write_files_spec(tmp_path))  # sources pop, knn, kind; blend mix = knn + pop
    fitted: list[str] = []
    build = xrec.experiment.build_sources

    def counting_build(*args, **kwargs):
        sources = build(*args, **kwargs)
        for name, source in sources.items():
            fit = source.fit
            source.fit = lambda fold, _fit=fit, _name=name: (fitted.append(_name), _fit(fold))[1]
        return sources

    monkeypatch.setattr(xrec.experiment, "build_sources", counting_build)
    full = run_experiment(spec)
    assert sorted(fitted) == ["kind", "knn", "pop"]
    fitted.clear()
    mix = run_experiment(spec, only="mix")
    assert sorted(fitted) == ["knn", "pop"] and set(mix.scorecards) == {"mix"} and mix.comparison is None
    # the same numbers as in the full run: one scorer's evaluation does not depend on the others
    assert mix.scorecards["mix"].means() == full.scorecards["mix"].means()
    fitted.clear()
    assert set(run_experiment(spec, only="kind").scorecards) == {"kind"} and fitted == ["kind"]
    with pytest.raises(ConfigError, match="no source or blend named 'mixx'"):
        run_experiment(spec, only="mixx")


def test_a_spec_path_that_is_a_folder_or_device_is_said_for_what_it_is(tmp_path):
    # Used to read "no spec file ... and no built-in spec of that name" for both.
    with pytest.raises(ConfigError, match="is a folder, not a spec file") as err:
        load_spec(tmp_path)
    assert "no spec file" not in str(err.value)
    with pytest.raises(ConfigError, match="/dev/null is a character device"):
        load_spec("/dev/null")


def test_files_spec_reads_na_as_text_one_column_names_and_says_what_a_path_is(tmp_path):
    # Before: "NA"/"null"/"None" brands were read as missing and refused (the message showed nan),
    # categorical = "brand" became the columns ['b','r','a','n','d'], and a folder given as the
    # catalog was reported as "file not found".
    from xrec.experiment import load_spec_dataset

    spec = _tiny_files(tmp_path, ["a", "b", "c", "d", "e"])
    pd.DataFrame({"item": list("abcde"), "brand": ["NA", "null", "None", "acme", "NA"]}).to_csv(tmp_path / "items.csv", index=False)
    text = spec.read_text(encoding="utf-8").replace('interactions = "events.csv"\n', 'interactions = "events.csv"\ncategorical = "brand"\n')
    spec.write_text(text, encoding="utf-8")
    dataset = load_spec_dataset(load_spec(spec))
    assert dataset.catalog.schema.categorical == ("brand",)
    assert dataset.catalog.items["brand"].tolist() == ["NA", "null", "None", "acme", "NA"]
    (tmp_path / "items.csv").write_text("item,brand\na,NA\nb,\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"row 2: item='b', brand=<empty>") as err:
        load_spec_dataset(load_spec(spec))
    assert "nan" not in str(err.value)
    (tmp_path / "items.csv").unlink()
    (tmp_path / "items.csv").mkdir()
    with pytest.raises(ConfigError, match="is a folder") as err:
        load_spec_dataset(load_spec(spec))
    assert "not found" not in str(err.value)
