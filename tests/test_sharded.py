"""Evaluation sharded by users on a Dask LocalCluster (xrec.evaluate.sharded, xrec.cluster).

One 2-process LocalCluster (the ``dask_client`` fixture of tests/conftest.py) serves every test.
"""

from __future__ import annotations

import os
import signal
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from _synthetic import FixedScores, interaction_frame, synthetic_fold
from threadpoolctl import threadpool_limits

from xrec.blend import Blend
from xrec.cluster import check_cluster_options, open_client
from xrec.errors import ConfigError, DataError
from xrec.evaluate import (
    SampledNegatives,
    evaluate,
    evaluate_blend_chunked,
    evaluate_blend_sharded,
    evaluate_blocks_sharded,
    evaluate_sharded,
)
from xrec.evaluate._synthetic_scale import GeneratedFactors, make_scale_problem
from xrec.evaluate.sharded import shard_bounds
from xrec.sources import make_source



def _problem(seed: int = 0, n_users: int = 300, n_items: int = 90):
    """A fold with 3-12 training items and 1-3 held-out items per user, and a 2-source blend on it."""
    rng = np.random.default_rng(seed)
    train_u, train_i, held_u, held_i = [], [], [], []
    for u in range(n_users):
        items = rng.choice(n_items, size=int(rng.integers(4, 16)), replace=False)
        n_held = int(rng.integers(1, 4))
        held_i += items[:n_held].tolist()
        held_u += [u] * n_held
        train_i += items[n_held:].tolist()
        train_u += [u] * (len(items) - n_held)
    fold = synthetic_fold(n_users, n_items, interaction_frame(train_u, train_i), interaction_frame(held_u, held_i))
    # float32 draws are distinct with overwhelming probability, so no ties anywhere
    raw = rng.standard_normal((n_users, n_items)).astype(np.float32)
    blend = Blend(
        {"popularity": make_source("popularity"), "fixed": FixedScores(raw)},
        weights={"popularity": 0.4, "fixed": 1.0},
        normalizers="zscore",
    ).fit(fold)
    return fold, blend


class KillsItsWorkerOnce:
    """Scores like ``inner``, but the first time it scores ``victim`` it kills the process it runs in.

    A marker file records the kill, so the retried shard goes through. It never kills the
    process that made it (the test's own).
    """

    def __init__(self, inner, victim: int, marker: Path) -> None:
        self.inner = inner
        self.victim = victim
        self.marker = marker
        self.owner_pid = os.getpid()

    def score(self, users):
        users = np.asarray(users)
        if self.victim in users and os.getpid() != self.owner_pid and not self.marker.exists():
            self.marker.write_text(str(os.getpid()))
            os.kill(os.getpid(), signal.SIGKILL)
        return self.inner.score(users)


@pytest.fixture
def client(dask_client):
    """The session's 2-worker LocalCluster (tests/conftest.py)."""
    return dask_client


def _assert_same_card(ours, reference):
    pd.testing.assert_frame_equal(ours.per_user, reference.per_user, check_exact=True)
    assert ours.list_metrics == reference.list_metrics
    assert ours.ks == reference.ks and ours.protocol == reference.protocol and ours.n_items == reference.n_items
    assert ours.fold_settings == reference.fold_settings


@pytest.mark.parametrize("protocol", [None, SampledNegatives(n_negatives=20, seed=3)], ids=["full", "sampled"])
def test_sharded_per_user_values_equal_one_process(client, protocol):
    fold, blend = _problem()
    kw = dict(ks=(1, 5, 10), chunk_size=16, protocol=protocol)
    with pytest.warns(UserWarning) if protocol is not None else _no_warning():
        reference = evaluate(blend, fold, **kw)
    with pytest.warns(UserWarning) if protocol is not None else _no_warning():
        ours = evaluate_sharded(blend, fold, shard_size=40, client=client, **kw)
    _assert_same_card(ours, reference)
    assert ours.per_user["user"].is_unique and ours.n_users == len(fold.eval_users)


def _no_warning():
    import contextlib

    return contextlib.nullcontext()


def test_sharded_user_subset_and_array_scorer(client):
    fold, blend = _problem(seed=1)
    users = np.sort(np.random.default_rng(5).choice(fold.eval_users, 97, replace=False))[::-1].copy()
    scores = blend.score(np.arange(fold.n_users))
    reference = evaluate(scores, fold, users=users, ks=(3, 10), chunk_size=7)
    ours = evaluate_sharded(scores, fold, users=users, ks=(3, 10), chunk_size=7, client=client)
    _assert_same_card(ours, reference)
    np.testing.assert_array_equal(ours.users, users)  # the caller's order, not sorted


