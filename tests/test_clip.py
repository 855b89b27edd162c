"""ClipEncoders: loading a user's open_clip weights file, shared space, errors.

No CLIP weights exist offline, so the tests build a tiny CLIP architecture (registered
through open_clip's public ``add_model_config``), save its randomly initialised state
dict, and load that file through the same public path a real checkpoint takes.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from PIL import Image

from xrec import _torch_guard  # noqa: F401
from xrec.encoders.clip import ClipEncoders
from xrec.errors import ConfigError, DataError

TINY = "xrec-test-tiny-clip"
TINY_CONFIG = {
    "embed_dim": 16,
    "vision_cfg": {"image_size": 32, "layers": 1, "width": 32, "head_width": 16, "patch_size": 16},
    # SimpleTokenizer ids go up to 49407, so the vocabulary keeps the real size.
    "text_cfg": {"context_length": 77, "vocab_size": 49408, "width": 32, "heads": 2, "layers": 1},
}


def _png(color: tuple[int, ...], mode: str = "RGB", size: tuple[int, int] = (40, 30)) -> bytes:
    buf = io.BytesIO()
    Image.new(mode, size, color).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """(weights path, saved state dict) of a randomly initialised tiny CLIP."""
    import open_clip
    import torch

    folder = tmp_path_factory.mktemp("clip")
    (folder / f"{TINY}.json").write_text(json.dumps(TINY_CONFIG))
    open_clip.add_model_config(folder / f"{TINY}.json")
    wider = dict(TINY_CONFIG, text_cfg=dict(TINY_CONFIG["text_cfg"], width=48))
    (folder / f"{TINY}-wide.json").write_text(json.dumps(wider))
    open_clip.add_model_config(folder / f"{TINY}-wide.json")
    torch.manual_seed(0)
    model = open_clip.create_model(TINY, pretrained=None)
    state = {k: v.clone() for k, v in model.state_dict().items()}
    path = folder / "tiny.pt"
    torch.save(state, path)
    return path, state


@pytest.fixture(scope="module")
def clip(tiny) -> ClipEncoders:
    return ClipEncoders(TINY, weights=tiny[0], batch_size=2).load()


def test_open_clip_and_timm_import_after_the_guard() -> None:
    import open_clip
    import timm
    import torchvision.transforms as T

    assert "ViT-B-32" in open_clip.list_models()
    assert "tf_efficientnet_lite0" in timm.list_models("tf_efficientnet_lite0")
    x = T.ToTensor()(Image.new("RGB", (4, 2), (0, 255, 0)))
    assert tuple(x.shape) == (3, 2, 4) and float(x[1].min()) == 1.0


def test_loaded_weights_equal_the_saved_ones(clip, tiny) -> None:
    import torch

    _, saved = tiny
    loaded = clip.model_.state_dict()
    assert loaded.keys() == saved.keys()
    for key, tensor in saved.items():
        assert torch.equal(loaded[key], tensor), key
    # both halves use the one model instance
    assert clip.image.model_ is clip.text.model_ is clip.model_


def test_dims_identity_and_modalities(clip, tiny) -> None:
    import hashlib

    sha = hashlib.sha256(tiny[0].read_bytes()).hexdigest()
    assert clip.dim == clip.image.dim == clip.text.dim == TINY_CONFIG["embed_dim"]
    assert clip.image.modality == "image" and clip.text.modality == "text"
    assert clip.identity == f"open_clip:{TINY}:{sha[:16]}"
    # ONNX Runtime (the default when installed, see tests/test_onnx_image.py) marks the image side
    runtime = ":onnxruntime" if clip.image_runtime() == "onnx" else ""
    assert clip.image.identity == clip.identity + ":image" + runtime and clip.text.identity == clip.identity + ":text"
    assert clip.image.cache_key != clip.text.cache_key


def test_vectors_match_open_clip_own_encoding(clip) -> None:
    # Reference: open_clip's own encode_image / encode_text with normalize=True.
    import open_clip
    import torch

    images = [_png((200, 30, 30)), _png((30, 30, 200)), _png((10, 200, 10))]
    texts = ["a red square", "a blue square", "grass"]
    img_vecs = clip.image.encode(images)
    txt_vecs = clip.text.encode(texts)
    assert img_vecs.shape == (3, 16) and txt_vecs.shape == (3, 16)
    assert img_vecs.dtype == np.float32 and txt_vecs.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(img_vecs, axis=1), 1.0, atol=1e-5)
    np.testing.assert_allclose(np.linalg.norm(txt_vecs, axis=1), 1.0, atol=1e-5)
    with torch.inference_mode():
        x = torch.stack([clip.preprocess_(Image.open(io.BytesIO(b)).convert("RGB")) for b in images])
        ref_img = clip.model_.encode_image(x, normalize=True).numpy()
        ref_txt = clip.model_.encode_text(open_clip.get_tokenizer(TINY)(texts), normalize=True).numpy()
    np.testing.assert_allclose(img_vecs, ref_img, atol=1e-5)
    np.testing.assert_allclose(txt_vecs, ref_txt, atol=1e-5)


def test_different_weights_give_different_vectors_and_identity(clip, tmp_path) -> None:
    import open_clip
    import torch

    torch.manual_seed(1)
    other = open_clip.create_model(TINY, pretrained=None)
    path = tmp_path / "other.pt"
    torch.save(other.state_dict(), path)
    second = ClipEncoders(TINY, weights=path)
    assert second.identity != clip.identity
    a = clip.text.encode(["a shoe"])
    b = second.text.encode(["a shoe"])
    assert not np.allclose(a, b, atol=1e-3)


def test_safetensors_file_loads_too(clip, tiny, tmp_path) -> None:
    safetensors = pytest.importorskip("safetensors.torch")
    path = tmp_path / "tiny.safetensors"
    safetensors.save_file({k: v.contiguous() for k, v in tiny[1].items()}, str(path))
    again = ClipEncoders(TINY, weights=path)
    np.testing.assert_allclose(again.text.encode(["same weights"]), clip.text.encode(["same weights"]), atol=1e-6)


def test_missing_weights_say_how_to_supply_them() -> None:
    with pytest.raises(ConfigError) as info:
        ClipEncoders("ViT-B-32").load()
    msg = str(info.value)
    assert "weights=" in msg and "pretrained_tag=" in msg and "list_pretrained_tags_by_model" in msg
    with pytest.raises(ConfigError, match="no weights"):
        ClipEncoders("ViT-B-32").image.identity  # noqa: B018


def test_bad_settings_are_config_errors(tiny, tmp_path) -> None:
    with pytest.raises(ConfigError, match="not both"):
        ClipEncoders(TINY, weights=tiny[0], pretrained_tag="openai").load()
    with pytest.raises(ConfigError, match="does not exist"):
        ClipEncoders(TINY, weights=tmp_path / "nope.pt").load()
    with pytest.raises(ConfigError, match="unknown model_name"):
        ClipEncoders("no-such-arch", weights=tiny[0]).load()
    with pytest.raises(ConfigError, match="unknown pretrained_tag"):
        ClipEncoders("ViT-B-32", pretrained_tag="no-such-tag").load()
    # a file for another architecture does not fit (strict loading)
    with pytest.raises(ConfigError, match="cannot load weights file .*another architecture"):
        ClipEncoders(TINY + "-wide", weights=tiny[0]).load()
    junk = tmp_path / "junk.pt"
    junk.write_bytes(b"not a checkpoint")
    with pytest.raises(ConfigError, match="cannot load weights file"):
        ClipEncoders(TINY, weights=junk).load()


def test_bad_items_raise_or_skip(clip) -> None:
    images = [_png((1, 2, 3)), b"garbage", _png((0, 0, 0, 0), "RGBA")]
    with pytest.raises(DataError, match=r"1 of 3 images: #1 not a recognised image"):
        clip.image.encode(images)
    with pytest.raises(DataError, match=r"2 of 3 texts: #1 empty text.*#2 not a string"):
        clip.text.encode(["fine", "  ", None])
    skipper = ClipEncoders(TINY, weights=clip.weights, on_error="skip")
    skipper.model_, skipper.preprocess_, skipper.tokenizer_ = clip.model_, clip.preprocess_, clip.tokenizer_
    with pytest.warns(UserWarning, match="skipped 1 of 3 images"):
        vectors, ok = skipper.image.encode_with_mask(images)
    np.testing.assert_array_equal(ok, [True, False, True])
    assert not vectors[1].any()
    # the transparent image is white after compositing
    np.testing.assert_allclose(vectors[2], clip.image.encode([_png((255, 255, 255))])[0], atol=1e-6)
    with pytest.warns(UserWarning, match="skipped 1 of 2 texts"):
        vectors, ok = skipper.text.encode_with_mask(["fine", ""])
    np.testing.assert_array_equal(ok, [True, False])
