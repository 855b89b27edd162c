"""Cut-offs and list lengths are bounded by the catalog before any (users, K) array is made.

Policy: a K larger than the catalog is refused (never clamped) with a ConfigError naming the field:
``evaluate.ks``, a learned blend's ``metric``, ``evaluate(ks=...)``, ``recommend(k=...)``, the
command line's ``-k`` and a blend file's ``check.k`` / ``check.users``.
"""

from __future__ import annotations

import numpy as np
import pytest
import tomli_w
import tomllib

from test_cli import _write_files_spec  # the tiny 40-item shop of the command-line tests
from xrec.cli import main
from xrec.errors import ConfigError

HUGE = 100_000_000  # would need users × HUGE × 8 bytes (32 GB for 40 users) if it were allocated


@pytest.fixture
def no_fit(monkeypatch):
    """Fail the test if any source is fitted (the check must come first)."""
    import xrec.experiment

    def refuse(name, source, fold):
        raise AssertionError(f"source {name} fitted before the size check")

    monkeypatch.setattr(xrec.experiment, "fit_source", refuse)


@pytest.mark.parametrize("k", [41, HUGE])
def test_spec_cutoff_longer_than_catalog_is_refused_before_fitting(tmp_path, k, no_fit):
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    path = _write_files_spec(tmp_path)
    path.write_text(path.read_text(encoding="utf-8").replace("ks = [5]", f"ks = [5, {k}]"), encoding="utf-8")
    with pytest.raises(ConfigError, match=rf"evaluate\.ks: cut-off\(s\) \[{k}\] exceed the catalog's 40 items"):
        run_experiment(load_spec(path))


def test_learned_blend_metric_cutoff_is_bounded(tmp_path, no_fit):
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    path = _write_files_spec(tmp_path)
    text = path.read_text(encoding="utf-8") + f'[blends.learned]\nweights = "learn"\nmetric = "ndcg@{HUGE}"\n'
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match=r"blends\.learned\.metric: cut-off\(s\) \[100000000\] exceed the catalog's 40"):
        run_experiment(load_spec(path))


def test_evaluate_refuses_a_cutoff_longer_than_the_catalog():
    from xrec.evaluate import evaluate
    from xrec.fold import Fold
    from xrec.data.catalog import Catalog
    import pandas as pd

    frame = pd.DataFrame({"user_idx": [0, 0], "item_idx": [0, 1], "timestamp": [0.0, 1.0], "weight": np.float32(1)})
    fold = Fold(Catalog.from_ids(["a", "b", "c"]), np.array(["u"]), frame.iloc[:1], frame.iloc[1:])
    scores = np.zeros((1, 3), dtype=np.float32)
    assert evaluate(scores, fold, ks=(3,)).ks == (3,)  # the whole catalog is allowed
    with pytest.raises(ConfigError, match=r"^ks: cut-off\(s\) \[4\] exceed the catalog's 3 items"):
        evaluate(scores, fold, ks=(1, 4))


@pytest.fixture
def exported(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    blend_path = tmp_path / "mix.toml"
    assert main(["export", str(spec), "-o", str(blend_path), "-q"]) == 0
    capsys.readouterr()
    return blend_path


def test_recommend_k_is_bounded_on_the_command_line_before_the_refit(exported, capsys, monkeypatch):
    import xrec.runtime

    def refuse(*args, **kwargs):
        raise AssertionError("the blend was refitted before -k was checked")

    monkeypatch.setattr(xrec.runtime, "runtime_for_blend_file", refuse)
    assert main(["recommend", str(exported), "--user", "u1", "-k", "1000000000", "-q"]) == 2
    assert "-k: 1000000000 exceeds the catalog's 40 items" in capsys.readouterr().err


def test_runtime_recommend_k_is_bounded(exported):
    from xrec.experiment import runtime_for_blend_file

    runtime = runtime_for_blend_file(exported)
    assert len(runtime.recommend("u1", k=40)) <= 40
    for call in (lambda: runtime.recommend("u1", k=HUGE), lambda: runtime.top_items(np.array([0]), k=41)):
        with pytest.raises(ConfigError, match=r"^k: .* exceeds the catalog's 40 items"):
            call()


@pytest.mark.parametrize(("key", "value", "limit"), [("k", HUGE, "40 items"), ("users", HUGE, "40 users"), ("k", 41, "40 items")])
def test_blend_file_check_sizes_are_bounded_before_the_refit(exported, key, value, limit, monkeypatch):
    import xrec.runtime
    from xrec.blendfile._seal import seal, unseal
    from xrec.data.location import DataLocation, load_dataset

    raw = tomllib.loads(unseal(exported.read_text(encoding="utf-8"), "f"))
    raw["check"][key] = value
    # Without the recorded sizes the reader cannot bound it; the runtime bounds it by the data.
    del raw["split"]["record"]["n_items"], raw["split"]["record"]["n_users"]
    exported.write_text(seal(tomli_w.dumps(raw)), encoding="utf-8")

    def refuse(*args, **kwargs):
        raise AssertionError("sources refitted before the check table was bounded")

    monkeypatch.setattr(xrec.runtime, "_fit", refuse)
    dataset = load_dataset(DataLocation.from_hints(raw["dataset"]["load"]))
    with pytest.raises(ConfigError, match=rf"check\.{key}: {value} exceeds the {limit}"):
        xrec.runtime.load_blend(exported, dataset)


def test_blend_file_check_sizes_are_bounded_by_the_recorded_split_on_reading(exported):
    from xrec.blendfile import read_blend
    from xrec.blendfile._seal import seal, unseal

    raw = tomllib.loads(unseal(exported.read_text(encoding="utf-8"), "f"))
    raw["check"]["k"] = HUGE
    exported.write_text(seal(tomli_w.dumps(raw)), encoding="utf-8")
    with pytest.raises(ConfigError, match=r"check\.k: 100000000 exceeds split\.record\.n_items = 40"):
        read_blend(exported)


def test_blend_engine_refuses_a_cutoff_longer_than_the_catalog():
    from _synthetic import FixedScores, pairs_frame, synthetic_fold

    from xrec.blend.engine import BlendEngine

    fold = synthetic_fold(3, 5, pairs_frame([(0, 0), (1, 1), (2, 2)]), pairs_frame([(0, 1), (1, 2), (2, 3)]))
    source = FixedScores(np.arange(15, dtype=np.float32).reshape(3, 5)).fit(fold)
    with pytest.raises(ConfigError, match=r"^ks: cut-off\(s\) \[100000000\] exceed the catalog's 5 items"):
        BlendEngine({"s": source}, fold, "none", ks=(5, HUGE), metric="ndcg@5").prepare()


def test_chunked_and_candidate_evaluators_refuse_a_cutoff_longer_than_the_catalog():
    from xrec.evaluate import evaluate_blend_chunked, evaluate_candidates
    from xrec.evaluate._synthetic_scale import make_scale_problem

    p = make_scale_problem(30, 50, 4, seed=1)
    for run in (evaluate_blend_chunked, evaluate_candidates):
        with pytest.raises(ConfigError, match=r"^ks: cut-off\(s\) \[100000000\] exceed the catalog's 50 items"):
            run(p.sources, p.weights, p.train, p.heldout, ks=(10, HUGE))
