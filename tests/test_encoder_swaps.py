"""Encoder swaps as an A/B: int8 text vectors, cache reuse after a swap, top-K overlap, spec pairs."""

from __future__ import annotations

import json
from collections import Counter

import numpy as np
import pytest
import scipy.sparse as sp

from xrec.encoders.bridge import make_image_encoder, make_text_encoder
from xrec.encoders.cache import EmbeddingCache
from xrec.encoders.text import MiniLMTextEncoder
from xrec.errors import ConfigError
from xrec.evaluate.overlap import top_list_change
from xrec.experiment import run_experiment
from xrec.spec import load_spec, parse_spec

from _synthetic import interaction_frame, synthetic_fold
from test_cli import _write_files_spec

SENTENCES = [
    "A man is eating food.",
    "A man is eating a piece of bread.",
    "The girl is carrying a baby.",
    "A man is riding a horse.",
    "A woman is playing violin.",
    "Two men pushed carts through the woods.",
]


@pytest.fixture(scope="module")
def fp32_and_int8():
    fp32 = MiniLMTextEncoder(batch_size=8).load()
    int8 = MiniLMTextEncoder(batch_size=8, precision="int8").load()
    return fp32, int8


def test_int8_text_vectors_stay_close_to_fp32(fp32_and_int8) -> None:
    import torch

    fp32, int8 = fp32_and_int8
    a, b = fp32.encode(SENTENCES), int8.encode(SENTENCES)
    np.testing.assert_allclose(np.linalg.norm(b, axis=1), 1.0, atol=1e-5)
    cos = (a * b).sum(axis=1)
    assert cos.min() > 0.95 and not np.allclose(a, b, atol=1e-4)  # close, but really quantized
    # torch's own dynamic int8 linear layer replaced every nn.Linear of the transformer
    kinds = Counter(type(m).__module__ + "." + type(m).__name__ for m in int8.model_.modules())
    assert kinds["torch.ao.nn.quantized.dynamic.modules.linear.Linear"] >= 36  # 6 layers x 6 linears
    assert not any(type(m) is torch.nn.Linear for m in int8.model_.modules())
    # STS-style check (sentence-transformers' semantic-search example sentences, from memory):
    # the paraphrase pair still scores above an unrelated pair.
    assert b[0] @ b[1] > b[0] @ b[4]
    assert int8.version == "1+int8" and fp32.version == "1" and int8.cache_key != fp32.cache_key
    with pytest.raises(ConfigError, match="precision"):
        MiniLMTextEncoder(precision="int4").load()


def test_a_swap_encodes_only_what_the_cache_lacks(tmp_path, fp32_and_int8) -> None:
    fp32, int8 = fp32_and_int8
    cache = EmbeddingCache(tmp_path)
    first = cache.encode(fp32, SENTENCES[:4])
    assert cache.last_stats.encoded == 4
    cache.encode(int8, SENTENCES[:4])  # the swap: int8 has its own entries, none yet
    assert (cache.last_stats.hits, cache.last_stats.encoded) == (0, 4)
    again = cache.encode(fp32, SENTENCES)  # back to fp32 with two new texts: only those are encoded
    assert (cache.last_stats.hits, cache.last_stats.encoded) == (4, 2)
    np.testing.assert_array_equal(again[:4], first)
    cache.encode(int8, SENTENCES)
    assert (cache.last_stats.hits, cache.last_stats.encoded) == (4, 2)
    assert cache.folder(fp32) != cache.folder(int8)


def test_encoder_names_pick_precision_and_runtime() -> None:
    assert make_text_encoder("minilm_int8").precision == "int8"
    assert make_text_encoder("minilm").precision == "fp32"
    assert make_image_encoder("efficientnet_lite0_torch").runtime == "torch"
    assert make_image_encoder("efficientnet_lite0_onnx").runtime == "onnx"
    with pytest.raises(ConfigError, match="unknown"):
        make_text_encoder("minilm_int4")


def _python_overlap(a_scores, b_scores, seen_lists, k):
    """Plain Python reference: top-k sets by sorted(), seen items dropped, |A & B| / k per user."""

    def top(row, seen):
        order = sorted((j for j in range(len(row)) if j not in seen), key=lambda j: (-row[j], j))
        return order[:k]

    out, counts_a, counts_b = [], Counter(), Counter()
    for ra, rb, seen in zip(a_scores.tolist(), b_scores.tolist(), seen_lists):
        ta, tb = top(ra, seen), top(rb, seen)
        out.append(len(set(ta) & set(tb)) / k)
        counts_a.update(ta)
        counts_b.update(tb)
    return np.array(out), counts_a, counts_b


