"""The HTTP service: answers equal the bundle's, bad requests get 4xx naming the field, reload is atomic."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from _bundles import small_bundle, small_dataset
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from starlette.testclient import TestClient

from xrec.bundle import load_bundle
from xrec.serve import MAX_BODY, create_app
from xrec.serve.child import serving

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def dataset():
    return small_dataset()


@pytest.fixture(scope="module")
def bundles(dataset, tmp_path_factory):
    root = tmp_path_factory.mktemp("serve")
    first = small_bundle(dataset, root / "first", evidence={"scorer": "blend", "metrics": {"ndcg@10": {"mean": 0.25}}})
    second = small_bundle(dataset, root / "second", als_weight=0.0)
    return first, second


@pytest.fixture
def served(bundles, tmp_path):
    path = shutil.copytree(bundles[0], tmp_path / "live")
    return path, TestClient(create_app(path))


def test_health_and_identity(served):
    path, client = served
    manifest = (path / "manifest.json").read_bytes()
    assert client.get("/health").json() == {"status": "ok", "bundle": hashlib.sha256(manifest).hexdigest()}
    info = client.get("/bundle").json()
    assert info["bundle"] == hashlib.sha256(manifest).hexdigest()  # outside reference: hashlib
    assert info["evidence"] == {"scorer": "blend", "metrics": {"ndcg@10": {"mean": 0.25}}}
    assert info["sources"]["als"] == {"kind": "als", "weight": 1.0, "normalizer": "zscore"}
    assert info["filterable"] == {"categorical": ["colour"], "multilabel": ["tags"], "numeric": ["price"]}
    assert info["dataset"]["fingerprint"] and info["check"]["digest"]


def test_recommend_similar_answers_equal_the_bundle(served):
    path, client = served
    bundle = load_bundle(path)
    filters = {"attributes": {"colour": {"none_of": ["black"]}, "tags": {"any_of": ["a", "b"]}}}
    for user in bundle.user_ids[:10]:
        body = client.post("/recommend", json={"user": str(user), "k": 7, "filters": filters}).json()
        expected = bundle.recommend(user, 7, filters=filters)
        assert [r["item"] for r in body["items"]] == expected["item"].tolist()
        assert np.allclose([r["score"] for r in body["items"]], expected["score"])
    body = client.post("/recommend", json={"user": "stranger", "k": 3, "unknown_user": "popular"}).json()
    assert body["known_user"] is False and len(body["items"]) == 3


def test_similar_items_by_one_source_follow_sklearn_cosine(served):
    from sklearn.metrics.pairwise import cosine_similarity

    path, client = served
    bundle = load_bundle(path)
    factors = bundle.scorer.sources["als"].item_factors_
    body = client.post("/similar", json={"item": "i07", "k": 5, "source": "als"}).json()
    # outside reference: scikit-learn's cosine similarity of the ALS item vectors
    cos = cosine_similarity(factors[7:8], factors)[0]
    cos[7] = -np.inf
    order = np.lexsort((np.arange(len(cos)), -cos))[:5]
    assert [r["item"] for r in body["items"]] == bundle.item_ids[order].tolist()
    blended = client.post("/similar", json={"item": "i07", "k": 5}).json()
    assert blended["source"] == "blend" and len(blended["items"]) == 5 and "i07" not in [r["item"] for r in blended["items"]]


@pytest.mark.parametrize(
    ("path", "body", "status", "field"),
    [
        ("/recommend", {"k": 5}, 400, "user"),
        ("/recommend", {"user": "nobody"}, 404, "user"),
        ("/recommend", {"user": "u1", "k": 0}, 400, "k"),
        ("/recommend", {"user": "u1", "k": 1001}, 400, "k"),
        ("/recommend", {"user": "u1", "k": "ten"}, 400, "k"),
        ("/recommend", {"user": "u1", "k": 2.5}, 400, "k"),
        ("/recommend", {"user": "u1", "top": 3}, 400, "top"),
        ("/recommend", {"user": ["u1"]}, 400, "user"),
        ("/recommend", {"user": "u1", "filters": "red"}, 400, "filters"),
        ("/recommend", {"user": "u1", "filters": {"attributes": {"price": {"max": "x"}}}}, 400, "filters.attributes.price.max"),
        ("/recommend", {"user": "u1", "filters": {"include_items": ["zz"]}}, 400, "filters.include_items"),
        ("/recommend", {"user": "u1", "exclude_seen": "yes"}, 400, "exclude_seen"),
        ("/recommend", {"user": "u1", "unknown_user": "guess"}, 400, "unknown_user"),
        ("/similar", {"item": "nope"}, 404, "item"),
        ("/similar", {"item": "i01", "source": "pop"}, 400, "source"),
        ("/search", {"text": "red"}, 400, "source"),
        ("/search", {"text": 5}, 400, "text"),
        ("/reload", {"path": "/elsewhere"}, 400, "path"),
        ("/recommend", [1, 2], 400, "body"),
    ],
)
def test_bad_requests_get_4xx_naming_the_field(served, path, body, status, field):
    _, client = served
    response = client.post(path, json=body)
    assert response.status_code == status, response.text
    assert response.json()["field"] == field and response.json()["error"].startswith(field)


def test_malformed_and_oversized_bodies(served):
    _, client = served
    for raw in (b"", b"{", b"\xff\xfe", b'{"user": NaN}', b"[" * 100_000):
        r = client.post("/recommend", content=raw)
        assert r.status_code in (400, 413) and r.json()["field"] == "body", raw[:10]
    big = json.dumps({"user": "u1", "filters": {"include_items": ["i01"] * 20_000}}).encode()
    assert len(big) > MAX_BODY
    assert client.post("/recommend", content=big).status_code == 413

    def chunks():  # no Content-Length: the limit holds while streaming
        for _ in range(100):
            yield b" " * 1024

    r = client.post("/recommend", content=chunks())
    assert r.status_code == 413 and r.json()["field"] == "body"
    assert client.get("/recommend").status_code == 405


json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 2000) | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=8),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=12), inner, max_size=4),
    max_leaves=12,
)
keys = st.sampled_from(["user", "item", "text", "k", "filters", "exclude_seen", "unknown_user", "source", "attributes", "include_items"])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(path=st.sampled_from(["/recommend", "/similar", "/search"]), body=st.dictionaries(keys, json_values, max_size=5))
def test_no_request_body_gives_a_server_error(served, path, body):
    _, client = served
    response = client.post(path, json=body)
    assert response.status_code < 500, (body, response.text)
    assert response.status_code == 200 or "field" in response.json()


def test_reload_swaps_and_refuses_a_broken_bundle(served, bundles):
    path, client = served
    before = client.get("/bundle").json()["bundle"]
    old = client.post("/recommend", json={"user": "u2", "k": 5}).json()
    shutil.rmtree(path)
    shutil.copytree(bundles[1], path)
    r = client.post("/reload")
    assert r.status_code == 200 and r.json()["previous"] == before
    after = r.json()["bundle"]
    assert after != before and client.get("/bundle").json()["bundle"] == after
    new = client.post("/recommend", json={"user": "u2", "k": 5}).json()
    assert new["bundle"] == after and new["items"] == [
        {"item": i, "score": pytest.approx(s), "rank": r}
        for i, s, r in load_bundle(bundles[1]).recommend("u2", 5).itertuples(index=False)
    ]
    assert old["items"] != new["items"]

    target = next((path / "sources").iterdir())
    target.write_bytes(target.read_bytes()[:-1] + b"\x00")
    r = client.post("/reload")
    assert r.status_code == 409 and r.json()["field"] == "bundle" and target.name in r.json()["error"]
    assert client.get("/bundle").json()["bundle"] == after  # the old one keeps serving
    assert client.post("/recommend", json={"user": "u2", "k": 5}).json()["items"] == new["items"]


def test_in_flight_requests_finish_on_the_old_bundle(served, bundles):
    path, client = served
    holder = client.app.state.holder
    old = holder.current
    expected = old.recommend("u4", 5)["item"].tolist()
    entered, release = threading.Event(), threading.Event()
    original = old.ranked

    def slow(*args, **kwargs):
        entered.set()
        assert release.wait(10)
        return original(*args, **kwargs)

    old.ranked = slow
    result = {}
    worker = threading.Thread(target=lambda: result.update(client.post("/recommend", json={"user": "u4", "k": 5}).json()))
    worker.start()
    assert entered.wait(10)
    shutil.rmtree(path)
    shutil.copytree(bundles[1], path)
    assert client.post("/reload").status_code == 200
    release.set()
    worker.join(10)
    assert result["bundle"] == old.identity and [r["item"] for r in result["items"]] == expected
    assert client.post("/recommend", json={"user": "u4", "k": 5}).json()["bundle"] == holder.current.identity != old.identity


@pytest.mark.slow
def test_real_server_concurrent_equals_sequential_and_sighup_reloads(bundles, tmp_path):
    import httpx

    path = shutil.copytree(bundles[0], tmp_path / "live")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    with serving(path, env=env, cwd=ROOT) as service:
        base, proc = service.url, service.process
        users = [f"u{u}" for u in range(50)]
        bodies = [{"user": u, "k": 10, "filters": {"attributes": {"price": {"max": 60 + i % 30}}}} for i, u in enumerate(users)]
        with httpx.Client(base_url=base, timeout=30) as client:
            sequential = [client.post("/recommend", json=b).json() for b in bodies]

        def ask(body):
            with httpx.Client(base_url=base, timeout=30) as c:
                return c.post("/recommend", json=body).json()

        with ThreadPoolExecutor(8) as pool:
            concurrent = list(pool.map(ask, bodies * 4))
        assert concurrent == sequential * 4

        before = httpx.get(f"{base}/bundle").json()["bundle"]
        shutil.rmtree(path)
        shutil.copytree(bundles[1], path)
        proc.send_signal(signal.SIGHUP)
        for _ in range(100):
            if httpx.get(f"{base}/bundle").json()["bundle"] != before:
                break
            time.sleep(0.1)
        info = httpx.get(f"{base}/bundle").json()
        assert info["bundle"] != before and info["reloads"] == 1


def test_serving_names_the_childs_error_when_it_cannot_start(tmp_path):
    from xrec.errors import XrecError

    with pytest.raises(XrecError, match="exited with code") as err:
        with serving(tmp_path / "no-such-bundle", env={**os.environ, "PYTHONPATH": str(ROOT)}, cwd=ROOT):
            pass
    assert "no-such-bundle" in str(err.value)
