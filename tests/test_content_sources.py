"""Content sources: text, image, cross-modal and early-fusion similarity."""

from __future__ import annotations

import os

import io
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image
from skimage import data as skdata
from sklearn.metrics.pairwise import cosine_similarity

from xrec.data.catalog import Catalog
from xrec.encoders.bridge import ImageNetProbsEncoder, make_image_encoder, make_text_encoder
from xrec.encoders.cache import EmbeddingCache
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources import make_source, source_kinds
from xrec.sources.content import (
    CrossModalSource,
    EarlyFusionSource,
    ImageSource,
    TextSource,
    history_weights,
    item_texts,
    user_profiles,
)

DAY = 86400.0

# Six items: photos from scikit-image's sample data, whose subjects its documentation
# names (chelsea: a cat; coffee: a cup of coffee; rocket: a rocket on its launch pad).
# Items 0-2 are bought; items 3-5 are cold (never bought) and are the only ones whose
# text says what is in the picture.
PHOTOS = ("chelsea", "coffee", "rocket", "chelsea", "coffee", "rocket")
TEXTS = (
    "Product one",
    "Product two",
    "Product three",
    "A sleepy tabby cat curled up",
    "A cup of hot espresso coffee",
    "A space rocket on the launch pad",
)


@pytest.fixture(scope="module")
def catalog(tmp_path_factory: pytest.TempPathFactory) -> Catalog:
    root = tmp_path_factory.mktemp("photos")
    for i, name in enumerate(PHOTOS):
        img = Image.fromarray(getattr(skdata, name)())
        # centre-ish crops so that two items never share bytes (cache keys)
        w, h = img.size
        img = img.crop((i, i, w - i, h - i)) if i >= 3 else img
        buf = io.BytesIO()
        img.save(buf, "PNG")
        (root / f"{i}.png").write_bytes(buf.getvalue())
    frame = pd.DataFrame(
        {
            "item": [f"i{j}" for j in range(6)],
            "text": list(TEXTS),
            "tags": ["pet|animal", "drink", "space|vehicle", "pet|animal", "drink", "space|vehicle"],
            "colour": ["grey", "brown", "white", "grey", "brown", "white"],
            "image": [f"{i}.png" for i in range(6)],
        }
    )
    return Catalog.from_frame(frame, text=["text"], multilabel=["tags"], categorical=["colour"], image="image", image_root=root)


@pytest.fixture(scope="module")
def cache_dir(request: pytest.FixtureRequest) -> str:
    # pytest's own cross-run cache folder: entries are keyed by content and encoder, so a
    # stale one is never used, and reruns skip encoding the 1,000 ImageNet class names
    return os.environ.get("XREC_CACHE_DIR") or str(request.config.cache.mkdir("xrec-content-embeddings"))


@pytest.fixture(scope="module")
def text_reference() -> np.ndarray:
    return make_text_encoder().encode(list(TEXTS))


def _fold(catalog: Catalog, rows, n_users: int) -> Fold:
    cols = ["user_idx", "item_idx", "timestamp", "weight"]
    train = pd.DataFrame(list(rows), columns=cols).astype({"user_idx": "int64", "item_idx": "int64", "timestamp": "float64", "weight": "float32"})
    return Fold(catalog=catalog, user_ids=np.array([f"u{u}" for u in range(n_users)]), train=train, heldout=train.iloc[:0])


# user 0: cat photo; user 1: coffee then (10 days later) rocket; user 2: nothing
ROWS = [(0, 0, 0.0, 1.0), (1, 1, 0.0, 1.0), (1, 2, 10 * DAY, 1.0)]


@pytest.fixture(scope="module")
def fold(catalog: Catalog) -> Fold:
    return _fold(catalog, ROWS, 3)


def _unit(a: np.ndarray) -> np.ndarray:
    n = np.linalg.norm(a, axis=1, keepdims=True)
    return np.divide(a, n, out=np.zeros_like(a), where=n > 0)


# -------------------------------------------------------------------------------- profiles


def test_history_weights_follow_the_half_life_definition(fold: Fold) -> None:
    h = history_weights(fold, 5.0).toarray()
    # half-life: a weight halves every half_life_days, i.e. w = 2^(-age / h) (common practice, no source);
    # user 1's coffee is 10 days older than their latest purchase -> 2^-2
    assert h[1, 1] == pytest.approx(0.25) and h[1, 2] == pytest.approx(1.0) and h[0, 0] == pytest.approx(1.0)
    assert history_weights(fold, None).toarray()[1].tolist() == [0, 1, 1, 0, 0, 0]