def test_overlap_matches_a_plain_python_set_computation() -> None:
    rng = np.random.default_rng(0)
    n_users, n_items, k = 30, 25, 10
    users = np.repeat(np.arange(n_users), 3)
    items = np.concatenate([rng.choice(n_items, size=3, replace=False) for _ in range(n_users)])
    fold = synthetic_fold(n_users, n_items, interaction_frame(users, items))
    a = rng.normal(size=(n_users, n_items))
    b = a + rng.normal(scale=0.5, size=a.shape)
    b[:, 3] = a[:, 3]  # some ties across scorers do not matter; within-row ties break by item index
    change = top_list_change(a, b, fold, k=k, users=np.arange(n_users), n_moved=n_items)
    seen = [set(sp.csr_matrix(fold.train_matrix)[u].indices.tolist()) for u in range(n_users)]
    # Reference: Python sets over sorted() top-k lists (overlap@k = |A ∩ B| / k, common practice, no source).
    expected, counts_a, counts_b = _python_overlap(a, b, seen, k)
    np.testing.assert_allclose(change.overlap, expected)
    assert change.mean == pytest.approx(expected.mean())
    moved = {r.item: r.change for r in change.moved.itertuples()}
    assert moved == {f"i{j}": counts_b[j] - counts_a[j] for j in range(n_items) if counts_b[j] != counts_a[j]}
    assert list(change.moved["change"].abs()) == sorted(change.moved["change"].abs(), reverse=True)
    same = top_list_change(a, a, fold, k=k, users=np.arange(n_users))
    assert same.mean == 1.0 and same.identical_share == 1.0 and same.moved.empty


def test_spec_pairs_and_overlap(tmp_path) -> None:
    spec_path = _write_files_spec(tmp_path)
    text = spec_path.read_text(encoding="utf-8").replace(
        'baseline = "pop"', 'baseline = "pop"\noverlap = 5\npairs = [["knn", "mix"]]'
    )
    spec_path.write_text(text, encoding="utf-8")
    result = run_experiment(load_spec(spec_path))
    assert set(result.extras["top_lists"]) == {"knn", "kind", "mix"}
    (run,) = result.extras["pairs"]
    assert run["comparison"].baseline == "knn"
    assert run["top_lists"].baseline == "knn" and run["top_lists"].candidate == "mix" and run["top_lists"].k == 5
    from xrec.report import experiment_payload, format_experiment

    assert "mean overlap@5" in format_experiment(result)
    assert experiment_payload(result)["pairs"][0]["top_lists"]["k"] == 5
    base = {"data": {"dataset": "movielens"}, "sources": {"a": {"kind": "popularity"}}}
    with pytest.raises(ConfigError, match="evaluate.pairs"):
        parse_spec({**base, "evaluate": {"pairs": [["a", "nobody"]]}})
    with pytest.raises(ConfigError, match="evaluate.pairs"):
        parse_spec({**base, "evaluate": {"pairs": ["a"]}})
    with pytest.raises(ConfigError, match="evaluate.overlap"):
        parse_spec({**base, "evaluate": {"overlap": 0}})


@pytest.mark.slow
def test_builtin_encoder_swap_spec_on_the_demo_shop() -> None:
    result = run_experiment(load_spec("demo_encoders"))
    assert result.comparison.baseline == "text_fp32"
    int8 = result.extras["top_lists"]["text_int8"]
    assert int8.k == 10 and 0.0 < int8.mean < 1.0  # int8 vectors move some items, not all
    (images,) = result.extras["pairs"]
    # ONNX Runtime and PyTorch agree to ~1e-6 per vector: the same top-10 lists, the same scores
    assert images["top_lists"].mean > 0.99
    table = images["comparison"].table
    assert (table["difference"].abs() < 1e-9).all()


def test_xrec_compare_reports_top_list_overlap(tmp_path, capsys) -> None:
    from xrec.cli import main

    base = _write_files_spec(tmp_path, name="base")
    text = base.read_text(encoding="utf-8")
    (tmp_path / "cand.toml").write_text(text.replace('name = "base"', 'name = "cand"').replace("pop = 0.2", "pop = 2.0"), encoding="utf-8")
    assert main(["compare", str(base), str(tmp_path / "cand.toml"), "--overlap", "5", "-q"]) == 0
    out = capsys.readouterr().out
    assert "mean overlap@5" in out
    assert main(["compare", str(base), str(tmp_path / "cand.toml"), "--overlap", "5", "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    (change,) = payload["top_lists"].values()
    assert change["k"] == 5 and 0.0 <= change["mean_overlap"] <= 1.0
