"""Bridges from image vectors into the text space: ConSE, CCA, ridge, and their retrieval check."""

from __future__ import annotations

import os

import numpy as np
import pytest
from sklearn.cross_decomposition import CCA

from xrec.encoders.bridge import (
    CCABridge,
    ConSEBridge,
    ImageNetProbsEncoder,
    RidgeBridge,
    bridge_recall,
    make_bridge,
)
from xrec.errors import ConfigError, DataError

# --------------------------------------------------------------------------------------
# ConSE: hand-worked from the paper's definition
# --------------------------------------------------------------------------------------

# Norouzi et al., "Zero-Shot Learning by Convex Combination of Semantic Embeddings",
# ICLR 2014, eq. (1): f(x) = (1/Z) Σ_{t=1..T} p(ŷ(x,t) | x) · s(ŷ(x,t)),
# Z = Σ_{t=1..T} p(ŷ(x,t) | x), where ŷ(x,t) is the t-th most probable training class
# and s(y) the semantic (text) embedding of class y.
#
# Four classes with 2-d embeddings s0 = (1, 0), s1 = (0, 1), s2 = (1, 1), s3 = (-1, 0).
# Image A: p = (0.50, 0.30, 0.15, 0.05)
#   T = 1: top class 0                     -> f = s0                            = (1, 0)
#   T = 2: top classes 0, 1;  Z = 0.80     -> f = (0.5·s0 + 0.3·s1) / 0.8       = (0.625, 0.375)
#   T = 3: top classes 0, 1, 2; Z = 0.95   -> f = (0.5·s0 + 0.3·s1 + 0.15·s2) / 0.95
#                                            = (0.65, 0.45) / 0.95             = (0.684211, 0.473684)
#   T = 4: Z = 1                           -> f = (0.5 + 0.15 - 0.05, 0.3 + 0.15) = (0.60, 0.45)
# Image B: p = (0.10, 0.20, 0.60, 0.10)
#   T = 2: top classes 2, 1;  Z = 0.80     -> f = (0.6·s2 + 0.2·s1) / 0.8 = (0.6, 0.8) / 0.8 = (0.75, 1.0)
S = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0], [-1.0, 0.0]], dtype=np.float32)
P = np.array([[0.50, 0.30, 0.15, 0.05], [0.10, 0.20, 0.60, 0.10]], dtype=np.float32)


@pytest.mark.parametrize(
    ("t", "expected_a"),
    [(1, (1.0, 0.0)), (2, (0.625, 0.375)), (3, (0.65 / 0.95, 0.45 / 0.95)), (4, (0.60, 0.45))],
)
def test_conse_matches_hand_worked_example(t: int, expected_a: tuple[float, float]) -> None:
    out = ConSEBridge(top_t=t, class_vectors=S).fit().transform(P)
    assert out.shape == (2, 2) and out.dtype == np.float32
    np.testing.assert_allclose(out[0], expected_a, atol=1e-6)


def test_conse_orders_classes_by_probability_not_index() -> None:
    out = ConSEBridge(top_t=2, class_vectors=S).fit().transform(P)
    np.testing.assert_allclose(out[1], (0.75, 1.0), atol=1e-6)  # image B above


def test_conse_is_invariant_to_probability_scale_and_zero_rows_stay_zero() -> None:
    bridge = ConSEBridge(top_t=3, class_vectors=S).fit()
    # the renormalization over the top T makes only relative probabilities matter (eq. 1's 1/Z)
    np.testing.assert_allclose(bridge.transform(P * 7.0), bridge.transform(P), atol=1e-6)
    assert not bridge.transform(np.zeros((1, 4))).any()


def test_conse_text_side_is_identity_and_settings_are_checked() -> None:
    bridge = ConSEBridge(top_t=2, class_vectors=S).fit()
    np.testing.assert_array_equal(bridge.transform_text(S), S)
    with pytest.raises(ConfigError, match="top_t"):
        ConSEBridge(top_t=0, class_vectors=S).fit()
    with pytest.raises(ConfigError, match="exceeds"):
        ConSEBridge(top_t=5, class_vectors=S).fit()
    with pytest.raises(DataError, match="columns"):
        bridge.transform(np.ones((1, 3)))
    with pytest.raises(RuntimeError, match="not fitted"):
        ConSEBridge(class_vectors=S).transform(P)


