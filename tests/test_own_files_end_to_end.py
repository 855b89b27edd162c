"""End to end from the CLI: a generated catalog and interactions (Parquet), its item vectors
(.npy and Parquet) and a production ranking file (CSV) named in a spec; the ranking is the
baseline of the comparison."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import pytrec_eval
from sklearn.metrics.pairwise import cosine_similarity
from sklearn.preprocessing import normalize

from xrec.experiment import run_experiment
from xrec.spec import load_spec

REPO = Path(__file__).resolve().parents[1]
N_USERS, N_ITEMS, DIM, DEPTH = 40, 60, 8, 15


def _generate(folder: Path) -> Path:
    """A seeded shop whose purchases follow hidden tastes (test input, never a reference)."""
    rng = np.random.default_rng(11)
    latent = rng.normal(size=(N_ITEMS, DIM))
    taste = rng.normal(size=(N_USERS, DIM))
    items = [f"p{j:03d}" for j in range(N_ITEMS)]
    # catalog and interactions as Parquet (pyarrow), the files a team already has
    pd.DataFrame({"item": items, "colour": rng.choice(["red", "blue", "green"], N_ITEMS)}).to_parquet(folder / "items.parquet")
    rows = []
    for u in range(N_USERS):
        pref = np.exp(taste[u] @ latent.T / 2)
        bought = rng.choice(N_ITEMS, size=int(rng.integers(4, 9)), replace=False, p=pref / pref.sum())
        rows += [{"user": f"c{u}", "item": items[j], "timestamp": 1_700_000_000 + 3600 * (u * 10 + t)} for t, j in enumerate(bought)]
    pd.DataFrame(rows).to_parquet(folder / "events.parquet")
    # the item vectors a team computed elsewhere: the hidden factors plus noise, in shuffled order
    vectors = (latent + rng.normal(scale=0.3, size=latent.shape)).astype(np.float32)
    order = rng.permutation(N_ITEMS)
    (folder / "vectors").mkdir()
    np.save(folder / "vectors" / "items.npy", vectors[order])
    (folder / "vectors" / "ids.txt").write_text("\n".join(items[j] for j in order) + "\n", encoding="utf-8")
    flat = pa.FixedSizeListArray.from_arrays(pa.array(vectors[order].ravel()), DIM)
    pq.write_table(pa.table({"item": [items[j] for j in order], "embedding": flat}), folder / "vectors" / "items.parquet")
    # the live ranking: top-DEPTH by a noisy taste score, distinct scores; user c39 is absent,
    # one row names an unknown user and one an unknown item
    ranking = []
    for u in range(N_USERS - 1):
        noisy = taste[u] @ latent.T + rng.normal(scale=1.0, size=N_ITEMS)
        for j in np.argsort(-noisy)[:DEPTH]:
            ranking.append({"user": f"c{u}", "item": items[j], "score": round(float(noisy[j]), 6)})
    ranking += [{"user": "stranger", "item": items[0], "score": 1.0}, {"user": "c0", "item": "retired", "score": 99.0}]
    pd.DataFrame(ranking).to_csv(folder / "current.csv", index=False)
    spec = folder / "own.toml"
    spec.write_text(
        """
