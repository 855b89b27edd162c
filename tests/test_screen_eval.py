"""Screened candidate mode: witnesses in k-means lists settle users, the rest are ranked in full."""

from __future__ import annotations

import numpy as np
import pytest

from xrec.errors import ConfigError
from xrec.evaluate import UNRANKED, evaluate_blend_chunked, evaluate_screened
from xrec.evaluate._factor_blend import FactorBlend
from xrec.evaluate._screen import ItemLists
from xrec.evaluate._synthetic_scale import make_scale_problem

KS = (5, 10)


@pytest.fixture(scope="module")
def wide():
    # One held-out item per user, so mrr@n_items = 1 / rank gives every exact rank.
    return make_scale_problem(600, 4000, 30, seed=8)


@pytest.fixture(scope="module")
def small():
    return make_scale_problem(400, 600, 25, heldout_per_user=2, seed=5)


def _blend64(problem, users):
    """The z-scored blend recomputed in float64 from its definition (mean and population std
    over each user's unseen items; common practice, no source), not with xrec's code."""
    out = np.zeros((len(users), problem.n_items))
    for name, w in problem.weights.items():
        src = problem.sources[name]
        raw = src.user_factors_[users].astype(np.float64) @ src.item_factors_.T.astype(np.float64)
        for r, u in enumerate(users):
            cand = np.setdiff1d(np.arange(problem.n_items), problem.train[u].indices)
            out[r] += w * (raw[r] - raw[r, cand].mean()) / raw[r, cand].std()
    return out


def test_screen_equals_full_ranking_for_every_user(wide):
    full = evaluate_blend_chunked(wide.sources, wide.weights, wide.train, wide.heldout, ks=(*KS, wide.n_items), chunk_size=128)
    res = evaluate_screened(wide.sources, wide.weights, wide.train, wide.heldout, ks=KS, n_lists=64, probes=4, chunk_size=200)
    pu, ref = res.per_user, full.per_user
    # The screen really settles most users and still ranks some in full.
    assert 0.5 < 1 - res.certified_share < 1
    assert res.settings["ranked_in_full"] == int(pu["certified"].sum())
    for k in KS:
        assert res.exact_share(k) == 1.0
    cols = [c for c in ref.columns if c != "user" and int(c.rpartition("@")[2]) in KS]
    np.testing.assert_array_equal(pu[cols].to_numpy(), ref[cols].to_numpy())
    full_rank = np.rint(1.0 / ref[f"mrr@{wide.n_items}"].to_numpy()).astype(np.int64)
    ranks = res.ranks["rank"].to_numpy()
    cert = res.ranks["certified"].to_numpy()
    np.testing.assert_array_equal(ranks[cert], full_rank[cert])
    # Settled users: a lower bound above max K, never above the true rank.
    assert (ranks[~cert] > max(KS)).all() and (ranks[~cert] <= full_rank[~cert]).all()
    assert (res.ranks["union_size"].to_numpy()[~cert] < wide.n_items).all()


def test_settled_items_have_enough_higher_items_by_numpy(wide):
    res = evaluate_screened(wide.sources, wide.weights, wide.train, wide.heldout, ks=KS, n_lists=64, probes=4)
    users = np.arange(0, wide.n_users, 5)
    blend = _blend64(wide, users)
    by_user = res.ranks.set_index("user")
    for r, u in enumerate(users):
        item, rank, cert = by_user.loc[u, ["item", "rank", "certified"]]
        unseen = np.ones(wide.n_items, dtype=bool)
        unseen[wide.train[u].indices] = False
        s = blend[r, item]
        # Reference: a numpy count over the float64 blend (tolerance for float32 rounding).
        above = np.count_nonzero(unseen & (blend[r] > s + 1e-4))
        at_least = np.count_nonzero(unseen & (blend[r] >= s - 1e-4)) - 1
        if cert:
            assert above + 1 <= rank <= at_least + 1
        else:
            assert at_least + 1 >= rank > max(KS)


