"""BlendEngine: its numbers must equal the plain path ``evaluate(Blend(...), fold)``."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from xrec.blend import Blend
from xrec.blend.engine import BlendEngine, UserSample, sample_users
from xrec.errors import ConfigError
from xrec.evaluate import evaluate
from xrec.fold import Fold
from xrec.sources.base import LowRankSource, Source

from _synthetic import FixedScores, pairs_frame, synthetic_fold

RANK_METRICS = ("hit_rate", "ndcg", "recall", "mrr")


class FixedFactors(LowRankSource):
    def __init__(self, user_factors: np.ndarray, item_factors: np.ndarray) -> None:
        self.user_factors = user_factors
        self.item_factors = item_factors

    def fit(self, fold):
        self.user_factors_ = self.user_factors.astype(np.float32)
        self.item_factors_ = self.item_factors.astype(np.float32)
        self.fitted_ = True
        return self


def make_fold(n_users=60, n_items=45, seed=0, multi=True) -> Fold:
    """Random fold: 3-12 training items per user; 1 held-out item, or 1-4 when ``multi``.

    Some held-out items are also training items (repeat consumption), which the
    evaluator counts as misses.
    """
    rng = np.random.default_rng(seed)
    train, held = [], []
    for u in range(n_users):
        items = rng.choice(n_items, size=rng.integers(3, 13), replace=False)
        train += [(u, int(i)) for i in items]
        k = int(rng.integers(1, 5)) if multi and u % 3 == 0 else 1
        pool = np.setdiff1d(np.arange(n_items), items)
        out = list(rng.choice(pool, size=k, replace=False))
        if u % 11 == 5:
            out[0] = items[0]
        held += [(u, int(i)) for i in out]
    return synthetic_fold(n_users, n_items, pairs_frame(train), pairs_frame(held))


def make_sources(fold: Fold, seed=0) -> dict[str, Source]:
    rng = np.random.default_rng(seed)
    u, n = fold.n_users, fold.n_items
    counts = fold.item_train_counts.astype(np.float32)
    return {
        # coarse values: many exact ties inside a row and between sources
        "coarse": FixedScores(rng.integers(0, 4, size=(u, n)).astype(np.float32)).fit(fold),
        "dense": FixedScores(rng.standard_normal((u, n)).astype(np.float32)).fit(fold),
        "pop": FixedScores(np.tile(counts, (u, 1))).fit(fold),
        "mf": FixedFactors(rng.standard_normal((u, 3)), rng.standard_normal((n, 3))).fit(fold),
    }


def plain(sources, fold, weights, normalizers, ks=(5, 10)):
    blend = Blend(sources, weights, normalizers).fit(fold)
    return evaluate(blend, fold, ks=ks, metrics=RANK_METRICS)


@pytest.mark.parametrize("multi", [True, False])
@pytest.mark.parametrize("normalizers", ["zscore", "rank", "minmax", "none"])
def test_engine_equals_plain_evaluation(normalizers, multi):
    fold = make_fold(multi=multi)
    sources = make_sources(fold)
    engine = BlendEngine(sources, fold, normalizers, ks=(5, 10), metric="ndcg@10", factorized=False, prune=True).prepare()
    # one held-out item per user: the dominance shortcut is used (and must be exact)
    assert engine.pruned_ == (not multi)
    rng = np.random.default_rng(1)
    weight_sets = [
        {"coarse": 1.0, "dense": 0.0, "pop": 0.0, "mf": 0.0},
        {"coarse": 0.5, "dense": 0.5, "pop": 0.0, "mf": 0.0},
        {"coarse": 0.25, "dense": 0.25, "pop": 0.25, "mf": 0.25},
    ] + [dict(zip(sources, rng.random(4).round(2).tolist())) for _ in range(4)]
    for weights in weight_sets:
        card = plain(sources, fold, weights, normalizers)
        mine = engine.per_user(weights)
        assert mine["user"].tolist() == card.per_user["user"].tolist()
        for col in card.metric_columns:
            # exact equality: same float32 sums, same ranking core
            np.testing.assert_array_equal(mine[col].to_numpy(), card.per_user[col].to_numpy(), err_msg=f"{weights} {col}")
        assert engine.evaluate(weights) == pytest.approx(card.means(), abs=0)


def test_factorized_source_matches_block():
    fold = make_fold(seed=3)
    sources = make_sources(fold, seed=3)
    normalizers = {"coarse": "rank", "dense": "zscore", "pop": "minmax", "mf": "none"}
    stored = BlendEngine(sources, fold, normalizers, factorized=False).prepare()
    kept = BlendEngine(sources, fold, normalizers, factorized=["mf"]).prepare()
    assert "mf" in kept.factors_ and "mf" not in kept.blocks_
    for weights in ({"coarse": 0.2, "dense": 0.3, "pop": 0.1, "mf": 0.4}, {"coarse": 0, "dense": 0, "pop": 0, "mf": 1.0}):
        a, b = stored.per_user(weights), kept.per_user(weights)
        card = plain(sources, fold, weights, normalizers, ks=(10,))
        np.testing.assert_array_equal(a["ndcg@10"], b["ndcg@10"])
        np.testing.assert_allclose(b["ndcg@10"], card.per_user["ndcg@10"], atol=1e-12)


def test_factorized_refuses_nonlinear_normalizer():
    fold = make_fold()
    sources = make_sources(fold)
    with pytest.raises(ConfigError, match="mf"):
        BlendEngine(sources, fold, "zscore", factorized=["mf"]).prepare()


def test_incremental_update_equals_full_recomputation():
    fold = make_fold(seed=5)
    sources = make_sources(fold, seed=5)
    engine = BlendEngine(sources, fold, "zscore", factorized=False, prune=False).prepare()
    weights = {"coarse": 0.3, "dense": 0.3, "pop": 0.2, "mf": 0.2}
    engine.evaluate(weights)
    for name, w in [("dense", 0.9), ("pop", 0.0), ("coarse", 0.05), ("dense", 0.1)]:
        engine.set_weight(name, w)
        weights[name] = w
        kept = engine.current_sum()
        full = engine.blended(weights)
        finite = np.isfinite(full)
        # seen items stay out of reach (-inf or NaN) after any update
        assert not np.isfinite(kept[~finite]).any()
        np.testing.assert_allclose(kept[finite], full[finite], rtol=1e-5, atol=1e-5)
        inc = engine.per_user()
        ref = BlendEngine(sources, fold, "zscore", factorized=False, prune=False).prepare().per_user(weights)
        # near-ties may flip under rounding; with continuous sources almost none do
        assert (inc["ndcg@10"].to_numpy() != ref["ndcg@10"].to_numpy()).mean() <= 0.05


def test_float16_storage_is_close():
    fold = make_fold(n_users=80, n_items=60, seed=7, multi=False)
    sources = make_sources(fold, seed=7)
    sources = {k: v for k, v in sources.items() if k != "coarse"}
    weights = {"dense": 0.5, "pop": 0.2, "mf": 0.3}
    a = BlendEngine(sources, fold, "zscore", dtype="float32", factorized=False).prepare().per_user(weights)
    b = BlendEngine(sources, fold, "zscore", dtype="float16", factorized=False).prepare().per_user(weights)
    assert (a["hit_rate@10"] != b["hit_rate@10"]).mean() <= 0.05


def test_threads_give_same_numbers():
    fold = make_fold(n_users=90, seed=2)
    sources = make_sources(fold, seed=2)
    weights = {"coarse": 0.1, "dense": 0.4, "pop": 0.3, "mf": 0.2}
    one = BlendEngine(sources, fold, "rank", chunk_rows=4).prepare().per_user(weights)
    two = BlendEngine(sources, fold, "rank", chunk_rows=4, threads=2).prepare().per_user(weights)
    pd.testing.assert_frame_equal(one, two)


def test_bad_weights_are_named():
    fold = make_fold()
    engine = BlendEngine(make_sources(fold), fold).prepare()
    with pytest.raises(ConfigError, match="weights.dense"):
        engine.evaluate({"coarse": 1, "dense": -1, "pop": 0, "mf": 0})
    with pytest.raises(ConfigError, match="all weights are zero"):
        engine.evaluate([0, 0, 0, 0])
    with pytest.raises(ConfigError, match="nope"):
        engine.evaluate({"nope": 1, "coarse": 1, "dense": 1, "pop": 1, "mf": 1})


def test_stratified_sample_estimate():
    fold = make_fold(n_users=400, n_items=50, seed=4, multi=False)
    sample = sample_users(fold, 120, n_strata=3, seed=0)
    assert isinstance(sample, UserSample)
    assert len(sample.users) == 120 and np.all(np.diff(sample.users) > 0)
    # proportional allocation (up to rounding)
    share = np.bincount(sample.stratum) / 120
    np.testing.assert_allclose(share, sample.population / sample.population.sum(), atol=0.02)
    values = np.random.default_rng(0).random(120)
    mean, lo, hi = sample.estimate(values)
    # Cochran (1977) eqs. 5.1 / 5.6 (from memory), recomputed by hand here
    w = sample.population / sample.population.sum()
    ybar = [values[sample.stratum == h].mean() for h in range(sample.n_strata)]
    var = sum(
        w[h] ** 2 * (1 - (sample.stratum == h).sum() / sample.population[h]) * values[sample.stratum == h].var(ddof=1) / (sample.stratum == h).sum()
        for h in range(sample.n_strata)
    )
    assert mean == pytest.approx(float(np.dot(w, ybar)))
    assert hi - mean == pytest.approx(1.959963984540054 * np.sqrt(var))  # z_0.975 (from memory)
    # the whole population: no sampling error
    full = sample_users(fold, 10_000, n_strata=3)
    m, lo, hi = full.estimate(np.random.default_rng(1).random(len(full.users)))
    assert lo == pytest.approx(m) and hi == pytest.approx(m)


def test_sampled_engine_reports_interval():
    fold = make_fold(n_users=300, n_items=40, seed=8, multi=False)
    sources = make_sources(fold, seed=8)
    weights = {"coarse": 0.0, "dense": 0.3, "pop": 0.7, "mf": 0.0}
    full = BlendEngine(sources, fold, "zscore").prepare()
    part = BlendEngine(sources, fold, "zscore", users=sample_users(fold, 150, seed=1)).prepare()
    truth = full.evaluate(weights)["ndcg@10"]
    mean, lo, hi = part.interval(weights)
    assert lo <= mean <= hi
    assert lo - 0.1 <= truth <= hi + 0.1


def test_engine_matches_trec_eval_on_independent_sums():
    pytrec_eval = pytest.importorskip("pytrec_eval")
    fold = make_fold(n_users=50, n_items=40, seed=9)
    sources = make_sources(fold, seed=9)
    sources = {"dense": sources["dense"], "mf": sources["mf"]}
    weights = {"dense": 0.35, "mf": 0.65}
    engine = BlendEngine(sources, fold, "zscore", ks=(5, 10), factorized=False).prepare()
    ours = engine.per_user(weights)
    seen, truth = fold.train_matrix, fold.heldout_matrix
    users = fold.eval_users
    # Blend recomputed here in float64 from the z-score definition (mean and population std
    # over the user's candidates; common practice, no source), not with xrec's normalizer.
    blended = np.zeros((fold.n_users, fold.n_items))
    for name, w in weights.items():
        raw = sources[name].score(np.arange(fold.n_users)).astype(np.float64)
        for u in range(fold.n_users):
            cand = np.setdiff1d(np.arange(fold.n_items), seen[u].indices)
            blended[u] += w * (raw[u] - raw[u, cand].mean()) / raw[u, cand].std()
    qrels, run = {}, {}
    for u in users:
        qrels[f"q{u}"] = {f"d{i}": 1 for i in truth[u].indices}
        run[f"q{u}"] = {f"d{j}": float(blended[u, j]) for j in range(fold.n_items) if j not in set(seen[u].indices)}
    res = pytrec_eval.RelevanceEvaluator(qrels, {"ndcg_cut.5,10", "success.5,10", "recall.5,10"}).evaluate(run)
    for k in (5, 10):
        # Source: trec_eval measures ndcg_cut_K, success_K, recall_K via pytrec_eval (pytrec-eval-terrier)
        np.testing.assert_allclose(ours[f"ndcg@{k}"], [res[f"q{u}"][f"ndcg_cut_{k}"] for u in users], atol=1e-9)
        np.testing.assert_allclose(ours[f"hit_rate@{k}"], [res[f"q{u}"][f"success_{k}"] for u in users], atol=1e-12)
        np.testing.assert_allclose(ours[f"recall@{k}"], [res[f"q{u}"][f"recall_{k}"] for u in users], atol=1e-12)


def test_dominance_shortcut_equals_dense_path():
    fold = make_fold(n_users=120, n_items=50, seed=12, multi=False)
    sources = make_sources(fold, seed=12)
    fast = BlendEngine(sources, fold, "rank", ks=(3, 10), prune=True).prepare()
    dense = BlendEngine(sources, fold, "rank", ks=(3, 10), prune=False).prepare()
    assert fast.pruned_ and not dense.pruned_
    rng = np.random.default_rng(0)
    for _ in range(6):
        w = rng.random(4) * (rng.random(4) < 0.8)
        if w.sum() == 0:
            w[0] = 1.0
        pd.testing.assert_frame_equal(fast.per_user(w), dense.per_user(w))
    # the slider uses the shortcut too
    fast.evaluate([0.25, 0.25, 0.25, 0.25])
    dense.evaluate([0.25, 0.25, 0.25, 0.25])
    assert fast.set_weight("pop", 0.9) == dense.set_weight("pop", 0.9)
    # per-item weights cannot use it, and still agree
    vec = np.linspace(0.1, 1.0, fold.n_items)
    pd.testing.assert_frame_equal(fast.per_user({"coarse": vec, "dense": 0.2, "pop": 0.0, "mf": 0.5}), dense.per_user({"coarse": vec, "dense": 0.2, "pop": 0.0, "mf": 0.5}))
