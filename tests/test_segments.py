"""Results by segment: labels, per-segment scorecard means and paired comparisons with Holm over segments.

References: pandas groupby on the per-user table (an outside library computing the same group
means), Holm (1979) worked by hand, scipy for the per-segment interval.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from _synthetic import FixedScores, interaction_frame
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.evaluate import compare, evaluate
from xrec.evaluate.breakdown import item_segments, segment_labels
from xrec.fold import Fold

N_USERS, N_ITEMS = 120, 40


@pytest.fixture(scope="module")
def fold():
    rng = np.random.default_rng(7)
    # Item popularity falls steeply with the index; items 30-39 never appear in training (new).
    weights = 1.0 / (1.0 + np.arange(30)) ** 1.2
    rows = []
    for u in range(N_USERS):
        n = 1 + (u % 25)  # history lengths 1..25
        rows += [(u, j) for j in rng.choice(30, size=min(n, 30), replace=False, p=weights / weights.sum())]
    train = interaction_frame(*np.array(rows).T)
    held = []
    for u in range(N_USERS):
        seen = {j for uu, j in rows if uu == u}
        choices = [j for j in range(N_ITEMS) if j not in seen]
        held.append((u, choices[rng.integers(len(choices))]))
        if u % 10 == 0:  # some users hold two items out
            held.append((u, next(j for j in choices if j != held[-1][1])))
    frame = pd.DataFrame({"item": [f"i{j}" for j in range(N_ITEMS)], "kind": [["mug", "shirt", "hat"][j % 3] for j in range(N_ITEMS)],
                          "season": [["summer", None][j % 2] for j in range(N_ITEMS)]})
    catalog = Catalog.from_frame(frame, categorical=["kind"])
    return Fold(catalog, np.array([f"u{u}" for u in range(N_USERS)]), train, interaction_frame(*np.array(held).T),
                settings={"rule": "synthetic"})


@pytest.fixture(scope="module")
def cards(fold):
    rng = np.random.default_rng(3)
    pop = np.tile(fold.item_train_counts.astype(np.float32), (N_USERS, 1))
    noise = rng.random((N_USERS, N_ITEMS)).astype(np.float32)
    truth = fold.heldout_matrix.toarray()
    better = pop + 30 * truth * (rng.random((N_USERS, 1)) < 0.4)  # finds the held-out item for ~40 % of users
    return {name: evaluate(FixedScores(m).fit(fold), fold, ks=(5, 10), name=name)
            for name, m in {"pop": pop, "noise": noise, "better": better}.items()}


def test_item_segments_follow_the_popularity_share(fold):
    counts = fold.item_train_counts
    labels = item_segments(fold, head_share=0.5)
    assert set(labels[counts == 0]) == {"new"}
    head = labels == "head"
    # The head holds at least half of the training interactions, and dropping its least-trained
    # count level would fall under half (common practice, no source: head by cumulative share).
    assert counts[head].sum() >= 0.5 * counts.sum()
    assert counts[head & (counts > counts[head].min())].sum() < 0.5 * counts.sum()
    assert counts[labels == "tail"].max() < counts[head].min()
    assert set(item_segments(fold, head_share=1.0)[counts > 0]) == {"head"}
    with pytest.raises(ConfigError, match="head_share"):
        item_segments(fold, head_share=0)


def test_labels_come_from_the_heldout_items_and_histories(fold):
    item = segment_labels(fold, "item_segment")
    users = fold.eval_users
    assert list(item.index) == list(users) and item.name == "item_segment"
    per_item = item_segments(fold)
    held = fold.heldout.groupby("user_idx")["item_idx"].agg(lambda s: {per_item[j] for j in s})
    # pandas as the reference: one label per user, "mixed" when its held-out items differ.
    expected = held.map(lambda s: next(iter(s)) if len(s) == 1 else "mixed")
    assert item.to_dict() == expected.to_dict()
    hist = segment_labels(fold, "user_segment", history_edges=(5, 20))
    lengths = fold.train.groupby("user_idx").size()
    assert (hist[lengths[lengths < 5].index] == "0-4").all()
    assert (hist[lengths[(lengths >= 5) & (lengths < 20)].index] == "5-19").all()
    assert (hist[lengths[lengths >= 20].index] == "20+").all()
    kind = segment_labels(fold, "kind")
    assert set(kind) <= {"mug", "shirt", "hat", "mixed"}
    assert "(missing)" in set(segment_labels(fold, "season"))  # an undeclared column, with gaps
    with pytest.raises(ConfigError, match="catalog column"):
        segment_labels(fold, "colour")


@pytest.mark.parametrize("by", ["item_segment", "user_segment", "kind"])
def test_segment_means_equal_a_pandas_groupby(fold, cards, by):
    labels = segment_labels(fold, by)
    card = cards["better"]
    table = card.by_segment(labels, min_users=5)
    # pandas as the reference: a plain groupby of the per-user table by the users' labels.
    ref = card.per_user.assign(seg=card.per_user["user"].map(labels)).groupby("seg")
    for metric in card.metric_columns:
        rows = table[table["metric"] == metric].set_index("segment")
        np.testing.assert_allclose(rows["mean"].sort_index(), ref[metric].mean().sort_index(), rtol=1e-12)
        assert rows["n_users"].sort_index().tolist() == ref.size().sort_index().tolist()
    assert set(table["by"]) == {by}


def test_segment_interval_is_the_bootstrap_of_the_segment_alone(fold, cards):
    from scipy import stats

    labels = segment_labels(fold, "user_segment", history_edges=(10,))
    card = cards["better"]
    table = card.by_segment(labels, ["ndcg@10"], n_resamples=4000, seed=2).set_index("segment")
    for segment, row in table.iterrows():
        values = card.per_user.loc[card.per_user["user"].map(labels) == segment, "ndcg@10"].to_numpy()
        # Source: scipy.stats.bootstrap(method="percentile") on the segment's users only.
        ref = stats.bootstrap((values,), np.mean, method="percentile", n_resamples=4000, random_state=1).confidence_interval
        # Monte Carlo error of a 2.5 % quantile of 4,000 resamples: a few hundredths of an SE; the
        # per-user values take few distinct levels, so allow one step of 1/n of the largest value too.
        tol = 0.25 * values.std(ddof=1) / np.sqrt(len(values)) + values.max() / len(values)
        assert abs(row["ci_low"] - ref.low) < tol and abs(row["ci_high"] - ref.high) < tol


def test_small_segments_are_flagged_with_their_size(fold, cards):
    labels = segment_labels(fold, "item_segment")
    sizes = labels.value_counts()
    min_users = int(sizes.sort_values().iloc[len(sizes) // 2])  # about half the segments fall under it
    table = cards["better"].by_segment(labels, ["ndcg@10"], min_users=min_users).set_index("segment")
    for segment, n in sizes.items():
        assert table.loc[segment, "n_users"] == n
        assert table.loc[segment, "small"] == (n < min_users)
        assert np.isnan(table.loc[segment, "ci_low"]) == (n < min_users)
    cmp = compare(cards["pop"], cards["better"], metrics=["ndcg@10"], by=labels, min_users=min_users, n_resamples=500)
    seg = cmp.segments.set_index("segment")
    for segment, n in sizes.items():
        assert seg.loc[segment, "small"] == (n < min_users)
        assert np.isnan(seg.loc[segment, "p_value"]) == (n < min_users)
        assert seg.loc[segment, "n_users"] == n


def test_segment_comparison_is_the_comparison_of_each_segment_with_holm_over_segments(fold, cards):
    labels = segment_labels(fold, "user_segment", history_edges=(8, 16))
    cmp = compare(cards["pop"], cards["better"], cards["noise"], metrics=["hit_rate@10", "ndcg@10"], by=labels,
                  min_users=5, n_resamples=800, seed=4)
    seg = cmp.segments
    assert not seg["small"].any()
    for segment in seg["segment"].unique():
        users = labels.index[labels == segment].to_numpy()
        subset = [c.per_user[c.per_user["user"].isin(users)] for c in (cards["pop"], cards["better"])]
        diff = subset[1]["ndcg@10"].to_numpy() - subset[0]["ndcg@10"].to_numpy()
        row = seg[(seg["segment"] == segment) & (seg["metric"] == "ndcg@10") & (seg["candidate"] == "better")].iloc[0]
        assert row["difference"] == pytest.approx(diff.mean())  # pandas subset as the reference
        assert row["ci_low"] <= row["difference"] <= row["ci_high"]
    for (metric, cand), family in seg.groupby(["metric", "candidate"]):
        p = family["p_value"].to_numpy()
        # Holm (1979) step-down by hand: sort ascending, scale the j-th (0-based) by (m - j),
        # carry the running maximum, cap at 1.
        order = np.argsort(p, kind="stable")
        expected = np.empty_like(p)
        expected[order] = np.minimum(1, np.maximum.accumulate((len(p) - np.arange(len(p))) * p[order]))
        np.testing.assert_allclose(family["p_holm_segments"], expected)
        # Source: statsmodels.stats.multitest.multipletests(method="holm") on the same family.
        from statsmodels.stats.multitest import multipletests

        np.testing.assert_allclose(family["p_holm_segments"], multipletests(p, method="holm")[1])
    plain = json.loads(json.dumps(cmp.to_dict()))
    assert len(plain["segments"]) == len(seg) and plain["settings"]["min_users"] == 5


def test_holm_over_segments_on_a_worked_example():
    from xrec.evaluate._stats import holm

    # Holm (1979) worked by hand for four segments, p = (0.004, 0.030, 0.020, 0.600):
    # sorted 0.004, 0.020, 0.030, 0.600; scaled by 4, 3, 2, 1 -> 0.016, 0.060, 0.060, 0.600;
    # running maximum -> 0.016, 0.060, 0.060, 0.600; back in segment order:
    np.testing.assert_allclose(holm(np.array([0.004, 0.030, 0.020, 0.600])), [0.016, 0.060, 0.060, 0.600])
    # Only the first segment stays under 0.05 after the adjustment, though three were before it.
    from statsmodels.stats.multitest import multipletests

    p = np.array([0.004, 0.030, 0.020, 0.600, 0.049])
    np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1])  # Source: statsmodels


def test_bad_labels_are_refused(fold, cards):
    labels = segment_labels(fold, "item_segment")
    with pytest.raises(DataError, match="no segment label"):
        cards["pop"].by_segment(labels.iloc[3:])
    with pytest.raises(ConfigError, match="pandas Series"):
        compare(cards["pop"], cards["better"], by=[{"a": 1}], n_resamples=10)
    with pytest.raises(ConfigError, match="needs fold="):
        cards["pop"].by_segment("item_segment")


def test_breakdowns_by_name_equal_breakdowns_by_labels(fold, cards):
    by_name = cards["better"].by_segment(["item_segment", "kind"], ["ndcg@10"], fold=fold)
    by_labels = cards["better"].by_segment([segment_labels(fold, "item_segment"), segment_labels(fold, "kind")], ["ndcg@10"])
    pd.testing.assert_frame_equal(by_name, by_labels)
    a = compare(cards["pop"], cards["better"], metrics=["ndcg@10"], by="user_segment", fold=fold, n_resamples=200)
    b = compare(cards["pop"], cards["better"], metrics=["ndcg@10"], by=segment_labels(fold, "user_segment"), n_resamples=200)
    pd.testing.assert_frame_equal(a.segments, b.segments)


def test_segment_charts_are_valid_vega_lite_and_carry_the_tables(fold, cards):
    import altair as alt
    import jsonschema
    from pathlib import Path

    from xrec.notebook import segment_differences, segment_means

    # The published Vega-Lite JSON schema (draft-07), as shipped inside the altair package.
    schema = json.loads((Path(alt.__file__).parent / "vegalite" / "v6" / "schema" / "vega-lite-schema.json").read_text())
    validator = jsonschema.Draft7Validator(schema)
    labels = [segment_labels(fold, "item_segment"), segment_labels(fold, "kind")]
    means = segment_means(cards, "hit_rate@10", labels)
    cmp = compare(cards["pop"], cards["better"], cards["noise"], metrics=["hit_rate@10"], by=labels, n_resamples=300)
    diffs = segment_differences(cmp, "hit_rate@10")
    for chart in (means, diffs):
        spec = chart.to_dict()
        errors = list(validator.iter_errors(spec))
        assert not errors, errors[0].message
    rows = [r for values in diffs.to_dict()["datasets"].values() for r in values if "by" in r]  # the zero rule has no rows
    table = cmp.segments
    assert len(rows) == len(table)
    for r in rows:
        ref = table[(table["by"] == r["by"]) & (table["segment"] == r["segment"]) & (table["candidate"] == r["candidate"])].iloc[0]
        assert r["difference"] == pytest.approx(ref["difference"])
        assert r["segment_n"] == f"{r['segment']} (n={ref['n_users']})"
    with pytest.raises(ConfigError, match="no segments"):
        segment_differences(compare(cards["pop"], cards["better"], n_resamples=10))
    with pytest.raises(ConfigError, match="not in the segment table"):
        segment_differences(cmp, "ndcg@5")