def test_user_profiles_are_normalized_weighted_means(fold: Fold) -> None:
    rng = np.random.default_rng(0)
    vectors = rng.normal(size=(6, 4)).astype(np.float32)
    prof = user_profiles(fold, vectors, half_life_days=5.0)
    expected = (0.25 * vectors[1] + vectors[2]) / 1.25
    np.testing.assert_allclose(prof[1], expected / np.linalg.norm(expected), rtol=1e-5)
    assert not prof[2].any()  # no history, no profile


def test_item_texts_write_labels_and_numbers() -> None:
    frame = pd.DataFrame({"item": ["a", "b"], "title": ["Heat", ""], "genres": ["Action|Crime", ""], "year": [1995.0, 2001.0]})
    cat = Catalog.from_frame(frame, text=["title"], multilabel=["genres"], numeric=["year"])
    assert item_texts(cat, ["title", "genres", "year"]) == ["Heat\nAction, Crime\n1995", "2001"]
    assert item_texts(cat) == ["Heat", ""]
    with pytest.raises(ConfigError, match="columns"):
        item_texts(cat, ["plot"])


# -------------------------------------------------------------------------------- text / image


def test_kinds_are_registered_and_settings_are_plain() -> None:
    assert {"text", "image", "cross_modal", "early_fusion"} <= set(source_kinds())
    src = make_source("cross_modal", profile="text", items="image", bridge="ridge", alpha=2.0)
    for value in src.get_params().values():
        assert value is None or isinstance(value, (str, int, float, bool, tuple, list, dict))
    with pytest.raises(ConfigError, match="no setting"):
        make_source("text", encoders="minilm")


def test_text_scores_equal_sklearn_cosine_of_profile_and_items(fold: Fold, cache_dir: str, text_reference: np.ndarray) -> None:
    src = TextSource(half_life_days=5.0, cache_dir=cache_dir).fit(fold)
    vectors = text_reference
    profile = 0.25 * _unit(vectors)[1] + _unit(vectors)[2]
    # reference library: sklearn.metrics.pairwise.cosine_similarity
    ref = cosine_similarity(profile[None], vectors)[0]
    np.testing.assert_allclose(src.score(np.array([1]))[0], ref, rtol=1e-4, atol=1e-5)
    assert src.is_low_rank and src.score(np.arange(3)).dtype == np.float32
    assert not src.score(np.array([2])).any()
    # the vectors went through the cache: every text has its entry, and a second fit adds none
    cache = EmbeddingCache(cache_dir)
    assert all(cache.entry_path(make_text_encoder(), t).is_file() for t in TEXTS)
    before = cache.count(make_text_encoder())
    again = TextSource(half_life_days=5.0, cache_dir=cache_dir).fit(fold)
    assert cache.count(make_text_encoder()) == before
    np.testing.assert_array_equal(again.item_factors_, src.item_factors_)


def test_text_item_without_text_scores_zero(catalog: Catalog, cache_dir: str) -> None:
    frame = catalog.items.copy()
    frame.loc[4, "text"] = "   "
    cat = Catalog.from_frame(frame, text=["text"], check_images=False)
    with pytest.warns(UserWarning, match="i4"):
        src = TextSource(cache_dir=cache_dir).fit(_fold(cat, ROWS, 3))
    assert src.has_content_.tolist() == [True, True, True, True, False, True]
    assert src.score(np.array([0]))[0, 4] == 0.0


def test_image_scores_equal_sklearn_cosine(catalog: Catalog, fold: Fold, cache_dir: str) -> None:
    src = ImageSource(cache_dir=cache_dir).fit(fold)
    vectors = make_image_encoder().encode([catalog.image_path(i).read_bytes() for i in range(6)])
    # reference library: sklearn.metrics.pairwise.cosine_similarity
    np.testing.assert_allclose(src.score(np.array([0]))[0], cosine_similarity(vectors[:1], vectors)[0], rtol=1e-4, atol=1e-5)
    # the same photo (slightly cropped) is the nearest other item
    assert int(np.argsort(-src.score(np.array([0]))[0])[1]) == 3
    with pytest.raises(ConfigError, match="image column"):
        ImageSource(cache_dir=cache_dir).fit(_fold(Catalog.from_frame(catalog.items[["item", "text"]], text=["text"]), ROWS, 3))


