"""The two-sided objective of the gated search (``objective="sides"``): values and behaviour.

Per-side values are checked against scikit-learn's ``ndcg_score`` per user grouped by side with
a plain pandas ``groupby``, and the objective against its formula worked from those numbers.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import ndcg_score

from xrec.blend.engine import BlendEngine
from xrec.blend.gating import PopularityBands, learn_gated_weights
from xrec.blend._sides import TIE_BREAK, SideObjective
from xrec.blend.normalize import normalize
from xrec.errors import ConfigError

from _synthetic import argmax_heldout, fixed_sources, pairs_frame, synthetic_fold


def sided_problem(n_users=200, n_items=60, n_new=8, seed=0):
    """Items 0..n_new-1 never trained; users 0..39 hold out their best new item (by s2), the
    others their best known item (by s0 + s1); a minority of users is on the new side."""
    rng = np.random.default_rng(seed)
    rows = [(u, int(i)) for u in range(n_users) for i in rng.choice(np.arange(n_new, n_items), 5, replace=False)]
    probe = synthetic_fold(n_users, n_items, pairs_frame(rows))
    raws = [rng.standard_normal((n_users, n_items)).astype(np.float32) for _ in range(3)]
    z = [normalize(r, "zscore", probe.train_matrix) for r in raws]
    is_new = np.arange(n_items) < n_new
    truth = np.where(is_new, -1e3, z[0] + z[1])
    truth[:40] = np.where(is_new, z[2][:40], -1e3)
    fold = argmax_heldout(probe, truth + 0.01 * rng.standard_normal(truth.shape))
    return fold, fixed_sources(fold, raws), raws


def _sklearn_ndcg(fold, raws, weights, k=10):
    """Per-user NDCG@k of the z-scored weighted sum, by scikit-learn (seen items pushed to the bottom)."""
    seen = fold.train_matrix.toarray() > 0
    total = sum(w * normalize(r, "zscore", fold.train_matrix) for w, r in zip(weights, raws, strict=True))
    held = fold.heldout.groupby("user_idx")["item_idx"].first()
    out = {}
    for u, item in held.items():
        scores = np.where(seen[u], -1e9, total[u]).astype(np.float64)
        rel = np.zeros(fold.n_items)
        rel[item] = 1.0
        out[u] = ndcg_score([rel], [scores], k=k)  # scikit-learn's NDCG (Järvelin & Kekäläinen), outside reference
    return pd.Series(out)


def test_side_values_match_sklearn_grouped_by_side():
    fold, sources, raws = sided_problem()
    engine = BlendEngine(sources, fold, "zscore", metric="ndcg@10", ks=(10,)).prepare()
    obj, details = SideObjective.build(engine, min_users=10)
    assert obj is not None
    # sides by pandas: a user is on the new side when the held-out item has no training row
    counts = fold.train.groupby("item_idx").size().reindex(range(fold.n_items), fill_value=0)
    held = fold.heldout.groupby("user_idx")["item_idx"].first()
    side = pd.Series(np.where(counts[held.to_numpy()].to_numpy() == 0, "new", "known"), index=held.index)
    assert details["side_users"] == side.value_counts().to_dict()
    # references: the best single source per side, from sklearn per-user values grouped with pandas
    corner = {n: _sklearn_ndcg(fold, raws, np.eye(3)[j]).groupby(side).mean() for j, n in enumerate(sources)}
    for s in ("known", "new"):
        name = max(corner, key=lambda n: corner[n][s])
        assert obj.references[s][0] == name
        assert obj.references[s][1] == pytest.approx(corner[name][s], abs=1e-9)
    w = np.array([0.5, 0.3, 0.2])
    expected = _sklearn_ndcg(fold, raws, w).groupby(side).mean()
    got = obj.per_side(dict(zip(sources, w.tolist(), strict=True)))
    assert got["known"] == pytest.approx(expected["known"], abs=1e-9)
    assert got["new"] == pytest.approx(expected["new"], abs=1e-9)
    # J worked from the module's formula with these numbers
    ratio = np.array([expected["known"] / obj.references["known"][1], expected["new"] / obj.references["new"][1]])
    assert obj(dict(zip(sources, w.tolist(), strict=True))) == pytest.approx(ratio.min() + TIE_BREAK * ratio.mean(), abs=1e-9)


@pytest.mark.parametrize("search", ["fast", "exhaustive"])
def test_sides_objective_lifts_the_starved_new_side(search):
    fold, sources, _ = sided_problem(seed=1)
    engine = BlendEngine(sources, fold, "zscore", metric="ndcg@10", ks=(10,)).prepare()
    bands = PopularityBands.from_counts(fold.item_train_counts, 0.5)
    start = {"s0": 0.5, "s1": 0.5, "s2": 0.0}  # what an overall search on known-heavy users would pick
    opts = dict(start=start, n_restarts=1, refine=1, max_sweeps=3, seed=0, min_band_heldout=10, search=search)
    overall = learn_gated_weights(engine, bands, objective="overall", **opts)
    sides = learn_gated_weights(engine, bands, objective="sides", **opts)
    assert sides.details["objective_used"] == "sides" and overall.details["objective_used"] == "overall"
    obj, _ = SideObjective.build(engine, 10)
    to_w = lambda r: {n: np.asarray([r.band_weights[b][n] for b in ("new", "tail", "head")], np.float32)[  # noqa: E731
        bands.assign(fold.item_train_counts)] for n in sources}
    # the chosen blend is the one the objective prefers, and it is reported as such
    assert sides.details["objective_value"]["chosen"] == pytest.approx(obj(to_w(sides)), abs=1e-9)
    assert obj(to_w(sides)) >= obj(to_w(overall)) - 1e-12
    assert sides.details["side_scores"]["new"] > overall.details.get("side_scores", obj.per_side(to_w(overall)))["new"]
    # the new band leans on s2, the source that decides new items
    assert max(sides.band_weights["new"], key=sides.band_weights["new"].get) == "s2"
    # valid_score stays the overall metric of the chosen weights
    assert sides.valid_score == pytest.approx(engine.score(to_w(sides)), abs=1e-12)


def test_a_side_too_small_falls_back_to_overall_and_says_why():
    fold, sources, _ = sided_problem(seed=2)
    engine = BlendEngine(sources, fold, "zscore", metric="ndcg@10", ks=(10,)).prepare()
    result = learn_gated_weights(engine, start={n: 1.0 for n in sources}, objective="sides", min_band_heldout=41,
                                 n_restarts=0, refine=1, max_sweeps=1)
    assert result.details["objective_used"] == "overall"
    assert "new" in result.details["reason"] and "41" in result.details["reason"]
    with pytest.raises(ConfigError, match="objective"):
        learn_gated_weights(engine, objective="both")


def test_side_baselines_choose_the_reference_among_named_sources():
    fold, sources, raws = sided_problem(seed=3)
    engine = BlendEngine(sources, fold, "zscore", metric="ndcg@10", ks=(10,)).prepare()
    free, _ = SideObjective.build(engine, 10)
    assert free.references["new"][0] == "s2"  # the source that decides new items
    limited, details = SideObjective.build(engine, 10, {"new": ["s0", "s1"]})
    assert limited.references["new"][0] in ("s0", "s1") and limited.references["known"] == free.references["known"]
    assert details["side_reference"]["new"]["source"] == limited.references["new"][0]
    with pytest.raises(ConfigError, match="side_baselines"):
        SideObjective.build(engine, 10, {"new": ["s9"]})
    with pytest.raises(ConfigError, match="side_baselines"):
        learn_gated_weights(engine, side_baselines={"new": ["s0"]})
