"""Plain-text and JSON reports: the chance level and the protocol follow the evaluation protocol."""

from __future__ import annotations

import json
from math import comb

import numpy as np
import pandas as pd
import pytest

from test_cli import _write_files_spec  # the tiny 40-item shop of the command-line tests
from xrec.cli import main
from xrec.data.catalog import Catalog
from xrec.evaluate import FullRanking, SampledNegatives, evaluate
from xrec.fold import Fold
from xrec.report import protocol_record, random_hit_rate


def _fold(n_items: int, seen_per_user: int, held_per_user: int, n_users: int = 3) -> Fold:
    rows, held = [], []
    for u in range(n_users):
        rows += [(u, j, 0.0, 1.0) for j in range(seen_per_user)]
        held += [(u, seen_per_user + j, 1.0, 1.0) for j in range(held_per_user)]
    cols = ["user_idx", "item_idx", "timestamp", "weight"]
    types = {"user_idx": "int64", "item_idx": "int64", "timestamp": "float64", "weight": "float32"}
    catalog = Catalog.from_ids([f"i{j}" for j in range(n_items)])
    users = np.array([f"u{u}" for u in range(n_users)])
    return Fold(catalog, users, pd.DataFrame(rows, columns=cols).astype(types), pd.DataFrame(held, columns=cols).astype(types))


def test_sampled_chance_is_k_over_negatives_plus_one():
    # Hand-worked: one held-out item among 100 negatives sits at each of the 101 positions of a
    # random order with equal probability, so P(rank <= 10) = 10/101 ~ 0.099 (common practice, no source).
    fold = _fold(n_items=1000, seen_per_user=20, held_per_user=1)
    assert random_hit_rate(fold, (10,), SampledNegatives(100, seed=0))[10] == pytest.approx(10 / 101, rel=1e-12)
    # Full ranking on the same fold: 10 among the 980 unseen items.
    assert random_hit_rate(fold, (10,))[10] == pytest.approx(10 / 980, rel=1e-12)
    assert random_hit_rate(fold, (10,), FullRanking())[10] == pytest.approx(10 / 980, rel=1e-12)


def test_sampled_chance_with_several_held_out_items_and_few_free_items():
    # 2 held-out items, only 30 - 10 - 2 = 18 free items (fewer than the 100 negatives asked):
    # miss probability C(18, 5) / C(20, 5) by direct counting (math.comb, elementary probability).
    fold = _fold(n_items=30, seen_per_user=10, held_per_user=2)
    assert random_hit_rate(fold, (5,), SampledNegatives(100))[5] == pytest.approx(1 - comb(18, 5) / comb(20, 5), rel=1e-12)


def test_sampled_chance_matches_the_evaluator_on_random_scores():
    # The evaluator's mean hit rate over many random score draws converges to the chance level.
    fold = _fold(n_items=300, seen_per_user=20, held_per_user=1, n_users=400)
    protocol = SampledNegatives(50, seed=1)
    rng = np.random.default_rng(0)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the sampled-protocol warning
        card = evaluate(rng.random((400, 300)), fold, ks=(5,), metrics=("hit_rate",), protocol=protocol)
    mean, expected = card.means()["hit_rate@5"], random_hit_rate(fold, (5,), protocol)[5]
    assert expected == pytest.approx(5 / 51)
    assert abs(mean - expected) < 4 * np.sqrt(expected * (1 - expected) / 400)  # binomial sd, 4 sigma


def test_protocol_record():
    assert protocol_record(FullRanking()) == {"name": "full_ranking"}
    assert protocol_record(SampledNegatives(100, seed=7)) == {"name": "sampled_negatives", "negatives": 100, "seed": 7}


def test_cli_prints_the_sampled_chance_and_json_records_the_protocol(tmp_path, capsys):
    spec = _write_files_spec(tmp_path)
    text = spec.read_text(encoding="utf-8").replace("ks = [5]", 'ks = [5]\nprotocol = "sampled"\nnegatives = 20\nseed = 3')
    spec.write_text(text, encoding="utf-8")
    with pytest.warns(UserWarning, match="sampled"):
        assert main(["run", str(spec), "-q"]) == 0
    out = capsys.readouterr().out
    # Each user holds out one item and has at least 20 free items, so 5 / 21 (see above).
    assert f"A random ranking expects HR@5 {5 / 21:.4f} (ranked among 20 sampled negatives)." in out
    with pytest.warns(UserWarning, match="sampled"):
        assert main(["run", str(spec), "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["protocol"] == {"name": "sampled_negatives", "negatives": 20, "seed": 3}
    assert payload["random_hit_rate"]["hit_rate@5"] == pytest.approx(5 / 21)
