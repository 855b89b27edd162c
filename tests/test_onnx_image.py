"""The image encoder through ONNX Runtime against the PyTorch module's own forward pass."""

from __future__ import annotations

import io
import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage import data as skdata

from xrec.encoders.image import EfficientNetLite0Encoder
from xrec.errors import ConfigError

pytest.importorskip("onnxruntime")


def _png(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture(scope="session")
def graph_dir() -> Path:
    # The session's embedding cache folder (conftest.py): the graph is exported once, then reused.
    return Path(os.environ["XREC_CACHE_DIR"])


@pytest.fixture(scope="module")
def both(graph_dir) -> tuple[EfficientNetLite0Encoder, EfficientNetLite0Encoder]:
    onnx = EfficientNetLite0Encoder(runtime="onnx", graph_dir=graph_dir, batch_size=4).load()
    torch_ = EfficientNetLite0Encoder(runtime="torch", batch_size=4).load()
    return onnx, torch_


@pytest.fixture(scope="module")
def images() -> list[bytes]:
    # scikit-image's sample photos (the reference photos of test_image_encoder.py and more),
    # plus a few demo-shop product images.
    from xrec.data.demo import load_demo_shop

    photos = [_png(getattr(skdata, n)()) for n in ("chelsea", "coffee", "rocket", "astronaut")]
    photos.append(_png(skdata.stereo_motorcycle()[0]))
    shop = load_demo_shop()
    return photos + [shop.catalog.image_path(i).read_bytes() for i in range(6)]


def test_onnx_runtime_matches_the_pytorch_forward(both, images) -> None:
    onnx, torch_ = both
    assert onnx.runtime_ == "onnx" and onnx.graph_ is not None and torch_.graph_ is None
    a, b = onnx.encode_with_probs(images), torch_.encode_with_probs(images)
    assert a.ok.all() and b.ok.all()
    # The reference is the PyTorch module's own forward pass (timm's model, same weights):
    # the bound is 1e-4 max abs on the unit vectors.
    assert float(np.abs(a.vectors - b.vectors).max()) < 1e-4
    assert float(np.abs(a.probs - b.probs).max()) < 1e-4
    np.testing.assert_allclose(np.linalg.norm(a.vectors, axis=1), 1.0, atol=1e-5)
    # ImageNet-1k class indices (from memory, the standard class index): 281-285 domestic cats,
    # 967 espresso / 968 cup, 657 missile / 744 projectile -- the classes test_image_encoder.py checks.
    order = np.argsort(-a.probs, axis=1)
    assert order[0, 0] in range(281, 286)
    assert order[1, 0] in (967, 968)
    assert {657, 744} & set(order[2, :2].tolist())
    assert (order[:, 0] == np.argmax(b.probs, axis=1)).all()


def test_runtime_is_part_of_the_cache_identity(both) -> None:
    onnx, torch_ = both
    assert onnx.identity == torch_.identity + ":onnxruntime"
    assert onnx.cache_key != torch_.cache_key


def test_graph_is_kept_and_a_damaged_graph_is_exported_again(both, tmp_path) -> None:
    onnx, _ = both
    assert onnx.graph_.path.is_file() and onnx.graph_.path.suffix == ".onnx"
    again = EfficientNetLite0Encoder(runtime="onnx", graph_dir=onnx.graph_dir, batch_size=4).load()
    assert again.graph_.path == onnx.graph_.path and not again.graph_.exported  # read, not re-exported
    # A damaged copy (cut short) in a fresh folder: loading exports it again and works.
    folder = tmp_path / "graphs"
    target = folder / onnx.graph_.path.relative_to(onnx.graph_dir)
    target.parent.mkdir(parents=True)
    target.write_bytes(onnx.graph_.path.read_bytes()[:1000])
    fixed = EfficientNetLite0Encoder(runtime="onnx", graph_dir=folder, batch_size=4).load()
    assert fixed.graph_.exported and target.stat().st_size == onnx.graph_.path.stat().st_size


def test_bad_runtime_and_bad_items_on_the_onnx_path(both) -> None:
    with pytest.raises(ConfigError, match="runtime"):
        EfficientNetLite0Encoder(runtime="tensorrt").load()
    onnx, _ = both
    good = _png(skdata.chelsea())
    # Batches of 4 with the bad item in the second batch: the prefetching thread keeps order.
    items = [good] * 5 + [b"not an image"] + [good] * 3
    with pytest.warns(UserWarning, match="skipped 1 of 9"):
        result = onnx.encode_with_probs(items, on_error="skip")
    assert result.ok.tolist() == [True] * 5 + [False] + [True] * 3
    assert not result.vectors[5].any()
    np.testing.assert_allclose(result.vectors[[0, 4, 8]], np.repeat(result.vectors[:1], 3, axis=0), atol=1e-6)


def test_auto_falls_back_to_pytorch_without_onnxruntime(monkeypatch) -> None:
    from xrec.encoders import _onnx_graph

    monkeypatch.setattr(_onnx_graph, "onnx_available", lambda: False)
    enc = EfficientNetLite0Encoder()
    assert enc._runtime() == "torch" and not enc.identity.endswith(":onnxruntime")
    with pytest.raises(ConfigError, match="pip install onnxruntime"):
        EfficientNetLite0Encoder(runtime="onnx")._runtime()


def test_clip_image_tower_through_onnx_runtime(tmp_path) -> None:
    from test_clip import TINY

    from xrec.encoders.clip import ClipEncoders

    path = _tiny_clip(tmp_path)
    onnx = ClipEncoders(TINY, weights=path, batch_size=2, runtime="onnx", graph_dir=tmp_path).load()
    torch_ = ClipEncoders(TINY, weights=path, batch_size=2, runtime="torch").load()
    assert onnx.image_graph_ is not None and torch_.image_graph_ is None
    images = [_png(skdata.chelsea()), _png(skdata.coffee()), _png(skdata.rocket())]
    a, b = onnx.image.encode(images), torch_.image.encode(images)
    # The reference is open_clip's own encode_image on the same weights.
    assert float(np.abs(a - b).max()) < 1e-4
    assert onnx.image.identity == torch_.image.identity + ":onnxruntime"
    assert onnx.text.identity == torch_.text.identity  # the text tower stays on PyTorch
    with pytest.raises(ConfigError, match="weights file"):
        ClipEncoders(TINY, pretrained_tag="openai", runtime="onnx").image_runtime()
    assert ClipEncoders(TINY, pretrained_tag="openai").image_runtime() == "torch"


def _tiny_clip(folder: Path) -> Path:
    """A randomly initialised tiny CLIP saved as a weights file (test_clip.py's configuration)."""
    import json

    import open_clip
    import torch
    from test_clip import TINY, TINY_CONFIG

    (folder / f"{TINY}.json").write_text(json.dumps(TINY_CONFIG))
    open_clip.add_model_config(folder / f"{TINY}.json")
    torch.manual_seed(0)
    model = open_clip.create_model(TINY, pretrained=None)
    path = folder / "tiny.pt"
    torch.save(model.state_dict(), path)
    return path


def test_a_loaded_onnx_encoder_survives_pickling(both, images) -> None:
    # Sharded encoding (xrec.encoders.sharded) sends the encoder to Dask workers with cloudpickle.
    import cloudpickle

    onnx, _ = both
    copy = cloudpickle.loads(cloudpickle.dumps(onnx))
    assert copy.graph_.session is None
    np.testing.assert_array_equal(copy.encode(images[:2]), onnx.encode(images[:2]))
