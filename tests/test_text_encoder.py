"""MiniLMTextEncoder: offline loading, vectors checked against sentence-transformers and the model card recipe."""

from __future__ import annotations

import numpy as np
import pytest

from xrec.encoders.base import Encoder
from xrec.encoders.text import MiniLMTextEncoder, default_model_dir, text_problems
from xrec.errors import ConfigError, DataError

SENTENCES = [
    "A man is eating food.",
    "A man is eating a piece of bread.",
    "The girl is carrying a baby.",
    "A man is riding a horse.",
    "A woman is playing violin.",
    "Two men pushed carts through the woods.",
    "A man is riding a white horse on an enclosed ground.",
    "A monkey is playing drums.",
]


@pytest.fixture(scope="module")
def encoder() -> MiniLMTextEncoder:
    return MiniLMTextEncoder(batch_size=4).load()


@pytest.fixture(scope="module")
def vectors(encoder) -> np.ndarray:
    return encoder.encode(SENTENCES)


def test_shape_dtype_unit_rows(encoder, vectors):
    assert isinstance(encoder, Encoder)
    assert encoder.dim == 384
    assert vectors.shape == (len(SENTENCES), 384)
    assert vectors.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(vectors, axis=1), 1.0, atol=1e-5)


def test_cosines_match_sentence_transformers_cos_sim(vectors):
    # Reference library: sentence_transformers.util.cos_sim on the same model folder,
    # loaded directly by sentence-transformers and encoded without normalization.
    from sentence_transformers import SentenceTransformer, util

    reference = SentenceTransformer(str(default_model_dir()), device="cpu", local_files_only=True)
    raw = reference.encode(SENTENCES, batch_size=32, convert_to_numpy=True, normalize_embeddings=False)
    expected = util.cos_sim(raw, raw).numpy()
    np.testing.assert_allclose(vectors @ vectors.T, expected, atol=1e-5)


def test_vectors_match_model_card_mean_pooling(vectors):
    # Outside reference: the all-MiniLM-L6-v2 model card's "Usage (HuggingFace
    # Transformers)" recipe — plain transformers AutoModel, attention-masked mean
    # pooling, then L2 normalization — which does not go through sentence-transformers.
    import torch
    from transformers import AutoModel, AutoTokenizer

    folder = str(default_model_dir())
    tokenizer = AutoTokenizer.from_pretrained(folder, local_files_only=True)
    model = AutoModel.from_pretrained(folder, local_files_only=True).eval()
    batch = tokenizer(SENTENCES, padding=True, truncation=True, return_tensors="pt")
    with torch.no_grad():
        tokens = model(**batch)[0]
    mask = batch["attention_mask"].unsqueeze(-1).float()
    pooled = (tokens * mask).sum(1) / mask.sum(1).clamp(min=1e-9)
    expected = torch.nn.functional.normalize(pooled, p=2, dim=1).numpy()
    np.testing.assert_allclose(vectors, expected, atol=1e-4)


def test_paraphrases_score_above_unrelated_pairs(encoder):
    # (common practice, no source): a sentence model ranks a paraphrase above an unrelated sentence.
    pairs = [
        ("The cat sat on the mat.", "A cat was sitting on a rug.", "Interest rates rose again this quarter."),
        ("How do I reset my password?", "What are the steps to change my login password?", "The river flooded the valley."),
        ("A red leather handbag with a gold clasp.", "Crimson leather purse, golden buckle.", "Quantum computers use qubits."),
    ]
    flat = [t for triple in pairs for t in triple]
    v = encoder.encode(flat).reshape(len(pairs), 3, -1)
    para = np.einsum("pd,pd->p", v[:, 0], v[:, 1])
    unrelated = np.einsum("pd,pd->p", v[:, 0], v[:, 2])
    assert (para > unrelated + 0.2).all(), (para, unrelated)


def test_batch_size_and_order_do_not_change_vectors(encoder, vectors):
    one_by_one = MiniLMTextEncoder(batch_size=1)
    one_by_one.model_ = encoder.model_
    np.testing.assert_allclose(one_by_one.encode(SENTENCES), vectors, atol=1e-5)
    reversed_vectors = encoder.encode(SENTENCES[::-1])
    np.testing.assert_allclose(reversed_vectors[::-1], vectors, atol=1e-5)


def test_bad_texts_raise_by_default_naming_positions(encoder):
    with pytest.raises(DataError) as info:
        encoder.encode(["fine", "", None, "   ", 3.5])
    message = str(info.value)
    assert "4 of 5 texts" in message
    for pos in ("#1", "#2", "#3", "#4"):
        assert pos in message
    assert "#0" not in message
    assert "on_error='skip'" in message


def test_skip_flags_bad_texts_and_says_how_many(encoder, vectors):
    skipper = MiniLMTextEncoder(on_error="skip")
    skipper.model_ = encoder.model_
    contents = [SENTENCES[0], "", None, SENTENCES[1]]
    with pytest.warns(UserWarning, match=r"skipped 2 of 4 texts"):
        out, ok = skipper.encode_with_mask(contents)
    assert ok.tolist() == [True, False, False, True]
    assert out.shape == (4, 384)
    np.testing.assert_array_equal(out[~ok], 0.0)
    np.testing.assert_allclose(out[ok], vectors[:2], atol=1e-5)


def test_all_bad_under_skip_needs_no_model():
    skipper = MiniLMTextEncoder(on_error="skip")
    with pytest.warns(UserWarning):
        out, ok = skipper.encode_with_mask(["", None])
    assert not ok.any() and out.shape == (2, 384)
    assert not hasattr(skipper, "model_")


def test_text_problems_reasons():
    problems = text_problems(["ok", "", " \n", b"bytes", None])
    assert sorted(problems) == [1, 2, 3, 4]
    assert "empty" in problems[1] and "not a string" in problems[3]


def test_single_string_is_refused(encoder):
    with pytest.raises(DataError, match="single str"):
        encoder.encode("just one text")


def test_settings_checked():
    with pytest.raises(ConfigError, match="on_error"):
        MiniLMTextEncoder(on_error="ignore").encode(["x"])  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match="batch_size"):
        MiniLMTextEncoder(batch_size=0).encode(["x"])
    with pytest.raises(ConfigError, match="modules.json"):
        MiniLMTextEncoder(model_dir="/nonexistent/folder").load()


def test_identity_and_version_key_the_cache():
    assert MiniLMTextEncoder().cache_key == "all-MiniLM-L6-v2@1"
    assert MiniLMTextEncoder(max_seq_length=256).cache_key == "all-MiniLM-L6-v2@1"
    assert MiniLMTextEncoder(max_seq_length=64).cache_key != MiniLMTextEncoder().cache_key
    assert MiniLMTextEncoder(model_dir="/some/other").identity != MiniLMTextEncoder().identity


def test_torch_threads_restored_and_no_output(encoder, capfd):
    import torch

    capfd.readouterr()
    before = torch.get_num_threads()
    encoder.encode(SENTENCES[:2], progress=False)
    assert torch.get_num_threads() == before
    captured = capfd.readouterr()
    assert captured.out == "" and captured.err == ""



def test_pickled_encoder_leaves_the_network_behind_and_encodes_the_same(encoder, vectors):
    """What a Dask worker receives: settings only; it loads the same weights on first use."""
    import pickle

    copy = pickle.loads(pickle.dumps(encoder.load()))
    assert not hasattr(copy, "model_")
    np.testing.assert_allclose(copy.encode(SENTENCES[:3]), vectors[:3], atol=1e-6)