def test_sharded_by_scheduler_address(client):
    fold, blend = _problem(seed=2, n_users=120)
    reference = evaluate_blocks_sharded(blend, fold.train_matrix, fold.heldout_matrix, chunk_size=32, client=client)
    ours = evaluate_blocks_sharded(
        blend, fold.train_matrix, fold.heldout_matrix, chunk_size=32, scheduler=client.scheduler.address
    )
    _assert_same_card(ours, reference)


def test_killed_worker_shard_is_retried(client, tmp_path):
    fold, blend = _problem(seed=4)
    reference = evaluate(blend, fold, ks=(5, 10), chunk_size=16)
    marker = tmp_path / "killed"
    victim = int(fold.eval_users[len(fold.eval_users) // 2])
    pids_before = set(client.run(os.getpid).values())
    dying = KillsItsWorkerOnce(blend, victim, marker)
    ours = evaluate_sharded(dying, fold, ks=(5, 10), chunk_size=16, shard_size=32, client=client, name="blend")
    # the kill happened, in a worker process (not this one), and that worker is gone
    assert marker.exists()
    killed_pid = int(marker.read_text())
    assert killed_pid in pids_before and killed_pid != os.getpid()
    client.wait_for_workers(2, timeout=60)
    assert killed_pid not in set(client.run(os.getpid).values())
    # every user exactly once, every value as in one process
    assert ours.per_user["user"].is_unique
    ours.name = reference.name
    _assert_same_card(ours, reference)


def test_killed_only_worker_shards_are_sent_again(tmp_path):
    # With one worker, its death takes the scorer and masks it was sent with it: the shards
    # still waiting are cancelled by Dask and sent again with them (xrec.cluster.run_shards).
    fold, blend = _problem(seed=7, n_users=150)
    reference = evaluate(blend, fold, ks=(5,), chunk_size=16)
    marker = tmp_path / "killed"
    dying = KillsItsWorkerOnce(blend, int(fold.eval_users[100]), marker)
    with open_client(workers=1) as lone:
        ours = evaluate_sharded(dying, fold, ks=(5,), chunk_size=16, shard_size=16, client=lone, name=reference.name)
    assert marker.exists()
    _assert_same_card(ours, reference)


def _twin_items_problem():
    """A low-rank source over items that come in pairs with the same vector (exact score ties).

    Each user's held-out item is its best-scored item, so its rank (1 or 2, after its twin
    when they tie) shows the last bit of the score difference between the twins.
    """
    rng = np.random.default_rng(11)
    n_users, n_items = 600, 3000
    # item j and item j + 1500 share a vector (twins far apart: matrix products then tie them
    # or not depending on how the product is tiled over threads)
    item_vectors = np.tile(rng.standard_normal((n_items // 2, 24)).astype(np.float32), (2, 1))
    user_vectors = rng.standard_normal((n_users, 24)).astype(np.float32)
    best = (user_vectors.astype(np.float64) @ item_vectors.T.astype(np.float64)).argmax(axis=1)
    train_items = (best[:, None] + rng.integers(1, n_items // 2, (n_users, 5))) % n_items  # never the best pair
    train = interaction_frame(np.repeat(np.arange(n_users), 5), train_items.ravel())
    fold = synthetic_fold(n_users, n_items, train, interaction_frame(np.arange(n_users), best))
    return fold, GeneratedFactors.from_factors("twins", user_vectors, item_vectors)


def test_blas_threads_same_as_this_process_keeps_tied_items_identical(client):
    fold, source = _twin_items_problem()
    with threadpool_limits(1, "blas"):
        one_thread = source.score(np.arange(256))
    if np.array_equal(one_thread, source.score(np.arange(256))):
        pytest.skip("this BLAS rounds the same with one thread and with its own count")
    kw = dict(ks=(10,), chunk_size=256, metrics=("hit_rate", "ndcg", "coverage", "popularity"))
    reference = evaluate(source, fold, **kw)
    with threadpool_limits(1, "blas"):
        reference_one_thread = evaluate(source, fold, **kw)
    # the rounding difference is visible in the results (else this test could not fail)
    assert reference.list_metrics != reference_one_thread.list_metrics or not reference.per_user.equals(
        reference_one_thread.per_user
    )
    _assert_same_card(evaluate_sharded(source, fold, client=client, **kw), reference)
    _assert_same_card(evaluate_sharded(source, fold, client=client, blas_threads=1, **kw), reference_one_thread)


def test_blend_sharded_equals_chunked_blend_in_one_process(client):
    problem = make_scale_problem(700, 400, 20, heldout_per_user=2, seed=5)
    kw = dict(ks=(5, 10), chunk_size=64, normalizers={"als": "zscore", "text": "zscore", "image": "minmax", "popularity": "rank"})
    reference = evaluate_blend_chunked(problem.sources, problem.weights, problem.train, problem.heldout, threads=2, **kw)
    ours = evaluate_blend_sharded(
        problem.sources, problem.weights, problem.train, problem.heldout, shard_size=100, client=client, **kw
    )
    _assert_same_card(ours, reference)
    users = np.random.default_rng(2).choice(700, 150, replace=False)
    _assert_same_card(
        evaluate_blend_sharded(problem.sources, problem.weights, problem.train, problem.heldout, users=users, client=client, **kw),
        evaluate_blend_chunked(problem.sources, problem.weights, problem.train, problem.heldout, users=users, **kw),
    )


def test_sharded_metrics_match_trec_eval(client):
    pytrec_eval = pytest.importorskip("pytrec_eval")
    fold, blend = _problem(seed=6)
    card = evaluate_sharded(blend, fold, ks=(5, 10), chunk_size=16, client=client)
    sample = np.random.default_rng(0).choice(card.n_users, 40, replace=False)
    seen, truth = fold.train_matrix, fold.heldout_matrix
    qrels, run = {}, {}
    for pos in sample:
        u = int(card.users[pos])
        scores = blend.score(np.array([u]))[0]
        unseen = np.setdiff1d(np.arange(fold.n_items), seen[u].indices)
        qrels[f"q{u}"] = {f"d{i}": 1 for i in truth[u].indices}
        run[f"q{u}"] = {f"d{j}": float(scores[j]) for j in unseen}
    res = pytrec_eval.RelevanceEvaluator(qrels, {"ndcg_cut.5,10", "recall.5,10", "success.5,10"}).evaluate(run)
    rows = card.per_user.iloc[sample]
    for k in (5, 10):
        # Source: trec_eval's ndcg_cut_K, recall_K and success_K through pytrec_eval
        # (pytrec-eval-terrier), the reference implementation used by TREC.
        expected = pd.DataFrame([res[f"q{int(u)}"] for u in rows["user"]])
        np.testing.assert_allclose(rows[f"ndcg@{k}"], expected[f"ndcg_cut_{k}"], atol=1e-9)
        np.testing.assert_allclose(rows[f"recall@{k}"], expected[f"recall_{k}"], atol=1e-12)
        np.testing.assert_allclose(rows[f"hit_rate@{k}"], expected[f"success_{k}"], atol=1e-12)


def test_shard_bounds_cut_on_chunk_boundaries():
    bounds = shard_bounds(1000, 64, 100, 2)
    assert bounds[0] == (0, 128) and bounds[-1] == (896, 1000)
    assert all(start % 64 == 0 for start, _ in bounds)
    assert [b for s, e in bounds for b in range(s, e)] == list(range(1000))
    assert len(shard_bounds(1000, 10, None, 2)) == 8  # about four shards per worker


def test_bad_options_are_refused(client):
    fold, blend = _problem(n_users=20)
    with pytest.raises(ConfigError, match="shard_size"):
        evaluate_sharded(blend, fold, shard_size=0, client=client)
    with pytest.raises(ConfigError, match="scorer must be"):
        evaluate_sharded("nope", fold, client=client)
    with pytest.raises(DataError, match="out of range"):
        evaluate_sharded(blend, fold, users=np.array([999]), client=client)
    with pytest.raises(ConfigError, match="workers"):
        check_cluster_options("tcp://127.0.0.1:1", 2)
    with pytest.raises(ConfigError, match="workers"):
        check_cluster_options(None, 0)
    with pytest.raises(ConfigError, match="scheduler"):
        check_cluster_options("", None)
    with pytest.raises(ConfigError, match="not both"):
        with open_client(workers=2, client=client):
            pass


def test_unreachable_scheduler_is_a_config_error(monkeypatch):
    import socket

    import xrec.cluster

    with socket.socket() as probe:  # a port nothing listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    monkeypatch.setattr(xrec.cluster, "CONNECT_TIMEOUT", 1)
    with pytest.raises(ConfigError, match=f"scheduler: cannot reach a Dask scheduler at 'tcp://127.0.0.1:{port}'"):
        with open_client(f"tcp://127.0.0.1:{port}"):
            pass


def test_errors_on_a_worker_reach_the_caller(client):
    fold, blend = _problem(n_users=40)
    bad = FixedScores(np.full((fold.n_users, fold.n_items + 1), 1.0, dtype=np.float32))
    with pytest.raises(DataError, match="scorer returned shape"):
        evaluate_sharded(bad, fold, client=client)


# ------------------------------------------------------------------ specs and the command line


def _write_spec(folder: Path, **evaluate_settings) -> Path:
    """Random CSV interactions over 40 items of two kinds, and a spec with three sources and a blend."""
    import tomli_w

    rng = np.random.default_rng(8)
    users = np.repeat(np.arange(60), 9)
    frame = pd.DataFrame({"user": [f"u{u}" for u in users], "item": [f"i{j}" for j in rng.integers(0, 40, len(users))]})
    frame["timestamp"] = np.arange(len(frame))
    frame.drop_duplicates(["user", "item"]).to_csv(folder / "events.csv", index=False)
    pd.DataFrame({"item": [f"i{j}" for j in range(40)], "kind": list("ab" * 20)}).to_csv(folder / "items.csv", index=False)
    spec = {
        "data": {"dataset": "files", "catalog": "items.csv", "interactions": "events.csv", "categorical": ["kind"]},
        "evaluate": {"ks": [3, 5], "baseline": "pop", "chunk_size": 8, **evaluate_settings},
        "sources": {"pop": {"kind": "popularity"}, "knn": {"kind": "item_knn", "neighbors": 10}, "kind": {"kind": "attributes"}},
        "blends": {"mix": {"weights": {"knn": 1.0, "pop": 0.2, "kind": 0.5}}},
    }
    path = folder / "shop.toml"
    path.write_bytes(tomli_w.dumps(spec).encode("utf-8"))
    return path


def test_cli_with_scheduler_prints_and_writes_the_single_process_results(client, tmp_path, capsys):
    from xrec.cli import main

    spec = _write_spec(tmp_path)
    assert main(["run", str(spec), "--json"]) == 0
    alone = capsys.readouterr().out
    assert main(["run", str(spec), "--json", "--scheduler", client.scheduler.address]) == 0
    assert capsys.readouterr().out == alone
    assert main(["run", str(spec), "-q", "--scheduler", client.scheduler.address, "--workers", "2"]) == 2
    assert "--workers" in capsys.readouterr().err
    # compare and export take the same flags
    assert main(["compare", str(spec), str(spec), "--json"]) == 0
    compared = capsys.readouterr().out
    assert main(["compare", str(spec), str(spec), "--json", "--scheduler", client.scheduler.address]) == 0
    assert capsys.readouterr().out == compared
    alone_file, sharded_file = tmp_path / "alone.toml", tmp_path / "sharded.toml"
    assert main(["export", str(spec), "-q", "-o", str(alone_file)]) == 0
    assert main(["export", str(spec), "-q", "-o", str(sharded_file), "--scheduler", client.scheduler.address]) == 0
    assert sharded_file.read_text(encoding="utf-8") == alone_file.read_text(encoding="utf-8")


def test_spec_workers_run_on_a_local_cluster(tmp_path):
    from xrec.experiment import run_experiment
    from xrec.spec import load_spec

    single = run_experiment(load_spec(_write_spec(tmp_path)))
    sharded = run_experiment(load_spec(_write_spec(tmp_path, workers=1, shard_size=16)))
    assert set(sharded.scorecards) == {"pop", "knn", "kind", "mix"}
    for name, card in single.scorecards.items():
        _assert_same_card(sharded.scorecards[name], card)


def test_spec_cluster_keys_are_checked(tmp_path):
    from xrec.spec import load_spec

    with pytest.raises(ConfigError, match="evaluate.workers"):
        load_spec(_write_spec(tmp_path, workers=2, scheduler="tcp://127.0.0.1:8786"))
    with pytest.raises(ConfigError, match="evaluate.workers"):
        load_spec(_write_spec(tmp_path, workers=0))
    with pytest.raises(ConfigError, match="evaluate.scheduler"):
        load_spec(_write_spec(tmp_path, scheduler=8786))
    with pytest.raises(ConfigError, match="evaluate.shard_size"):
        load_spec(_write_spec(tmp_path, workers=1, shard_size=0))
