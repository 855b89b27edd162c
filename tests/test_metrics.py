"""Ranks, tie rule and metrics of xrec.evaluate, checked against outside references."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.stats import hypergeom

import xrec.evaluate._ranking as ranking
from xrec.evaluate import (
    UNRANKED,
    FullRanking,
    SampledNegatives,
    count_at_least,
    metrics_from_ranks,
    rank_heldout,
    top_k_items,
)


def csr(rows: list[list[int]], n: int) -> sp.csr_matrix:
    r = np.repeat(np.arange(len(rows)), [len(x) for x in rows])
    c = np.concatenate([np.asarray(x, dtype=np.int64) for x in rows]) if r.size else np.zeros(0, np.int64)
    m = sp.csr_matrix((np.ones(len(r), np.float32), (r, c)), shape=(len(rows), n))
    m.sum_duplicates()
    return m


def random_problem(rng, b, n, seen_density, rel_density, levels=None):
    if levels is None:
        scores = rng.random((b, n), dtype=np.float32)
    else:
        scores = rng.integers(0, levels, (b, n)).astype(np.float32)
    seen = (rng.random((b, n)) < seen_density).astype(np.float32)
    rel = (rng.random((b, n)) < rel_density) & (seen == 0)
    # at least one held-out item per user
    for u in np.flatnonzero(~rel.any(1)):
        free = np.flatnonzero(seen[u] == 0)
        rel[u, free[0] if len(free) else 0] = True
    return scores, sp.csr_matrix(seen), sp.csr_matrix(rel.astype(np.float32))


def rule_by_definition(scores, seen, truth):
    """The tie rule written literally: sort candidates by (score desc, relevant last, index)."""
    out = []
    for u in range(scores.shape[0]):
        s = set(seen[u].indices.tolist())
        rel = set(truth[u].indices.tolist())
        row = np.where(np.isnan(scores[u]), -np.inf, scores[u])
        cand = [j for j in range(scores.shape[1]) if j not in s]
        order = sorted(cand, key=lambda j: (-row[j], j in rel, j))
        pos = {j: p + 1 for p, j in enumerate(order)}
        out.extend(pos.get(i, UNRANKED) for i in sorted(rel))
    return np.array(out, dtype=np.int64)


# ---------------------------------------------------------------- tie rule and NaN


def test_all_equal_scores_give_the_worst_rank():
    # The pessimistic tie rule of the brief: with every score equal, the held-out item
    # ranks last among the n - |seen| candidates.
    n = 50
    scores = np.zeros((3, n), dtype=np.float32)
    seen = csr([[1, 2, 3], [], [0]], n)
    truth = csr([[10], [0], [49]], n)
    r = rank_heldout(scores, seen, truth)
    assert r.ranks.tolist() == [n - 3, n, n - 1]
    assert r.n_candidates.tolist() == [n - 3, n, n - 1]
    m = metrics_from_ranks(r, [10], ["hit_rate", "mrr"])
    assert m["hit_rate@10"].tolist() == [0.0, 0.0, 0.0]


def test_relevant_items_tied_with_each_other_are_ordered_by_index():
    n = 6
    scores = np.array([[5, 1, 1, 1, 0, 1]], dtype=np.float32)
    truth = csr([[1, 3]], n)
    # non-relevant 2 and 5 tie with the relevant ones and go above both; 1 before 3.
    r = rank_heldout(scores, csr([[]], n), truth)
    assert r.ranks.tolist() == [4, 5]


def test_nan_reads_as_minus_infinity():
    n = 5
    scores = np.array([[np.nan, 1.0, -np.inf, 2.0, np.nan]], dtype=np.float32)
    # item 4 (NaN, relevant) ties with NaN item 0 and -inf item 2 (non-relevant): worst rank.
    r = rank_heldout(scores, csr([[]], n), csr([[4]], n))
    assert r.ranks.tolist() == [5]
    # item 1 (score 1) is beaten only by item 3, NaN never ranks above it.
    r = rank_heldout(scores, csr([[]], n), csr([[1]], n))
    assert r.ranks.tolist() == [2]


def test_heldout_item_seen_in_training_is_unranked_but_counts_as_relevant():
    n = 8
    scores = np.arange(n, dtype=np.float32)[None, :]
    r = rank_heldout(scores, csr([[7]], n), csr([[6, 7]], n))
    assert r.ranks.tolist() == [1, UNRANKED]
    m = metrics_from_ranks(r, [1], ["recall", "hit_rate"])
    assert m["recall@1"][0] == 0.5 and m["hit_rate@1"][0] == 1.0


@pytest.mark.parametrize("slot_limit", [48, 1])
def test_ranks_follow_the_written_rule_on_random_ties(slot_limit, monkeypatch):
    # Internal reference (the rule applied literally); the outside checks are below.
    monkeypatch.setattr(ranking, "_SLOT_LIMIT", slot_limit)
    rng = np.random.default_rng(1)
    for trial in range(25):
        b, n = int(rng.integers(1, 30)), int(rng.integers(2, 60))
        scores, seen, truth = random_problem(rng, b, n, 0.3 * rng.random(), 0.4 * rng.random(), levels=4)
        scores[rng.random((b, n)) < 0.1] = np.nan
        scores[rng.random((b, n)) < 0.05] = -np.inf
        scores[rng.random((b, n)) < 0.05] = np.inf
        # some held-out items also in training
        truth = sp.csr_matrix(truth + seen.multiply(rng.random((b, n)) < 0.2))
        truth.data[:] = 1
        np.testing.assert_array_equal(rank_heldout(scores, seen, truth).ranks, rule_by_definition(scores, seen, truth))


def test_count_at_least_counts_and_excludes():
    rng = np.random.default_rng(2)
    block = rng.random((300, 1001), dtype=np.float32)
    t = block[:, 5]
    excl = sp.csr_matrix(rng.random((300, 1001)) < 0.1)
    got = count_at_least(block, None, t, exclude=excl)
    want = ((block >= t[:, None]) & ~excl.toarray()).sum(1)
    np.testing.assert_array_equal(got, want)
    rows = np.array([3, 7, 299])
    np.testing.assert_array_equal(count_at_least(block, rows, t[rows]), (block[rows] >= t[rows, None]).sum(1))


# ------------------------------------------------------ trec_eval (pytrec_eval) reference


def trec_run(scores, seen, truth, users_docs_limit=None):
    qrels, run = {}, {}
    for u in range(scores.shape[0]):
        q = f"q{u}"
        qrels[q] = {f"d{i}": 1 for i in truth[u].indices}
        s = set(seen[u].indices.tolist())
        cand = [j for j in range(scores.shape[1]) if j not in s]
        if users_docs_limit is not None:
            cand = sorted(cand, key=lambda j: -scores[u, j])[:users_docs_limit]
        run[q] = {f"d{j}": float(scores[u, j]) for j in cand}
    return qrels, run


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_metrics_match_trec_eval(seed):
    pytrec_eval = pytest.importorskip("pytrec_eval")
    rng = np.random.default_rng(seed)
    b, n = 60, 120
    # distinct scores (float64 cast of distinct float32 draws), so trec_eval's own tie
    # breaking never matters
    scores, seen, truth = random_problem(rng, b, n, 0.15, 0.05)
    scores = (rng.permutation(b * n).reshape(b, n) / (b * n)).astype(np.float32)
    ks = [1, 5, 10, 20]
    ours = metrics_from_ranks(rank_heldout(scores, seen, truth), ks)
    qrels, run = trec_run(scores, seen, truth)
    measures = {f"success.{','.join(map(str, ks))}", f"ndcg_cut.{','.join(map(str, ks))}", f"recall.{','.join(map(str, ks))}"}
    res = pytrec_eval.RelevanceEvaluator(qrels, measures).evaluate(run)
    for k in ks:
        # Source: trec_eval measures success_K, ndcg_cut_K, recall_K via pytrec_eval
        # (pytrec-eval-terrier), the reference implementation used by TREC.
        np.testing.assert_allclose(ours[f"hit_rate@{k}"], [res[f"q{u}"][f"success_{k}"] for u in range(b)], atol=1e-12)
        np.testing.assert_allclose(ours[f"ndcg@{k}"], [res[f"q{u}"][f"ndcg_cut_{k}"] for u in range(b)], atol=1e-9)
        np.testing.assert_allclose(ours[f"recall@{k}"], [res[f"q{u}"][f"recall_{k}"] for u in range(b)], atol=1e-12)
        # Source: trec_eval recip_rank on a run truncated to the top K documents = MRR@K.
        q_k, run_k = trec_run(scores, seen, truth, users_docs_limit=k)
        res_k = pytrec_eval.RelevanceEvaluator(q_k, {"recip_rank"}).evaluate(run_k)
        np.testing.assert_allclose(ours[f"mrr@{k}"], [res_k[f"q{u}"]["recip_rank"] for u in range(b)], atol=1e-12)


# ---------------------------------------------------------------- random scorer


def test_random_scorer_hit_rate_is_k_over_n():
    # Elementary probability (common practice, no source): the rank of one held-out item
    # among n candidates under random scores is uniform on 1..n, so E[HR@K] = K/n;
    # for n = 101, K = 10 that is 0.0990.
    rng = np.random.default_rng(3)
    b, n, k = 20000, 101, 10
    scores = rng.random((b, n), dtype=np.float32)
    truth = sp.csr_matrix((np.ones(b, np.float32), (np.arange(b), rng.integers(0, n, b))), shape=(b, n))
    hr = metrics_from_ranks(rank_heldout(scores, sp.csr_matrix((b, n)), truth), [k], ["hit_rate"])[f"hit_rate@{k}"]
    p = k / n
    assert abs(p - 0.0990) < 1e-4
    assert abs(hr.mean() - p) < 4 * np.sqrt(p * (1 - p) / b)


# ------------------------------------------------------------- sampled negatives


def test_sampled_rank_follows_hypergeometric_law():
    # Krichene & Rendle, "On Sampled Metrics for Item Recommendation", KDD 2020: an item
    # of full rank r among N candidates, ranked against m negatives drawn without
    # replacement from the N-1 others, has P(sampled rank <= k) = hypergeom.cdf(k-1, N-1, r-1, m)
    # (scipy.stats.hypergeom). Each user row draws its own negatives, so identical rows
    # give independent draws.
    n_users, n_items, r, m = 4000, 200, 31, 20
    base = np.linspace(1.0, 0.0, n_items, dtype=np.float32)  # item j has full rank j+1
    scores = np.repeat(base[None, :], n_users, axis=0)
    truth = sp.csr_matrix((np.ones(n_users, np.float32), (np.arange(n_users), np.full(n_users, r - 1))), shape=(n_users, n_items))
    seen = sp.csr_matrix((n_users, n_items), dtype=np.float32)
    assert set(rank_heldout(scores, seen, truth).ranks.tolist()) == {r}
    sampled = rank_heldout(scores, seen, truth, protocol=SampledNegatives(m, seed=7), users=np.arange(n_users)).ranks
    assert sampled.max() <= m + 1
    for k in (1, 2, 3, 5, 10):
        expected = hypergeom.cdf(k - 1, n_items - 1, r - 1, m)
        got = (sampled <= k).mean()
        assert abs(got - expected) < 4 * np.sqrt(expected * (1 - expected) / n_users) + 1e-3, (k, got, expected)


def test_sampled_negatives_avoid_seen_and_relevant_and_do_not_depend_on_chunking():
    rng = np.random.default_rng(4)
    b, n = 40, 80
    scores, seen, truth = random_problem(rng, b, n, 0.3, 0.1)
    proto = SampledNegatives(15, seed=3)
    rows, items = proto.sample(np.arange(b), seen, truth, n)
    dense_seen, dense_rel = seen.toarray() > 0, truth.toarray() > 0
    assert not dense_seen[rows, items].any() and not dense_rel[rows, items].any()
    assert np.all(np.bincount(rows, minlength=b) == np.minimum(15, n - dense_seen.sum(1) - dense_rel.sum(1)))
    whole = rank_heldout(scores, seen, truth, protocol=proto, users=np.arange(b)).ranks
    parts = np.concatenate(
        [
            rank_heldout(scores[s : s + 7], seen[s : s + 7], truth[s : s + 7], protocol=proto, users=np.arange(s, min(b, s + 7))).ranks
            for s in range(0, b, 7)
        ]
    )
    np.testing.assert_array_equal(whole, parts)


def test_sampled_protocol_settings_are_checked():
    from xrec.errors import ConfigError

    with pytest.raises(ConfigError, match="n_negatives"):
        SampledNegatives(0)
    with pytest.raises(ConfigError, match="seed"):
        SampledNegatives(10, seed=-1)
    assert FullRanking().describe() == {"kind": "full_ranking"}


# ----------------------------------------------------------------- metric formulas


def test_metric_formulas_on_a_worked_example():
    # Hand-worked from the definitions (Jarvelin & Kekalainen 2002 for NDCG with
    # log2(rank+1) discounts, binary gains): relevant ranks 2 and 4 of |rel| = 3.
    from xrec.evaluate._ranking import BlockRanks

    r = BlockRanks(np.array([0, 3]), np.array([0, 1, 2]), np.array([2, 4, UNRANKED]), np.array([10]))
    m = metrics_from_ranks(r, [1, 3, 5])
    assert m["hit_rate@1"][0] == 0 and m["hit_rate@3"][0] == 1
    assert m["recall@3"][0] == pytest.approx(1 / 3) and m["recall@5"][0] == pytest.approx(2 / 3)
    idcg3 = 1 + 1 / np.log2(3) + 1 / np.log2(4)
    assert m["ndcg@3"][0] == pytest.approx((1 / np.log2(3)) / idcg3)
    assert m["ndcg@5"][0] == pytest.approx((1 / np.log2(3) + 1 / np.log2(5)) / idcg3)
    assert m["mrr@1"][0] == 0 and m["mrr@3"][0] == 0.5


# ---------------------------------------------------------------------- top-K lists


def test_top_k_is_exact_and_breaks_ties_by_index():
    rng = np.random.default_rng(5)
    for trial in range(30):
        b, n = int(rng.integers(1, 25)), int(rng.integers(1, 300))
        block = rng.integers(0, 3 if trial % 2 else 1000, (b, n)).astype(np.float32)
        block[rng.random((b, n)) < 0.05] = np.nan
        seen = sp.csr_matrix(rng.random((b, n)) < 0.4 * rng.random())
        for k in (1, 4, 12):
            got = top_k_items(block, seen, k)
            for u in range(b):
                s = set(seen[u].indices.tolist())
                row = np.where(np.isnan(block[u]), -np.inf, block[u])
                want = sorted((j for j in range(n) if j not in s), key=lambda j: (-row[j], j))[:k]
                assert got[u, : len(want)].tolist() == want and np.all(got[u, len(want) :] == -1)
