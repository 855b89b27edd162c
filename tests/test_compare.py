"""Paired comparison: bootstrap CI, sign-flip p-value and Holm, against scipy and worked examples."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from xrec.errors import ConfigError, DataError
from xrec.evaluate import Comparison, Scorecard, compare
from xrec.evaluate._stats import holm, normal_interval, sign_flip_pvalue


def card(name, values: dict[str, np.ndarray], users=None, protocol=None) -> Scorecard:
    n = len(next(iter(values.values())))
    users = np.arange(n) if users is None else np.asarray(users)
    frame = pd.DataFrame({"user": users, **values})
    return Scorecard(name=name, per_user=frame, ks=(10,), protocol=protocol or {"kind": "full_ranking"}, n_items=100)


@pytest.fixture(scope="module")
def paired():
    rng = np.random.default_rng(0)
    n = 400
    base = (rng.random(n) < 0.3).astype(float)  # hit-rate-like 0/1 values
    cand = base.copy()  # 30 users gain a hit, 22 lose one
    cand[rng.choice(np.flatnonzero(base == 0), 30, replace=False)] = 1.0
    cand[rng.choice(np.flatnonzero(base == 1), 22, replace=False)] = 0.0
    ndcg_b = rng.beta(2, 5, n)
    ndcg_c = np.clip(ndcg_b + rng.normal(0.01, 0.1, n), 0, 1)
    return base, cand, ndcg_b, ndcg_c


def test_bootstrap_interval_matches_scipy(paired):
    base, cand, ndcg_b, ndcg_c = paired
    cmp = compare(card("a", {"ndcg@10": ndcg_b}), card("b", {"ndcg@10": ndcg_c}), n_resamples=10_000, seed=1)
    row = cmp.table.iloc[0]
    # Source: scipy.stats.bootstrap(paired=True, method="percentile") on the same per-user arrays.
    ref = stats.bootstrap(
        (ndcg_b, ndcg_c),
        lambda x, y, axis=-1: np.mean(y - x, axis=axis),
        paired=True,
        vectorized=True,
        method="percentile",
        n_resamples=10_000,
        confidence_level=0.95,
        random_state=np.random.default_rng(123),
    )
    se = np.std(ndcg_c - ndcg_b, ddof=1) / np.sqrt(len(base))
    # Monte Carlo error of a 2.5 % quantile from 10,000 resamples is ~0.03 SE per side.
    assert abs(row["ci_low"] - ref.confidence_interval.low) < 0.15 * se
    assert abs(row["ci_high"] - ref.confidence_interval.high) < 0.15 * se
    assert row["difference"] == pytest.approx(np.mean(ndcg_c - ndcg_b))


@pytest.mark.parametrize("metric", ["hit_rate@10", "ndcg@10"])
def test_sign_flip_pvalue_matches_scipy_permutation_test(paired, metric):
    base, cand, ndcg_b, ndcg_c = paired
    b, c = (base, cand) if metric == "hit_rate@10" else (ndcg_b, ndcg_c)
    p = compare(card("a", {metric: b}), card("b", {metric: c}), n_resamples=10_000, seed=2).table.iloc[0]["p_value"]
    # Source: scipy.stats.permutation_test(permutation_type="samples"), two-sided,
    # which swaps each user's pair of values = flips the sign of the paired difference.
    ref = stats.permutation_test(
        (b, c),
        lambda x, y, axis=-1: np.mean(y - x, axis=axis),
        permutation_type="samples",
        vectorized=True,
        n_resamples=10_000,
        alternative="two-sided",
        random_state=np.random.default_rng(7),
    ).pvalue
    assert 0.01 < ref < 0.9  # a p-value in the informative range
    # Two Monte Carlo estimates of the same p, each with SE <= 0.005 at 10,000 draws.
    assert abs(p - ref) < 0.03


def test_sign_flip_pvalue_exact_small_case():
    # Exact randomization distribution (Fisher 1935 paired design; hand-enumerated):
    # d = (1, 1, 1, 1) -> |mean| is maximal only for all-equal signs: 2 of 16 assignments,
    # so with many draws p -> (1 + R * 2/16) / (R + 1) ~ 0.125.
    p = sign_flip_pvalue(np.ones(4), 20_000, seed=0)
    assert abs(p - 0.125) < 0.01
    assert sign_flip_pvalue(np.zeros(10), 100, seed=0) == 1.0  # no difference at all


def test_holm_matches_hand_worked_example():
    # Holm (1979), "A simple sequentially rejective multiple test procedure": sort
    # ascending, multiply the j-th smallest by (m - j + 1), keep running max, cap at 1.
    # p = (0.01, 0.04, 0.03): sorted 0.01, 0.03, 0.04 -> 0.03, 0.06, max(0.06, 0.04) = 0.06.
    np.testing.assert_allclose(holm(np.array([0.01, 0.04, 0.03])), [0.03, 0.06, 0.06])
    # 0.2 * 4 caps at 1 once scaled; order restored.
    np.testing.assert_allclose(holm(np.array([0.2, 0.001, 0.5, 0.012])), [0.4, 0.004, 0.5, 0.036])
    try:  # optional cross-check; statsmodels is not a dependency
        from statsmodels.stats.multitest import multipletests
    except ImportError:
        return
    p = np.array([0.2, 0.001, 0.5, 0.012, 0.04])
    np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1])


def test_several_candidates_get_holm_within_each_metric(paired):
    base, cand, ndcg_b, ndcg_c = paired
    rng = np.random.default_rng(5)
    cards = [card(name, {"hit_rate@10": h, "ndcg@10": g}) for name, h, g in [("base", base, ndcg_b), ("c1", cand, ndcg_c)]]
    cards.append(card("c2", {"hit_rate@10": base, "ndcg@10": ndcg_b + rng.normal(0, 0.05, len(base))}))
    cmp = compare(*cards, n_resamples=2000)
    assert isinstance(cmp, Comparison)
    assert cmp.candidates == ["c1", "c2"] and len(cmp.table) == 4
    for metric, rows in cmp.table.groupby("metric"):
        np.testing.assert_allclose(rows["p_holm"], holm(rows["p_value"].to_numpy()))
    c2_hit = cmp.table[(cmp.table.metric == "hit_rate@10") & (cmp.table.candidate == "c2")].iloc[0]
    assert c2_hit["difference"] == 0 and c2_hit["ci_low"] == c2_hit["ci_high"] == 0 and c2_hit["p_value"] == 1.0
    row = cmp.table[(cmp.table.metric == "ndcg@10") & (cmp.table.candidate == "c1")].iloc[0]
    assert row["relative_change"] == pytest.approx((ndcg_c.mean() - ndcg_b.mean()) / ndcg_b.mean())
    assert row["ci_low"] <= row["difference"] <= row["ci_high"]
    json.dumps(cmp.to_dict())
    assert "<table" in cmp._repr_html_() and "c1" in repr(cmp)
    # seeded: same inputs, same numbers
    pd.testing.assert_frame_equal(cmp.table, compare(*cards, n_resamples=2000).table)


def test_users_are_aligned_and_must_match():
    rng = np.random.default_rng(6)
    v = rng.random(50)
    a = card("a", {"ndcg@10": v})
    perm = rng.permutation(50)
    b = card("b", {"ndcg@10": v[perm] + 0.1}, users=perm)  # same users, other order
    row = compare(a, b, n_resamples=500).table.iloc[0]
    assert row["difference"] == pytest.approx(0.1)
    with pytest.raises(DataError, match="different users"):
        compare(a, card("c", {"ndcg@10": v[:49]}))
    with pytest.raises(ConfigError, match="not in every"):
        compare(a, b, metrics=["recall@10"])
    with pytest.raises(ConfigError, match="candidate"):
        compare(a)
    with pytest.raises(ConfigError, match="protocol"):
        compare(a, card("s", {"ndcg@10": v}, protocol={"kind": "sampled_negatives", "n_negatives": 5, "seed": 0}))


def test_compare_works_on_scorecards_read_back_from_dicts(paired):
    base, cand, _, _ = paired
    a, b = card("a", {"hit_rate@10": base}), card("b", {"hit_rate@10": cand})
    direct = compare(a, b, n_resamples=1000).table
    again = compare(Scorecard.from_dict(a.to_dict()), Scorecard.from_dict(b.to_dict()), n_resamples=1000).table
    pd.testing.assert_frame_equal(direct, again)


def test_scorecards_of_different_folds_are_refused():
    # Same users, different folds (a validation and a test scorecard): pairing them is meaningless.
    values = {"ndcg@10": np.linspace(0, 1, 20)}
    a, b = card("a", values), card("b", values)
    a.fold_settings = {"rule": "leave_last", "part": "validation"}
    b.fold_settings = {"rule": "leave_last", "part": "test"}
    with pytest.raises(DataError, match="another fold.*part: 'validation' vs 'test'"):
        compare(a, b, n_resamples=10)
    b.fold_settings = dict(a.fold_settings)
    assert len(compare(a, b, n_resamples=10).table) == 1


def test_normal_interval_matches_scipy_norm_interval():
    values = np.random.default_rng(3).random(200)
    # Source: scipy.stats.norm.interval(confidence, loc=mean, scale=standard error of the mean)
    # is the normal-approximation interval mean ± z·s/√n.
    ref = stats.norm.interval(0.9, loc=values.mean(), scale=stats.sem(values))
    mean, lo, hi = normal_interval(np.append(values, np.nan), 0.9)  # NaN (users without a value) left out
    assert mean == pytest.approx(values.mean()) and (lo, hi) == pytest.approx(ref)
    assert normal_interval(np.array([0.5]), 0.95) == (0.5, 0.5, 0.5)
    assert all(np.isnan(normal_interval(np.array([np.nan]), 0.95)))