# Prior correction: Saerens, Latinne & Decaestecker, "Adjusting the Outputs of a Classifier
# to New a Priori Probabilities", Neural Computation 14(1), 2002, eq. (2.4):
# p_new(y|x) ∝ p(y|x) · p_new(y) / p_old(y). With p_old = the mean prediction over the
# fitted images and p_new uniform, the weights are p(y|x) / p_old(y), then eq. 1 of ConSE.
# Fitted on images A and B: p_old = ((0.5+0.1)/2, (0.3+0.2)/2, (0.15+0.6)/2, (0.05+0.1)/2)
#                                 = (0.30, 0.25, 0.375, 0.075)
# A: p/p_old = (1.6667, 1.2, 0.4, 0.6667); T = 2: classes 0, 1, Z = 2.8667
#    -> f = (1.6667, 1.2) / 2.8667 = (0.581395, 0.418605)
# B: p/p_old = (0.3333, 0.8, 1.6, 1.3333); T = 2: classes 2, 3 (class 3 overtakes class 1)
#    -> f = (1.6·(1, 1) + 1.3333·(-1, 0)) / 2.9333 = (0.090909, 0.545455)
def test_conse_prior_correction_matches_hand_worked_example() -> None:
    out = ConSEBridge(top_t=2, class_vectors=S, prior_correction=True).fit(P).transform(P)
    np.testing.assert_allclose(out, [[0.581395, 0.418605], [0.090909, 0.545455]], atol=1e-6)
    np.testing.assert_allclose(ConSEBridge(class_vectors=S, top_t=2, prior_correction=True).fit(P).class_prior_, [0.30, 0.25, 0.375, 0.075])


def test_conse_prior_ignores_zero_rows_and_needs_images() -> None:
    with_skipped = np.vstack([P, np.zeros((3, 4), dtype=np.float32)])
    a = ConSEBridge(top_t=2, class_vectors=S, prior_correction=True).fit(with_skipped)
    np.testing.assert_allclose(a.class_prior_, [0.30, 0.25, 0.375, 0.075])
    assert not a.transform(np.zeros((1, 4))).any()
    # a class no fitted image gives any probability is never chosen, rather than 0/0
    b = ConSEBridge(top_t=1, class_vectors=S, prior_correction=True).fit(np.array([[0.5, 0.5, 0.0, 0.0]]))
    np.testing.assert_allclose(b.transform(np.array([[0.2, 0.3, 0.5, 0.0]])), [[0.0, 1.0]])
    with pytest.raises(ConfigError, match="fit\\(image\\)"):
        ConSEBridge(top_t=2, class_vectors=S, prior_correction=True).fit()
    with pytest.raises(DataError, match="every image row is zero"):
        ConSEBridge(top_t=2, class_vectors=S, prior_correction=True).fit(np.zeros((2, 4)))
    with pytest.raises(ConfigError, match="prior_correction"):
        ConSEBridge(top_t=2, class_vectors=S, prior_correction="yes").fit(P)  # type: ignore[arg-type]


# --------------------------------------------------------------------------------------
# CCA: against scikit-learn's own transform
# --------------------------------------------------------------------------------------


def _paired(n: int = 120, dx: int = 12, dy: int = 8, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 3))
    x = z @ rng.normal(size=(3, dx)) + 0.3 * rng.normal(size=(n, dx)) + rng.normal(size=dx) * 5
    y = z @ rng.normal(size=(3, dy)) + 0.3 * rng.normal(size=(n, dy))
    return x.astype(np.float32), y.astype(np.float32)


