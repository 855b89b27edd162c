"""evaluate / evaluate_blocks / Scorecard: inputs, chunking, protocols, round trips."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import tomli_w

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.evaluate import SampledNegatives, Scorecard, evaluate, evaluate_blocks
from xrec.fold import Fold


def make_fold(n_users=120, n_items=90, seed=0, settings=None) -> Fold:
    rng = np.random.default_rng(seed)
    catalog = Catalog.from_frame(pd.DataFrame({"item": [f"i{j}" for j in range(n_items)]}))
    train, held = [], []
    for u in range(n_users):
        items = rng.choice(n_items, size=int(rng.integers(2, 12)), replace=False)
        n_held = 0 if u % 17 == 5 else int(rng.integers(1, 4))  # some users have nothing held out
        for j, i in enumerate(items):
            (held if j < n_held else train).append((u, int(i), j, 1.0))
    cols = ["user_idx", "item_idx", "timestamp", "weight"]
    return Fold(
        catalog=catalog,
        user_ids=np.array([f"u{u}" for u in range(n_users)]),
        train=pd.DataFrame(train, columns=cols),
        heldout=pd.DataFrame(held, columns=cols),
        settings=settings if settings is not None else {"rule": "by hand", "seed": seed, "note": None},
    )


class Scores:
    """A scorer object with .score(users), like a source or a blend."""

    def __init__(self, matrix):
        self.matrix = matrix
        self.calls: list[int] = []

    def score(self, users):
        self.calls.append(len(users))
        return self.matrix[np.asarray(users)]


@pytest.fixture(scope="module")
def fold():
    return make_fold()


@pytest.fixture(scope="module")
def scores(fold):
    rng = np.random.default_rng(1)
    return rng.integers(0, 6, (fold.n_users, fold.n_items)).astype(np.float32)  # many ties


def test_chunked_equals_unchunked_exactly_for_every_scorer_kind(fold, scores):
    ks = (1, 5, 20)
    whole = evaluate(scores, fold, ks=ks, chunk_size=10_000)
    obj = Scores(scores)
    for scorer in (scores, obj, lambda users: scores[users]):
        for chunk in (1, 7, 64):
            card = evaluate(scorer, fold, ks=ks, chunk_size=chunk)
            pd.testing.assert_frame_equal(card.per_user, whole.per_user)
            assert card.list_metrics == whole.list_metrics
    assert max(obj.calls) <= 64  # blocks were requested chunk by chunk


def test_default_users_and_columns(fold, scores):
    card = evaluate(scores, fold, ks=(5, 10))
    np.testing.assert_array_equal(card.users, fold.eval_users)
    assert card.n_users == len(fold.eval_users) < fold.n_users
    assert card.metric_columns == [f"{m}@{k}" for m in ("hit_rate", "ndcg", "recall", "mrr", "popularity") for k in (5, 10)]
    assert set(card.list_metrics) == {"coverage@5", "coverage@10", "popularity@5", "popularity@10"}
    assert card.fold_settings["rule"] == "by hand"
    assert card.protocol == {"kind": "full_ranking"}


def test_coverage_and_popularity_against_direct_computation(fold, scores):
    k = 5
    card = evaluate(scores, fold, ks=(k,), metrics=("coverage", "popularity"))
    assert card.metric_columns == [f"popularity@{k}"]
    seen = fold.train_matrix.toarray() > 0
    counts = fold.item_train_counts
    listed, pops = set(), []
    for u in fold.eval_users:
        cand = [j for j in range(fold.n_items) if not seen[u, j]]
        top = sorted(cand, key=lambda j: (-scores[u, j], j))[:k]
        listed.update(top)
        pops.append(counts[top].mean())
    assert card.list_metrics[f"coverage@{k}"] == pytest.approx(len(listed) / fold.n_items)
    np.testing.assert_allclose(card.per_user[f"popularity@{k}"], pops)
    assert card.list_metrics[f"popularity@{k}"] == pytest.approx(np.mean(pops))


def test_oracle_scorer_is_perfect(fold):
    truth = fold.heldout_matrix.toarray()
    card = evaluate(truth.astype(np.float32), fold, ks=(3,), metrics=("hit_rate", "ndcg", "mrr"))
    assert (card.per_user[["hit_rate@3", "ndcg@3", "mrr@3"]] == 1.0).all().all()


def test_explicit_users_keep_their_order(fold, scores):
    users = fold.eval_users[::-1][:10]
    card = evaluate(scores, fold, users=users, chunk_size=3)
    np.testing.assert_array_equal(card.users, users)
    full = evaluate(scores, fold).per_user.set_index("user")
    np.testing.assert_allclose(card.per_user.set_index("user").loc[users, "ndcg@10"], full.loc[users, "ndcg@10"])


@pytest.mark.parametrize(
    "kwargs, error, words",
    [
        ({"ks": (0,)}, ConfigError, "ks"),
        ({"ks": (10, -2)}, ConfigError, "-2"),
        ({"metrics": ("ndcg", "precision", "auc")}, ConfigError, "precision"),
        ({"chunk_size": 0}, ConfigError, "chunk_size"),
        ({"protocol": "sampled"}, ConfigError, "protocol"),
        ({"users": np.array([0, 0])}, DataError, "repeated"),
        ({"users": np.array([10_000])}, DataError, "out of range"),
        ({"users": np.array([5])}, DataError, "no held-out"),
    ],
)
def test_bad_arguments_are_named(fold, scores, kwargs, error, words):
    with pytest.raises(error, match=words):
        evaluate(scores, fold, **kwargs)


def test_shape_mismatches_are_reported(fold, scores):
    with pytest.raises(DataError, match="shape"):
        evaluate(scores[:, :-1], fold)
    with pytest.raises(DataError, match="returned shape"):
        evaluate(lambda users: scores[users][:, :10], fold)
    with pytest.raises(ConfigError, match="scorer"):
        evaluate("not a scorer", fold)
    with pytest.raises(DataError, match="shape"):
        evaluate_blocks(lambda u: scores[u], fold.train_matrix, fold.heldout_matrix[:, :5])


def test_evaluate_blocks_without_a_fold(fold, scores):
    a = evaluate(scores, fold, ks=(10,))
    b = evaluate_blocks(
        lambda u: scores[u], fold.train_matrix, fold.heldout_matrix, ks=10, item_counts=fold.item_train_counts, name="x"
    )
    pd.testing.assert_frame_equal(a.per_user, b.per_user)


def test_sampled_protocol_warns_and_is_recorded(fold, scores):
    with pytest.warns(UserWarning, match="Krichene"):
        card = evaluate(scores, fold, protocol=SampledNegatives(20, seed=1), chunk_size=13)
    assert card.protocol == {"kind": "sampled_negatives", "n_negatives": 20, "seed": 1}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        again = evaluate(scores, fold, protocol=SampledNegatives(20, seed=1), chunk_size=1000)
    pd.testing.assert_frame_equal(card.per_user, again.per_user)
    full = evaluate(scores, fold)
    # fewer candidates can only improve ranks, so sampled hit rate >= full hit rate per user
    assert (card.per_user["hit_rate@10"].to_numpy() >= full.per_user["hit_rate@10"].to_numpy()).all()


def test_scorecard_round_trips_through_json_and_toml(fold, scores):
    card = evaluate(scores, fold, ks=(5, 10), name="ties")
    d = card.to_dict()

    def only_plain(x):
        if isinstance(x, dict):
            return all(isinstance(k, str) and only_plain(v) for k, v in x.items())
        if isinstance(x, list):
            return all(only_plain(v) for v in x)
        return isinstance(x, (str, int, float)) and x is not None

    assert only_plain(d)
    assert "note" not in d["fold_settings"]  # None values are dropped
    back = Scorecard.from_dict(json.loads(json.dumps(d)))
    pd.testing.assert_frame_equal(back.per_user, card.per_user)
    assert back.list_metrics == card.list_metrics and back.ks == card.ks and back.protocol == card.protocol
    tomli_w.dumps(d)  # TOML-writable as is
    with pytest.raises(ConfigError, match="per_user"):
        Scorecard.from_dict({"name": "x"})


def test_summary_interval_brackets_the_mean_and_is_seeded(fold, scores):
    card = evaluate(scores, fold, ks=(10,))
    s = card.summary(confidence=0.9, seed=3)
    assert list(s.columns) == ["mean", "ci_low", "ci_high", "n_users"]
    per = s.loc["ndcg@10"]
    assert per["ci_low"] <= per["mean"] <= per["ci_high"]
    assert per["mean"] == pytest.approx(card.per_user["ndcg@10"].mean())
    pd.testing.assert_frame_equal(s, card.summary(confidence=0.9, seed=3))
    assert np.isnan(s.loc["coverage@10", "ci_low"])
    # Percentile bootstrap of a mean vs the normal-theory interval (CLT; common practice,
    # no source): widths agree within 20 % at this sample size.
    v = card.per_user["hit_rate@10"].to_numpy()
    width = s.loc["hit_rate@10", "ci_high"] - s.loc["hit_rate@10", "ci_low"]
    assert width == pytest.approx(2 * 1.6449 * v.std(ddof=1) / np.sqrt(len(v)), rel=0.2)
    with pytest.raises(ConfigError):
        card.summary(confidence=1.5)


def test_repr_and_html(fold, scores):
    card = evaluate(scores, fold, ks=(5, 10), name="ties")
    text = repr(card)
    assert "ties" in text and "ndcg" in text and "@10" in text and "full ranking" in text
    assert "<table" in card._repr_html_()