def test_image_source_crop_reaches_the_encoder(catalog: Catalog, fold: Fold, cache_dir: str) -> None:
    src = ImageSource(crop=0.6, cache_dir=cache_dir).fit(fold)
    vectors = make_image_encoder(crop=0.6).encode([catalog.image_path(i).read_bytes() for i in range(6)])
    np.testing.assert_allclose(src.score(np.array([0]))[0], cosine_similarity(vectors[:1], vectors)[0], rtol=1e-4, atol=1e-5)
    whole = ImageSource(cache_dir=cache_dir).fit(fold)
    assert not np.allclose(src.score(np.array([0])), whole.score(np.array([0])), atol=1e-3)
    with pytest.raises(ConfigError, match="crop"):
        ImageSource(crop=0, cache_dir=cache_dir).fit(fold)


# -------------------------------------------------------------------------------- cross-modal


def test_cross_modal_conse_ranks_cold_items_by_what_the_history_shows(
    catalog: Catalog, fold: Fold, cache_dir: str, text_reference: np.ndarray
) -> None:
    src = CrossModalSource(profile="image", items="text", bridge="conse", cache_dir=cache_dir).fit(fold)
    scores = src.score(np.arange(2))
    cold = scores[:, 3:]  # items nobody bought, scored from their descriptions only
    # user 0 bought the cat photo -> the cat description; ImageNet classes of scikit-image's
    # "chelsea" are domestic cats (tabby, tiger cat, Egyptian cat: common knowledge of the
    # ImageNet-1k label set (from memory))
    assert int(np.argmax(cold[0])) == 0
    # user 1 bought the coffee and rocket photos -> the cat description is the least like them
    assert int(np.argmin(cold[1])) == 0
    # the scores are cosine between the bridged profile and the item text vectors
    probs = EmbeddingCache(cache_dir).encode(ImageNetProbsEncoder(make_image_encoder()), [catalog.image_path(0).read_bytes()])
    bridged = src.bridge_.transform(probs)
    np.testing.assert_allclose(scores[0], cosine_similarity(bridged, text_reference)[0], rtol=1e-4, atol=1e-5)


def test_cross_modal_text_to_image_and_fitted_bridges(catalog: Catalog, fold: Fold, cache_dir: str) -> None:
    rev = CrossModalSource(profile="text", items="image", bridge="conse", cache_dir=cache_dir).fit(fold)
    assert rev.score(np.arange(3)).shape == (3, 6)
    for bridge, extra in (("ridge", {"alpha": 1.0}), ("cca", {"n_components": 2})):
        src = CrossModalSource(profile="image", items="text", bridge=bridge, cache_dir=cache_dir, **extra).fit(fold)
        s = src.score(np.arange(3))
        assert s.shape == (3, 6) and np.isfinite(s).all() and not s[2].any()
        assert src.bridge_.fitted_


def test_cross_modal_conse_prior_is_the_catalog_mean_prediction(catalog: Catalog, fold: Fold, cache_dir: str) -> None:
    src = CrossModalSource(bridge="conse", prior_correction=True, cache_dir=cache_dir).fit(fold)
    probs = EmbeddingCache(cache_dir).encode(
        ImageNetProbsEncoder(make_image_encoder()), [catalog.image_path(i).read_bytes() for i in range(len(catalog))]
    )
    # the prior comes from catalog images only (no interactions): their mean class probability
    np.testing.assert_allclose(src.bridge_.class_prior_, probs.astype(np.float64).mean(axis=0), rtol=1e-5, atol=1e-9)
    assert src.score(np.arange(2)).shape == (2, 6)
    assert CrossModalSource(bridge="conse", cache_dir=cache_dir).fit(fold).bridge_.class_prior_ is None


def test_cross_modal_settings_are_checked(fold: Fold, cache_dir: str) -> None:
    with pytest.raises(ConfigError, match="profile"):
        CrossModalSource(profile="audio").fit(fold)
    with pytest.raises(ConfigError, match="bridge"):
        CrossModalSource(bridge="pca").fit(fold)
    with pytest.raises(ConfigError, match="clip_weights"):
        CrossModalSource(bridge="clip", cache_dir=cache_dir).fit(fold)
    with pytest.raises(ConfigError, match="half_life_days"):
        CrossModalSource(half_life_days=0).fit(fold)


# -------------------------------------------------------------------------------- early fusion