def test_cca_transform_equals_sklearns_transform() -> None:
    x, y = _paired()
    x_new, y_new = _paired(n=30, seed=1)
    ours = CCABridge(n_components=3, pca_components=None, correlation_power=0).fit(x, y)
    # reference: scikit-learn's CCA (sklearn.cross_decomposition.CCA.transform), same data, same settings
    ref = CCA(n_components=3, scale=True, max_iter=500, tol=1e-6).fit(x.astype(np.float64), y.astype(np.float64))
    ref_x, ref_y = ref.transform(x_new.astype(np.float64), y_new.astype(np.float64))
    np.testing.assert_allclose(ours.transform(x_new), ref_x, rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(ours.transform_text(y_new), ref_y, rtol=1e-4, atol=1e-4)


def test_cca_after_pca_equals_sklearns_pca_then_cca_and_weights_by_correlation() -> None:
    from sklearn.decomposition import PCA

    x, y = _paired(n=150, dx=20, dy=10, seed=3)
    x_new, y_new = _paired(n=25, dx=20, dy=10, seed=4)
    ours = CCABridge(n_components=2, pca_components=6, correlation_power=0).fit(x, y)
    # reference: scikit-learn's PCA(svd_solver="full").transform on each side, then CCA.transform
    px = PCA(6, svd_solver="full").fit(x.astype(np.float64))
    py = PCA(6, svd_solver="full").fit(y.astype(np.float64))
    ref = CCA(n_components=2, max_iter=500, tol=1e-6).fit(px.transform(x.astype(np.float64)), py.transform(y.astype(np.float64)))
    ref_x, ref_y = ref.transform(px.transform(x_new.astype(np.float64)), py.transform(y_new.astype(np.float64)))
    np.testing.assert_allclose(ours.transform(x_new), ref_x, rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(ours.transform_text(y_new), ref_y, rtol=1e-4, atol=1e-4)
    # canonical correlations: corr(x_scores[:, j], y_scores[:, j]) on the training pairs (numpy.corrcoef as reference)
    sx, sy = ref.transform(px.transform(x.astype(np.float64)), py.transform(y.astype(np.float64)))
    r = np.array([np.corrcoef(sx[:, j], sy[:, j])[0, 1] for j in range(2)])
    np.testing.assert_allclose(ours.correlations_, r, atol=1e-5)
    weighted = CCABridge(n_components=2, pca_components=6, correlation_power=2.0).fit(x, y)
    np.testing.assert_allclose(weighted.transform(x_new), ref_x * r**2, rtol=1e-4, atol=1e-4)


def test_cca_first_pair_is_highly_correlated_on_shared_latent_data() -> None:
    x, y = _paired(n=400, seed=2)
    bridge = CCABridge(n_components=2).fit(x, y)
    u, v = bridge.transform(x), bridge.transform_text(y)
    assert np.corrcoef(u[:, 0], v[:, 0])[0, 1] > 0.9


def test_cca_checks_components() -> None:
    x, y = _paired(n=20)
    with pytest.raises(ConfigError, match="n_components"):
        CCABridge(n_components=9).fit(x, y)  # text side has 8 dims
    with pytest.raises(ConfigError, match="pca_components"):
        CCABridge(n_components=2, pca_components=0).fit(x, y)
    with pytest.raises(ConfigError, match="correlation_power"):
        CCABridge(n_components=2, correlation_power=-1.0).fit(x, y)
    with pytest.raises(DataError, match="same items"):
        CCABridge(n_components=2).fit(x, y[:-1])


# --------------------------------------------------------------------------------------
# ridge: recovers a known linear map; matches the closed form
# --------------------------------------------------------------------------------------


def test_ridge_recovers_a_known_linear_map() -> None:
    rng = np.random.default_rng(5)
    x = rng.normal(size=(200, 10))
    w = rng.normal(size=(10, 4))
    b = rng.normal(size=4)
    y = x @ w + b
    # noise-free, full-rank data: least squares (ridge with a vanishing penalty) returns the
    # generating map exactly (common practice, no source)
    bridge = RidgeBridge(alpha=1e-8).fit(x, y)
    np.testing.assert_allclose(bridge.coef_, w, atol=1e-4)
    np.testing.assert_allclose(bridge.intercept_, b, atol=1e-4)
    x_new = rng.normal(size=(7, 10))
    np.testing.assert_allclose(bridge.transform(x_new), x_new @ w + b, atol=1e-3)


def test_ridge_matches_the_closed_form_with_a_penalty() -> None:
    rng = np.random.default_rng(6)
    x = rng.normal(size=(50, 6))
    y = x @ rng.normal(size=(6, 3)) + rng.normal(size=(50, 3))
    alpha = 3.0
    # Hoerl & Kennard (1970) ridge estimate on centred data, intercept unpenalized:
    # W = (Xc'Xc + αI)^-1 Xc'Yc, b = ȳ - x̄ W  (from memory)
    xc, yc = x - x.mean(0), y - y.mean(0)
    w = np.linalg.solve(xc.T @ xc + alpha * np.eye(6), xc.T @ yc)
    bridge = RidgeBridge(alpha=alpha).fit(x, y)
    np.testing.assert_allclose(bridge.coef_, w, atol=1e-4)
    np.testing.assert_allclose(bridge.intercept_, y.mean(0) - x.mean(0) @ w, atol=1e-4)
    with pytest.raises(ConfigError, match="alpha"):
        RidgeBridge(alpha=-1.0).fit(x, y)


# --------------------------------------------------------------------------------------
# retrieval measurement
# --------------------------------------------------------------------------------------


def test_bridge_recall_is_one_for_a_perfect_bridge_and_zero_when_everything_ties() -> None:
    rng = np.random.default_rng(7)
    text = rng.normal(size=(100, 5))
    image = text @ rng.normal(size=(5, 5))  # an invertible map: ridge undoes it
    perfect = bridge_recall(RidgeBridge(alpha=1e-8), image, text, k=1, test_fraction=0.3, seed=0)
    assert perfect["recall"] == 1.0 and perfect["n_test"] == 30 and perfect["n_train"] == 70
    assert perfect["random"] == pytest.approx(1 / 30) and perfect["lift"] == pytest.approx(30.0)
    # every bridged image identical: the target ties with all 30, so it ranks 30th (ties never favour the bridge)
    flat = ConSEBridge(top_t=1, class_vectors=np.ones((4, 5)))
    tied = bridge_recall(flat, np.full((100, 4), 0.25), text, k=10, test_fraction=0.3)
    assert tied["recall"] == 0.0


class _OffsetBridge(RidgeBridge):
    """A perfect bridge whose images all carry one large shared vector."""

    def transform(self, image: np.ndarray) -> np.ndarray:
        return (np.asarray(image, dtype=np.float64) + 50.0).astype(np.float32)


def test_bridge_recall_center_removes_a_shared_offset() -> None:
    rng = np.random.default_rng(9)
    text = rng.normal(size=(300, 8))
    bridge = _OffsetBridge()
    # the offset swamps each image's own direction: cosine sees mostly the shared part
    assert bridge_recall(bridge, text, text, k=1, test_fraction=0.5, seed=0)["recall"] < 0.5
    # centring subtracts the mean over all items, and the offset with it
    assert bridge_recall(bridge, text, text, k=1, test_fraction=0.5, seed=0, center=True)["recall"] == 1.0


def test_bridge_recall_of_an_unrelated_bridge_is_near_random() -> None:
    rng = np.random.default_rng(8)
    text, image = rng.normal(size=(1000, 6)), rng.normal(size=(1000, 6))
    out = bridge_recall(RidgeBridge(alpha=1.0), image, text, k=10, test_fraction=0.5, seed=1)
    # unrelated pairs: recall@10 of 500 candidates ~ 10/500 = 0.02 (binomial sd ~ 0.006)
    assert out["recall"] < 0.05


def test_make_bridge_and_probs_encoder_checks() -> None:
    assert isinstance(make_bridge("cca", n_components=4), CCABridge)
    with pytest.raises(ConfigError, match="unknown"):
        make_bridge("pca")
    with pytest.raises(ConfigError, match="no setting"):
        make_bridge("ridge", top_t=3)
    with pytest.raises(ConfigError, match="class probabilities"):
        ImageNetProbsEncoder(base=object())  # type: ignore[arg-type]


# --------------------------------------------------------------------------------------
# product check on the demo shop (its own data, not an outside reference)
# --------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo_pairs(request: pytest.FixtureRequest) -> dict[str, np.ndarray]:
    from xrec.data.demo import load_demo_shop
    from xrec.sources.content import image_features_and_probs, text_vectors

    try:
        catalog = load_demo_shop().catalog
    except DataError as exc:
        pytest.skip(f"demo shop not available: {exc}")
    # pytest's cross-run cache: the first run encodes ~1,000 images and texts (the same
    # entries tests/test_demo.py and the notebooks read), later runs read them
    cache = os.environ.get("XREC_CACHE_DIR") or str(request.config.cache.mkdir("xrec-bridge-embeddings"))
    text, text_ok = text_vectors(catalog, cache_dir=cache)
    features, probs, image_ok = image_features_and_probs(catalog, cache_dir=cache)
    ok = text_ok & image_ok
    return {  # type: ignore[return-value]
        "text": text[ok],
        "features": features[ok],
        "probs": probs[ok],
        "catalog": catalog,
        "rows": np.flatnonzero(ok),
        "cache": cache,
    }


# Items of the crop check: a seeded sample of the demo shop, so that only these are encoded a
# second time (at the central crop) instead of the whole catalog.
CROP_SAMPLE = 120


@pytest.fixture(scope="module")
def crop_pairs(demo_pairs: dict) -> dict[str, np.ndarray]:
    from xrec.encoders.bridge import make_image_encoder
    from xrec.encoders.cache import EmbeddingCache

    take = np.sort(np.random.default_rng(0).choice(len(demo_pairs["rows"]), CROP_SAMPLE, replace=False))
    catalog = demo_pairs["catalog"]
    images = [catalog.image_path(int(i)).read_bytes() for i in demo_pairs["rows"][take]]
    # the product sits in the middle of a patterned background: the central 40% shows the emoji
    centre = ImageNetProbsEncoder(make_image_encoder("efficientnet_lite0", on_error="skip", crop=0.4))
    probs_centre, ok = EmbeddingCache(demo_pairs["cache"]).encode_with_mask(centre, images)
    assert ok.all()
    return {
        "text": demo_pairs["text"][take],
        "probs": demo_pairs["probs"][take],
        "probs_centre": probs_centre,
        "cache": demo_pairs["cache"],
    }


@pytest.mark.slow
@pytest.mark.parametrize("name", ["ridge", "cca"])
def test_alignment_bridges_retrieve_demo_shop_images_from_descriptions(name: str, demo_pairs: dict) -> None:
    out = bridge_recall(make_bridge(name), demo_pairs["features"], demo_pairs["text"], k=10, test_fraction=0.3, seed=0)
    assert out["n_test"] > 100  # 10x random is reachable only when 10/n_test < 0.1
    assert out["lift"] >= 10.0, out


def _conse_mean_lift(pairs: dict, probs: str, *, prior_correction: bool, center: bool, top_t: int = 10) -> float:
    bridge = ConSEBridge(top_t=top_t, prior_correction=prior_correction, cache_dir=pairs["cache"])
    runs = [bridge_recall(bridge, pairs[probs], pairs["text"], seed=s, center=center) for s in range(5)]
    return float(np.mean([r["lift"] for r in runs]))


def _conse_lift_over_all_pairs(pairs: dict, probs: str, *, prior_correction: bool, center: bool, k: int = 10) -> float:
    """Text -> image recall@k over every pair of the sample, over random (k / n).

    ConSE learns nothing from pairs (its class prior is the sample's mean prediction, as the
    content sources take the catalog's), so no pair needs holding out: every item queries.
    """
    bridge = ConSEBridge(prior_correction=prior_correction, cache_dir=pairs["cache"]).fit(pairs[probs])
    queries = bridge.transform_text(pairs["text"]).astype(np.float64)
    targets = bridge.transform(pairs[probs]).astype(np.float64)
    if center:
        queries -= queries.mean(axis=0)
        targets -= targets.mean(axis=0)
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    targets /= np.linalg.norm(targets, axis=1, keepdims=True)
    sims = queries @ targets.T
    rank = (sims >= np.diag(sims)[:, None]).sum(axis=1)  # ties never favour the bridge
    return float(np.mean(rank <= k)) / (k / len(rank))


@pytest.mark.slow
def test_conse_prior_correction_and_centring_sharpen_demo_shop_retrieval(demo_pairs: dict) -> None:
    plain = _conse_mean_lift(demo_pairs, "probs", prior_correction=False, center=False)
    # measured, seeds 0-4: plain 1.22x random; corrected and centred 2.12x
    assert _conse_mean_lift(demo_pairs, "probs", prior_correction=True, center=True) >= 1.4 * plain


@pytest.mark.slow
def test_central_crop_sharpens_conse_on_a_demo_shop_sample(crop_pairs: dict) -> None:
    plain = _conse_lift_over_all_pairs(crop_pairs, "probs", prior_correction=False, center=False)
    centre = _conse_lift_over_all_pairs(crop_pairs, "probs_centre", prior_correction=True, center=True)
    # measured on this sample: plain ConSE on whole images 0.8x random, corrected and centred
    # on the central 40% 3.4x (other seeded samples of 120: 0.8-1.4x and 2.7-3.9x; on the whole
    # catalog with held-out pairs, 1.2x and 5.2x)
    assert centre >= 2.0
    assert centre >= 2.0 * plain


@pytest.mark.slow
# Measured (seeds 0-4, recall@10 over ~308 held-out items): plain ConSE 1.2x random; corrected
# and centred 2.1x on whole images; the best settings found (central 40% crop, catalog class
# prior removed, both sides centred) 5.2x at T = 10, 5.6x at T = 30. Upper bound with
# ImageNet-1k classifiers: the bare emoji glyphs at 224 px on white, no frame or background,
# reach 7.6x (EfficientNet-Lite0) and 8.0x (Lite1; Lite2 7.6x; seeds 0-9), so the 10x goal
# needs a classifier whose classes cover emoji art.
@pytest.mark.xfail(strict=True, reason="ImageNet classes do not describe emoji artwork: ConSE measured 5.2x random at best here")
def test_conse_retrieves_demo_shop_images_from_descriptions(demo_pairs: dict) -> None:
    bridge = ConSEBridge(prior_correction=True, cache_dir=demo_pairs["cache"])
    out = bridge_recall(bridge, demo_pairs["probs"], demo_pairs["text"], k=10, test_fraction=0.3, seed=0, center=True)
    assert out["lift"] >= 10.0, out
