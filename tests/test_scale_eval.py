"""Chunked full-ranking blend evaluation and the certified candidate mode."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from xrec.blend import Blend
from xrec.errors import ConfigError, DataError
from xrec.evaluate import evaluate, evaluate_blend_chunked, evaluate_candidates, top_n_items
from xrec.evaluate._factor_blend import item_moments, zscore_moments
from xrec.evaluate._synthetic_scale import make_scale_problem
from xrec.sources.collaborative import ItemKNNSource

KS = (5, 10)
METRICS = ("hit_rate", "ndcg", "recall", "mrr")


@pytest.fixture(scope="module")
def small():
    return make_scale_problem(400, 600, 25, heldout_per_user=2, seed=5)


@pytest.fixture(scope="module")
def wide():
    # One held-out item per user, so mrr@n_items = 1 / rank gives every exact rank.
    return make_scale_problem(600, 4000, 30, seed=8)


def _values(card):
    return card.per_user.drop(columns="user").to_numpy()


@pytest.mark.parametrize("normalizer", ["zscore", "none", "minmax", "rank"])
def test_chunked_equals_evaluate_blend(small, normalizer):
    card = evaluate_blend_chunked(small.sources, small.weights, small.train, small.heldout, normalizers=normalizer, ks=KS, chunk_size=97)
    ref = evaluate(Blend(small.sources, small.weights, normalizer).fit(small.fold), small.fold, ks=KS, metrics=METRICS)
    np.testing.assert_array_equal(card.per_user["user"], ref.per_user["user"])
    np.testing.assert_array_equal(_values(card), _values(ref))


def test_chunking_and_threads_do_not_change_results(small):
    args = (small.sources, small.weights, small.train, small.heldout)
    one = evaluate_blend_chunked(*args, ks=KS, chunk_size=400, threads=1)
    many = evaluate_blend_chunked(*args, ks=KS, chunk_size=33, threads=2)
    np.testing.assert_array_equal(_values(one), _values(many))


def test_sources_without_factors_are_scored_as_blocks(small):
    knn = ItemKNNSource(neighbors=20).fit(small.fold)
    sources = {"als": small.sources["als"], "knn": knn}
    weights = {"als": 1.0, "knn": 0.5}
    card = evaluate_blend_chunked(sources, weights, small.train, small.heldout, ks=KS, chunk_size=150)
    ref = evaluate(Blend(sources, weights).fit(small.fold), small.fold, ks=KS, metrics=METRICS)
    np.testing.assert_allclose(_values(card), _values(ref), atol=1e-12)


def test_zscore_moments_from_factors_match_scipy(small):
    src = small.sources["text"]
    users = np.arange(50)
    seen = small.train[users]
    mean, std = zscore_moments(src.user_factors_[users], src.item_factors_, *item_moments(src.item_factors_), seen)
    raw = src.score(users).astype(np.float64)
    for u in users:
        cand = np.setdiff1d(np.arange(small.n_items), seen[u].indices)
        # Reference: scipy.stats.zscore (population std, ddof=0) over the user's candidates.
        expected = scipy.stats.zscore(raw[u, cand])
        np.testing.assert_allclose((raw[u, cand] - mean[u]) / std[u], expected, rtol=1e-5, atol=1e-5)


def test_chunked_matches_trec_eval(small):
    pytrec_eval = pytest.importorskip("pytrec_eval")
    weights = {"als": 0.6, "text": 0.4, "image": 0.0, "popularity": 0.0}
    card = evaluate_blend_chunked(small.sources, weights, small.train, small.heldout, ks=KS)
    users = np.arange(0, small.n_users, 7)
    seen, truth = small.train, small.heldout
    # Blend recomputed in float64 from the z-score definition (mean and population std over
    # the user's candidates; common practice, no source), not with xrec's code.
    qrels, run = {}, {}
    for u in users:
        cand = np.setdiff1d(np.arange(small.n_items), seen[u].indices)
        blended = np.zeros(len(cand))
        for name, w in weights.items():
            if w:
                raw = small.sources[name].score(np.array([u]))[0, cand].astype(np.float64)
                blended += w * (raw - raw.mean()) / raw.std()
        qrels[f"q{u}"] = {f"d{i}": 1 for i in truth[u].indices}
        run[f"q{u}"] = {f"d{j}": float(s) for j, s in zip(cand, blended)}
    res = pytrec_eval.RelevanceEvaluator(qrels, {"ndcg_cut.5,10", "recall.5,10"}).evaluate(run)
    ours = card.per_user.set_index("user").loc[users]
    for k in KS:
        # Source: trec_eval measures ndcg_cut_K and recall_K via pytrec_eval (pytrec-eval-terrier)
        np.testing.assert_allclose(ours[f"ndcg@{k}"], [res[f"q{u}"][f"ndcg_cut_{k}"] for u in users], atol=1e-6)
        np.testing.assert_allclose(ours[f"recall@{k}"], [res[f"q{u}"][f"recall_{k}"] for u in users], atol=1e-12)


@pytest.mark.parametrize("backend", ["faiss", "numpy"])
def test_top_n_equals_numpy_argsort(wide, backend):
    users = np.arange(40)
    for name in ("als", "text", "popularity"):
        src = wide.sources[name]
        ids, scores = top_n_items(src.user_factors_[users], src.item_factors_, 50, backend)
        full = src.score(users)
        # Reference: numpy's full argsort of the scores (the N largest, as sets; ties at the
        # N-th value may be broken either way, so the N-th score itself is compared too).
        expected = np.argsort(-full, axis=1, kind="stable")[:, :50]
        nth = np.take_along_axis(full, expected, axis=1)[:, -1]
        np.testing.assert_allclose(np.sort(scores, axis=1)[:, ::-1], np.take_along_axis(full, expected, axis=1), rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(scores.min(axis=1), nth, rtol=1e-5, atol=1e-5)
        strict = full > nth[:, None] + 1e-4 * np.abs(nth[:, None]) + 1e-5
        for r in range(len(users)):
            assert set(np.flatnonzero(strict[r])) <= set(ids[r].tolist())


@pytest.mark.parametrize("backend", ["faiss", "numpy"])
def test_candidate_mode_agrees_with_full_ranking_on_certified_users(wide, backend):
    ks = (10, wide.n_items)
    full = evaluate_blend_chunked(wide.sources, wide.weights, wide.train, wide.heldout, ks=ks, chunk_size=128)
    cand = evaluate_candidates(wide.sources, wide.weights, wide.train, wide.heldout, ks=ks, top_n=300, backend=backend, chunk_size=250)
    assert 0 < cand.certified_share < 1
    pu, ref = cand.per_user, full.per_user
    cert = pu["certified"].to_numpy()
    full_rank = np.rint(1.0 / ref[f"mrr@{wide.n_items}"].to_numpy()).astype(np.int64)
    # Certified ranks are the full-ranking ranks, exactly; the others are lower bounds.
    ranks = cand.ranks["rank"].to_numpy()
    np.testing.assert_array_equal(ranks[cert], full_rank[cert])
    assert (ranks[~cert] <= full_rank[~cert]).all()
    for col in ref.columns.drop("user"):
        k = int(col.rpartition("@")[2])
        np.testing.assert_array_equal(pu[col].to_numpy()[cert], ref[col].to_numpy()[cert])
        exact = pu[f"exact@{k}"].to_numpy()
        assert exact[cert].all()
        np.testing.assert_array_equal(pu[col].to_numpy()[exact], ref[col].to_numpy()[exact])
        # Elsewhere the union values are upper bounds of the full-ranking ones.
        assert (pu[col].to_numpy() >= ref[col].to_numpy() - 1e-12).all()
    assert cand.exact_share(10) > cand.certified_share
    summary = cand.summary()
    assert summary.loc["ndcg@10", "certified_share"] == pytest.approx(cand.certified_share)


def test_candidate_mode_with_every_item_listed_is_full_ranking(small):
    full = evaluate_blend_chunked(small.sources, small.weights, small.train, small.heldout, ks=KS)
    cand = evaluate_candidates(small.sources, small.weights, small.train, small.heldout, ks=KS, top_n=10**6, backend="numpy")
    assert cand.certified_share == 1.0 and cand.top_n == small.n_items
    np.testing.assert_array_equal(cand.per_user[full.per_user.columns].to_numpy(), full.per_user.to_numpy())


def test_candidate_mode_refuses_inexact_normalizers_and_bad_settings(small):
    args = (small.sources, small.weights, small.train, small.heldout)
    with pytest.raises(ConfigError, match="minmax"):
        evaluate_candidates(*args, normalizers="minmax")
    with pytest.raises(ConfigError, match="rank"):
        evaluate_candidates(*args, normalizers={"als": "zscore", "text": "rank", "image": "none", "popularity": "zscore"})
    knn = ItemKNNSource(neighbors=5).fit(small.fold)
    with pytest.raises(ConfigError, match="ItemKNNSource"):
        evaluate_candidates({"knn": knn}, {"knn": 1.0}, small.train, small.heldout)
    with pytest.raises(ConfigError, match="backend"):
        evaluate_candidates(*args, backend="annoy")
    with pytest.raises(ConfigError, match="top_n"):
        evaluate_candidates(*args, top_n=0)
    with pytest.raises(ConfigError, match="metrics"):
        evaluate_blend_chunked(*args, metrics=("coverage",))
    empty = small.heldout.copy()
    empty.data[:] = 0
    empty.eliminate_zeros()
    with pytest.raises(DataError, match="no users"):
        evaluate_blend_chunked(small.sources, small.weights, small.train, empty)
    with pytest.raises(DataError, match="columns"):
        evaluate_blend_chunked(small.sources, small.weights, small.train[:, :100], small.heldout[:, :100])


def test_generated_sources_go_through_the_blend_engine(small):
    from xrec.blend import BlendEngine

    engine = BlendEngine(small.sources, small.fold, "zscore", ks=KS, metrics=METRICS).prepare()
    card = evaluate_blend_chunked(small.sources, small.weights, small.train, small.heldout, ks=KS)
    ours = card.per_user.drop(columns="user")
    np.testing.assert_array_equal(engine.per_user(small.weights)[ours.columns].to_numpy(), ours.to_numpy())