name = "own files"
[data]
dataset = "files"
catalog = "items.parquet"
interactions = "events.parquet"
categorical = ["colour"]
[split]
rule = "leave_last"
validation = false
[evaluate]
ks = [10]
metrics = ["hit_rate", "ndcg", "recall"]
baseline = "current"
[sources.current]
kind = "ranking"
path = "current.csv"
[sources.vec_npy]
kind = "vectors"
path = "vectors/items.npy"
ids = "vectors/ids.txt"
[sources.vec_parquet]
kind = "vectors"
path = "vectors/items.parquet"
[sources.popularity]
kind = "popularity"
[sources.bridged]
kind = "cross_modal"
bridge = "ridge"
profile = "image"
items = "text"
image_vectors = { path = "vectors/items.npy", ids = "vectors/ids.txt" }
text_vectors = "vectors/items.parquet"
[sources.fused]
kind = "early_fusion"
modalities = ["attributes", "mine"]
vectors = { mine = "vectors/items.parquet" }
[blends.mix_z]
normalizer = "zscore"
weights = { current = 1.0, vec_parquet = 0.5 }
[blends.mix_rank]
normalizer = "rank"
weights = { current = 1.0, vec_npy = 0.5, popularity = 0.2 }
[blends.mix_minmax]
normalizer = "minmax"
weights = { current = 1.0, vec_npy = 0.5 }
""",
        encoding="utf-8",
    )
    return spec


@pytest.fixture(scope="module")
def shop(tmp_path_factory):
    return _generate(tmp_path_factory.mktemp("own_files"))


def test_cli_runs_the_spec_with_the_ranking_as_baseline(shop, tmp_path):
    # run from another folder: the spec's paths are relative to the spec file, not to the cwd
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    done = subprocess.run(
        [sys.executable, "-m", "xrec.cli", "run", str(shop), "--json"], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300
    )
    assert done.returncode == 0, done.stderr
    payload = json.loads(done.stdout)
    cards = payload["scorecards"]
    assert set(cards) == {"current", "vec_npy", "vec_parquet", "popularity", "bridged", "fused", "mix_z", "mix_rank", "mix_minmax"}
    assert payload["comparison"]["baseline"] == "current"
    assert set(payload["comparison"]["candidates"]) == set(cards) - {"current"}
    # the same vectors from .npy and Parquet give the same ranking
    assert cards["vec_npy"]["ndcg@10"]["mean"] == pytest.approx(cards["vec_parquet"]["ndcg@10"]["mean"], abs=1e-12)
    # the two unknown rows are reported, not silently dropped
    assert "left out 2 of" in done.stderr


def test_vector_scores_are_cosines_and_ranking_metrics_match_pytrec_eval(shop):
    with pytest.warns(UserWarning, match="left out 2 of"):
        result = run_experiment(load_spec(shop))
    fold = result.split.test
    items = fold.catalog.item_ids

    # vectors source: cosine of (mean of the unit history vectors) and each item, computed by
    # scikit-learn's cosine_similarity (reference library)
    vec = np.load(shop.parent / "vectors" / "items.npy")
    ids = (shop.parent / "vectors" / "ids.txt").read_text(encoding="utf-8").split()
    by_id = dict(zip(ids, vec))
    catalog_vectors = np.array([by_id[i] for i in items])
    unit = normalize(catalog_vectors)
    history = fold.train_matrix.toarray() > 0
    users = np.flatnonzero(history.any(axis=1))
    profiles = np.array([unit[history[u]].mean(axis=0) for u in users])
    expected = cosine_similarity(profiles, catalog_vectors)
    for name in ("vec_npy", "vec_parquet"):
        np.testing.assert_allclose(result.scorers[name].score(users), expected, atol=1e-5)

    # ranking source: nDCG@10 and recall@10 of the file's own lists, computed by pytrec_eval
    # (reference library, trec_eval's measures). Training items leave the candidates in xrec's
    # full-ranking protocol, so they leave the run too; a user absent from the run scores 0.
    ranking = pd.read_csv(shop.parent / "current.csv", dtype={"user": str, "item": str})
    seen = {(fold.user_ids[u], items[i]) for u, i in zip(fold.train["user_idx"], fold.train["item_idx"])}
    run: dict[str, dict[str, float]] = {}
    for row in ranking.itertuples():
        if (row.user, row.item) not in seen:
            run.setdefault(row.user, {})[row.item] = float(row.score)
    qrels: dict[str, dict[str, int]] = {}
    for u, i in zip(fold.heldout["user_idx"], fold.heldout["item_idx"]):
        qrels.setdefault(fold.user_ids[u], {})[items[i]] = 1
    measured = pytrec_eval.RelevanceEvaluator(qrels, {"ndcg_cut", "recall"}).evaluate({u: run[u] for u in qrels if u in run})
    card = result.scorecards["current"].per_user.assign(uid=lambda f: fold.user_ids[f["user"].to_numpy()]).set_index("uid")
    assert set(card.index) == set(qrels)
    for uid in qrels:
        ref = measured.get(uid, {"ndcg_cut_10": 0.0, "recall_10": 0.0})
        assert card.loc[uid, "ndcg@10"] == pytest.approx(ref["ndcg_cut_10"], abs=1e-9), uid
        assert card.loc[uid, "recall@10"] == pytest.approx(ref["recall_10"], abs=1e-9), uid
    assert "c39" in qrels and card.loc["c39", "ndcg@10"] == 0  # absent from the file: all tied, last

    # blends over the ranking source give finite scores for every item
    for name in ("mix_z", "mix_rank", "mix_minmax"):
        block = result.scorers[name].score(users)
        assert np.isfinite(block).all() and block.shape == (len(users), fold.n_items)


def test_ranking_spec_as_baseline_of_xrec_compare_and_export_round_trip(shop, tmp_path, capsys):
    from xrec.cli import main

    text = shop.read_text(encoding="utf-8")
    base = shop.parent / "current_only.toml"
    base.write_text(text.replace('name = "own files"', 'name = "live"').replace('baseline = "current"', 'primary = "current"'), encoding="utf-8")
    cand = shop.parent / "blend_only.toml"
    cand.write_text(text.replace('name = "own files"', 'name = "blend"').replace('baseline = "current"', 'primary = "mix_rank"'), encoding="utf-8")
    with pytest.warns(UserWarning, match="left out 2 of"):
        assert main(["compare", str(base), str(cand), "--json", "-q"]) == 0
    comparison = json.loads(capsys.readouterr().out)
    assert comparison["baseline"] == "current" and comparison["candidates"] == ["mix_rank"]
    # the exported blend file records absolute paths, so it loads from any folder and gives the same lists
    out = tmp_path / "blend.toml"
    with pytest.warns(UserWarning, match="left out 2 of"):
        assert main(["export", str(shop), "--scorer", "mix_rank", "-o", str(out), "-q"]) == 0
    capsys.readouterr()
    assert str((shop.parent / "current.csv").resolve()) in out.read_text(encoding="utf-8")
    with pytest.warns(UserWarning, match="left out 2 of"):
        assert main(["recommend", str(out), "--user", "c1", "-k", "3", "--json", "-q"]) == 0
    assert len(json.loads(capsys.readouterr().out)["c1"]) == 3
