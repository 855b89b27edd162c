"""The fast weight search: one-pass lines equal the engine per point; brute force finds no better blend."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from sklearn.metrics import ndcg_score

from xrec.blend._fast_search import fast_coordinate_ascent
from xrec.blend._line import LineEvaluator
from xrec.blend.engine import BlendEngine
from xrec.blend.gating import PopularityBands, learn_gated_weights
from xrec.errors import ConfigError

from test_engine import make_fold, make_sources
from test_learn import known_blend_problem

GRID = (0.0, 0.02, 0.05, 0.1, 0.3, 0.5, 0.9, 1.7, 4.0)


def engine_values(engine, weights):
    """Per-user main metric of ``weights`` by the engine, one full evaluation."""
    engine.evaluate(weights)
    return engine.per_user()[engine.metric].to_numpy()


@pytest.mark.parametrize("multi", [False, True])
@pytest.mark.parametrize("normalizers", ["zscore", {"coarse": "rank", "dense": "minmax", "pop": "zscore", "mf": "none"}])
def test_line_equals_engine_point_by_point(multi, normalizers):
    fold = make_fold(n_users=70, n_items=50, seed=1, multi=multi)
    sources = make_sources(fold, seed=2)
    factorized = ["mf"] if isinstance(normalizers, dict) else False
    engine = BlendEngine(sources, fold, normalizers, ks=(5,), metric="ndcg@5", factorized=factorized).prepare()
    ev = LineEvaluator(engine)
    rows = np.arange(0, len(engine.users_), 3)
    sub = LineEvaluator(engine, rows)
    rng = np.random.default_rng(0)
    band = rng.random(fold.n_items) < 0.4
    for trial in range(2):
        w = dict(zip(engine.names_, rng.dirichlet(np.ones(4)).tolist(), strict=True))
        if trial == 1:
            w["pop"] = 0.0  # a source that is off, before it comes on
        for name in engine.names_:
            line = ev.line(w, name, min(GRID), max(GRID))
            got = line.values(GRID)
            want = np.array([engine_values(engine, w | {name: t}) for t in GRID])
            np.testing.assert_array_equal(got, want)
            np.testing.assert_array_equal(sub.line(w, name, min(GRID), max(GRID)).values(GRID), want[:, rows])
            # The same source moving on the items of one band only (per-item weights).
            vec = {n: np.where(band, x, 0.5 * x).astype(np.float32) for n, x in w.items()}
            got = ev.line(vec, name, min(GRID), max(GRID), band=band).values(GRID)
            want = np.array([engine_values(engine, vec | {name: np.where(band, np.float32(t), vec[name])}) for t in GRID])
            np.testing.assert_array_equal(got, want)


def test_sample_rows_read_in_place_when_a_copy_is_too_big(monkeypatch):
    import xrec.blend._line as line_module

    fold = make_fold(n_users=50, n_items=30, seed=3, multi=False)
    engine = BlendEngine(make_sources(fold), fold, "zscore", ks=(5,), metric="mrr@5", factorized=False).prepare()
    rows = np.arange(1, len(engine.users_), 2)
    w = {n: 1.0 for n in engine.names_}
    copied = LineEvaluator(engine, rows).line(w, "pop", 0.0, 4.0).values(GRID)
    monkeypatch.setattr(line_module, "_COPY_BYTES", 0)
    in_place = LineEvaluator(engine, rows)
    assert not in_place._copies
    np.testing.assert_array_equal(in_place.line(w, "pop", 0.0, 4.0).values(GRID), copied)


def test_line_refuses_weights_outside_its_range():
    fold = make_fold(n_users=30, n_items=20, seed=0, multi=False)
    engine = BlendEngine(make_sources(fold), fold, "zscore", ks=(5,), metric="hit_rate@5", factorized=False).prepare()
    line = LineEvaluator(engine).line({n: 1.0 for n in engine.names_}, "dense", 0.5, 2.0)
    with pytest.raises(ValueError, match="outside"):
        line.values([3.0])


def reference_ndcg(blocks, weights, fold, k=10):
    """NDCG@k of the float32 blend by scikit-learn (``sklearn.metrics.ndcg_score``), the
    sum taken in source order as the engine and ``Blend.score`` do."""
    acc = blend32(blocks, weights)
    acc = np.where(np.isfinite(acc), acc, -1e30).astype(np.float64)
    truth = fold.heldout_matrix.toarray()
    return ndcg_score(truth, acc, k=k)


def blend32(blocks, weights):
    acc = None
    for b, w in zip(blocks, weights, strict=True):
        if w > 0:
            term = b * np.float32(w)
            acc = term if acc is None else acc + term
    return acc


def brute_force(blocks, fold, steps=20, k=10):
    """Best NDCG@k over every point of the share lattice (steps of 1/steps) on the simplex.

    Independent of the engine: rank = 1 + candidates (unseen items) scoring at least the
    held-out item; NDCG@k of one relevant item = 1/log2(rank + 1) when rank <= k
    (Järvelin & Kekäläinen, TOIS 2002, binary gains).
    """
    target = fold.heldout_matrix.tocsr().indices
    best = -1.0
    for point in itertools.product(range(steps + 1), repeat=len(blocks) - 1):
        if sum(point) > steps:
            continue
        w = [p / steps for p in point] + [(steps - sum(point)) / steps]
        acc = blend32(blocks, w)
        t = acc[np.arange(len(acc)), target][:, None]
        rank = 1 + (np.nan_to_num(acc, nan=-np.inf) >= t).sum(axis=1) - 1
        ndcg = np.where(rank <= k, 1.0 / np.log2(rank + 1.0), 0.0).mean()
        best = max(best, float(ndcg))
    return best


def planted_engine(n_sources):
    weights = (0.6, 0.3, 0.1)[:n_sources]
    fold, sources = known_blend_problem(n_users=240, n_items=80, weights=weights, noise=0.8, seed=4)
    engine = BlendEngine(sources, fold, "zscore", ks=(10,), metric="ndcg@10").prepare()
    return fold, engine, [engine.blocks_[n] for n in engine.names_]


@pytest.fixture(scope="module")
def planted():
    fold, engine, blocks = planted_engine(3)
    return fold, engine, blocks, brute_force(blocks, fold)


def test_two_sources_reach_the_grid_optimum_exactly():
    # With two sources one line search is the whole brute force over the grid.
    fold, engine, blocks = planted_engine(2)
    grid = np.round(np.arange(0, 1.0001, 0.05), 2)
    result = fast_coordinate_ascent(engine, grid=grid, refine=0, n_restarts=0, seed=0, sample=False)
    assert result.valid_score == pytest.approx(brute_force(blocks, fold), abs=1e-12)


@pytest.mark.parametrize("options", [{"sample": False}, {"min_users": 60}])
def test_finds_the_brute_force_optimum(planted, options):
    fold, engine, blocks, best = planted
    grid = np.round(np.arange(0, 1.0001, 0.05), 2)
    result = fast_coordinate_ascent(engine, grid=grid, n_restarts=3, seed=0, stop_z=0.0, **options)
    w = [result.weights[n] for n in engine.names_]
    # The reported score is the outside reference's score of the chosen weights...
    assert result.valid_score == pytest.approx(reference_ndcg(blocks, w, fold), abs=1e-12)
    # ...and no blend on the lattice beats it.
    assert result.valid_score >= best - 1e-12
    if "min_users" in options:
        assert [r["users"] for r in result.details["rungs"]] == [60, 120, 240]


def test_cached_evaluators_do_not_keep_the_engine_alive():
    import gc
    import weakref

    fold = make_fold(n_users=40, n_items=30, seed=4, multi=False)
    engine = BlendEngine(make_sources(fold), fold, "zscore", ks=(5,), metric="ndcg@5", factorized=False).prepare()
    fast_coordinate_ascent(engine, n_restarts=1, seed=0, min_users=10)
    ref = weakref.ref(engine)
    del engine
    gc.collect()
    assert ref() is None


def test_seeded_and_deterministic(planted):
    _, engine, _, _ = planted
    a = fast_coordinate_ascent(engine, n_restarts=3, seed=5, min_users=60)
    b = fast_coordinate_ascent(engine, n_restarts=3, seed=5, min_users=60)
    assert a.weights == b.weights and a.valid_score == b.valid_score
    assert a.history.equals(b.history)


def test_gated_search_scores_exactly_and_never_below_its_start(planted):
    fold, engine, _, _ = planted
    start = {"s0": 0.2, "s1": 0.5, "s2": 0.3}
    result = learn_gated_weights(engine, start=start, seed=0, min_users=60, n_restarts=1)
    assert result.valid_score >= result.best_single[1]
    assert result.best_single[1] == engine.score(start)
    bands = PopularityBands(int(result.details["head_min"]))
    item_band = bands.assign(fold.item_train_counts)
    table = np.array([[result.band_weights[b][n] for n in engine.names_] for b in ("new", "tail", "head")], dtype=np.float32)
    assert result.valid_score == engine.score({n: table[item_band, j] for j, n in enumerate(engine.names_)})


def test_settings_are_checked(planted):
    _, engine, _, _ = planted
    with pytest.raises(ConfigError, match="stop_z"):
        fast_coordinate_ascent(engine, stop_z=-1)
    with pytest.raises(ConfigError, match="grid"):
        fast_coordinate_ascent(engine, grid=(0.0, 1.5))
    with pytest.raises(ConfigError, match="n_restarts"):
        fast_coordinate_ascent(engine, n_restarts=True)