def test_several_heldout_items_threads_and_tiny_lists(small, monkeypatch):
    import xrec.evaluate._screen as screen

    monkeypatch.setattr(screen, "_PAIR_STEP", 7)  # the seen-item correction in many steps
    full = evaluate_blend_chunked(small.sources, small.weights, small.train, small.heldout, ks=KS)
    res = evaluate_screened(small.sources, small.weights, small.train, small.heldout, ks=KS, n_lists=7, probes=1, chunk_size=37, threads=2)
    assert res.settings["settled_by_witnesses"] > 0
    np.testing.assert_array_equal(res.per_user[full.per_user.columns].to_numpy(), full.per_user.to_numpy())
    # Every list scanned: the same metrics again.
    every = evaluate_screened(small.sources, small.weights, small.train, small.heldout, ks=KS, n_lists=5, probes=50)
    np.testing.assert_array_equal(every.per_user[full.per_user.columns].to_numpy(), full.per_user.to_numpy())


def test_item_lists_partition_items_by_nearest_centroid(wide):
    blend = FactorBlend(wide.sources, wide.weights)
    x = blend.item_side
    scale = np.linspace(0.5, 2.0, x.shape[1]).astype(np.float32)
    lists = ItemLists(x, 40, scale, seed=3)
    np.testing.assert_array_equal(np.sort(lists.order), np.arange(len(x)))
    assert lists.starts[0] == 0 and lists.starts[-1] == len(x)
    for lst in range(lists.n_lists):
        assert (lists.assign[lists.items(lst)] == lst).all()
    # Reference: numpy nearest centroid (float64 squared distances) in the scaled space;
    # items within rounding of two centroids may go either way.
    xs = x.astype(np.float64) * scale
    cs = lists.centroids.astype(np.float64) * scale
    d2 = (xs * xs).sum(1)[:, None] - 2 * xs @ cs.T + (cs * cs).sum(1)[None, :]
    mine = d2[np.arange(len(x)), lists.assign]
    assert (mine <= d2.min(axis=1) + 1e-3 * (1 + np.abs(d2.min(axis=1)))).all()
    again = ItemLists(x, 40, scale, seed=3)
    np.testing.assert_array_equal(again.assign, lists.assign)


def test_screen_refuses_inexact_normalizers_and_bad_settings(small):
    args = (small.sources, small.weights, small.train, small.heldout)
    with pytest.raises(ConfigError, match="minmax"):
        evaluate_screened(*args, normalizers="minmax")
    with pytest.raises(ConfigError, match="probes"):
        evaluate_screened(*args, probes=0)
    with pytest.raises(ConfigError, match="n_lists"):
        evaluate_screened(*args, n_lists=-3)
    with pytest.raises(ConfigError, match="chunk_size"):
        evaluate_screened(*args, chunk_size=True)


def test_heldout_items_seen_in_training_and_a_user_subset(wide):
    # The first 30 users also hold out one of their training items: never a candidate.
    extra = wide.train[:30].tocoo()
    first = np.r_[True, extra.row[1:] != extra.row[:-1]]
    truth = wide.heldout.tolil()
    for u, j in zip(extra.row[first], extra.col[first]):
        truth[u, j] = 1.0
    truth = truth.tocsr()
    users = np.arange(0, wide.n_users, 2)
    full = evaluate_blend_chunked(wide.sources, wide.weights, wide.train, truth, users=users, ks=KS)
    res = evaluate_screened(wide.sources, wide.weights, wide.train, truth, users=users, ks=KS, n_lists=50, probes=3)
    np.testing.assert_array_equal(res.per_user[full.per_user.columns].to_numpy(), full.per_user.to_numpy())
    seen_rows = res.ranks[res.ranks["rank"] == UNRANKED]
    assert len(seen_rows) == 15 and seen_rows["certified"].all()