def test_early_fusion_blocks_add_weighted_cosines(catalog: Catalog, fold: Fold, cache_dir: str) -> None:
    w_text, w_attr = 2.0, 1.0
    src = EarlyFusionSource(modalities=["text", "attributes"], weights={"text": w_text}, cache_dir=cache_dir).fit(fold)
    text = make_source("text", cache_dir=cache_dir).fit(fold)
    attr = make_source("attributes").fit(fold)
    # for unit blocks a, b and unit blocks c, d: <(w1 a, w2 b), (w1 c, w2 d)> = w1² <a,c> + w2² <b,d>,
    # each concatenation having length sqrt(w1² + w2²) (inner-product algebra, no source)
    item = src.item_factors_
    assert src.blocks_["text"] == (0, 384)
    pair = item @ item.T
    expected = (w_text**2 * (text.item_factors_ @ text.item_factors_.T) + w_attr**2 * (attr.item_factors_ @ attr.item_factors_.T)) / (
        w_text**2 + w_attr**2
    )
    np.testing.assert_allclose(pair, expected, rtol=1e-4, atol=1e-5)
    assert src.score(np.arange(3)).shape == (3, 6)


def test_early_fusion_settings_are_checked(fold: Fold) -> None:
    with pytest.raises(ConfigError, match="modalities"):
        EarlyFusionSource(modalities=["text", "smell"]).fit(fold)
    with pytest.raises(ConfigError, match="weights"):
        EarlyFusionSource(modalities=["text"], weights={"image": 1.0}).fit(fold)
    with pytest.raises(ConfigError, match="weights.text"):
        EarlyFusionSource(modalities=["text"], weights={"text": -1.0}).fit(fold)


# -------------------------------------------------------------------------------- CLIP


TINY_CLIP = "xrec-content-test-tiny-clip"


def test_cross_modal_clip_scores_history_images_against_item_texts(catalog: Catalog, fold: Fold, tmp_path: Path) -> None:
    # No CLIP weights exist offline: a tiny random CLIP registered through open_clip's public
    # add_model_config, saved, and loaded back through the same path a real file takes.
    from xrec.encoders.clip import ClipEncoders  # first: it lets torchvision import beside the CPU torch

    import open_clip  # noqa: E402
    import torch  # noqa: E402

    config = {
        "embed_dim": 8,
        "vision_cfg": {"image_size": 32, "layers": 1, "width": 16, "head_width": 8, "patch_size": 16},
        "text_cfg": {"context_length": 77, "vocab_size": 49408, "width": 16, "heads": 2, "layers": 1},
    }
    (tmp_path / f"{TINY_CLIP}.json").write_text(json.dumps(config))
    open_clip.add_model_config(tmp_path / f"{TINY_CLIP}.json")
    torch.manual_seed(0)
    weights = tmp_path / "tiny.pt"
    torch.save(open_clip.create_model(TINY_CLIP, pretrained=None).state_dict(), weights)

    src = CrossModalSource(bridge="clip", clip_model=TINY_CLIP, clip_weights=str(weights), cache_dir=str(tmp_path / "cache")).fit(fold)
    assert src.bridge_ is None and src.item_factors_.shape == (6, 8)
    clip = ClipEncoders(TINY_CLIP, weights=weights)
    images = clip.image.encode([catalog.image_path(i).read_bytes() for i in range(6)])
    texts = clip.text.encode(list(TEXTS))
    profile = _unit(images)[1] + _unit(images)[2]  # user 1, equal weights
    # reference library: sklearn.metrics.pairwise.cosine_similarity
    np.testing.assert_allclose(src.score(np.array([1]))[0], cosine_similarity(profile[None], texts)[0], rtol=1e-4, atol=1e-5)


def test_centred_text_scores_equal_sklearn_cosine_of_centred_vectors(fold: Fold, cache_dir: str, text_reference: np.ndarray) -> None:
    from sklearn.preprocessing import normalize

    src = TextSource(cache_dir=cache_dir, center=True).fit(fold)
    # Reference: scikit-learn's row normalisation and cosine on independently centred vectors.
    vectors = normalize(text_reference.astype(np.float64))
    centred = vectors - vectors.mean(axis=0)
    history = np.zeros((fold.n_users, fold.n_items))
    history[fold.train["user_idx"], fold.train["item_idx"]] = 1.0
    profiles = history @ centred
    users = np.arange(fold.n_users)
    expected = cosine_similarity(profiles, centred)
    got = src.score(users)
    has_history = history.sum(axis=1) > 0
    np.testing.assert_allclose(got[has_history], expected[has_history], atol=1e-5)
