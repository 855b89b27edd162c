"""Your own vectors as input to the cross-modal bridges and to early fusion."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.preprocessing import normalize

from xrec.data.catalog import Catalog
from xrec.encoders.bridge import make_bridge
from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources import CrossModalSource, EarlyFusionSource
from xrec.sources.vectors import read_item_vectors

N_USERS, N_ITEMS = 6, 30


def _fold() -> Fold:
    rng = np.random.default_rng(5)
    rows = [(u, int(i), 0.0, 1.0) for u in range(N_USERS) for i in rng.choice(N_ITEMS, 3, replace=False)]
    train = pd.DataFrame(rows, columns=["user_idx", "item_idx", "timestamp", "weight"]).astype({"weight": "float32"})
    frame = pd.DataFrame({"item": [f"i{j}" for j in range(N_ITEMS)], "colour": np.array(["red", "blue", "green"])[np.arange(N_ITEMS) % 3]})
    return Fold(Catalog.from_frame(frame, categorical=["colour"]), np.array([f"u{u}" for u in range(N_USERS)]), train, train.iloc[:0])


@pytest.fixture
def pair_files(tmp_path):
    """"Image" vectors (.npy) and "text" vectors (Parquet) of the same items, linearly related."""
    rng = np.random.default_rng(8)
    image = rng.normal(size=(N_ITEMS, 10)).astype(np.float32)
    text = (image @ rng.normal(size=(10, 7)) + rng.normal(scale=0.5, size=(N_ITEMS, 7))).astype(np.float32)
    ids = [f"i{j}" for j in range(N_ITEMS)]
    np.save(tmp_path / "image.npy", image)
    (tmp_path / "ids.txt").write_text("\n".join(ids), encoding="utf-8")
    pq.write_table(pa.table({"item": ids, "v": pa.FixedSizeListArray.from_arrays(pa.array(text.ravel()), 7)}), tmp_path / "text.parquet")
    return {"image": {"path": str(tmp_path / "image.npy"), "ids": str(tmp_path / "ids.txt")}, "text": str(tmp_path / "text.parquet")}, image, text


@pytest.mark.parametrize(("bridge", "settings"), [("ridge", {"alpha": 1.0}), ("cca", {"n_components": 2, "pca_components": None})])
def test_cross_modal_takes_file_vectors_for_both_sides(pair_files, bridge, settings) -> None:
    files, image, text = pair_files
    fold = _fold()
    src = CrossModalSource(profile="image", items="text", bridge=bridge, image_vectors=files["image"], text_vectors=files["text"], **settings).fit(fold)
    # the same bridge fitted by hand on the arrays the files hold
    manual = make_bridge(bridge, **settings).fit(*(read_item_vectors(fold.catalog, **f)[0] for f in (files["image"], {"path": files["text"]})))
    items = normalize(manual.transform_text(text))  # scikit-learn's normalize as the row norm (reference library)
    np.testing.assert_allclose(src.item_factors_, items, atol=1e-5)
    assert src.has_content_.all() and src.bridge_ is not None


def test_cross_modal_refuses_file_vectors_with_conse_or_clip(pair_files) -> None:
    files, _, _ = pair_files
    for bridge in ("conse", "clip"):
        with pytest.raises(ConfigError, match="image_vectors.*'cca' and 'ridge'"):
            CrossModalSource(bridge=bridge, image_vectors=files["image"]).fit(_fold())


def test_early_fusion_takes_named_file_vectors(pair_files) -> None:
    from xrec.encoders.attributes import AttributeEncoder

    files, image, _ = pair_files
    fold = _fold()
    src = EarlyFusionSource(modalities=["attributes", "mine"], weights={"mine": 2.0}, vectors={"mine": files["image"]}).fit(fold)
    attrs = AttributeEncoder().fit_transform(fold.catalog)
    # concatenation of each block's unit rows times its weight, then unit rows again
    # (scikit-learn's normalize as the row norm, reference library)
    expected = normalize(np.hstack([normalize(attrs), 2.0 * normalize(image)]))
    np.testing.assert_allclose(src.item_factors_, expected, atol=1e-5)
    assert src.blocks_["mine"] == (attrs.shape[1], attrs.shape[1] + image.shape[1])
    with pytest.raises(ConfigError, match="'vectors'.*'text'"):
        EarlyFusionSource(modalities=["text"], vectors={"text": files["image"]}).fit(fold)
    with pytest.raises(ConfigError, match="modalities"):
        EarlyFusionSource(modalities=["attributes", "other"], vectors={"mine": files["image"]}).fit(fold)
