"""EfficientNet-Lite0 image encoder: torchvision guard, key mapping, ImageNet checks, bad input."""

from __future__ import annotations

import io
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from PIL import Image
from skimage import data as skdata

from xrec import _torch_guard
from xrec.encoders._imagenet import imagenet_class_names, imagenet_synsets
from xrec.encoders.image import (
    EfficientNetLite0Encoder,
    ImageBatchResult,
    decode_image,
    default_weights_path,
    timm_key,
)
from xrec.errors import ConfigError, DataError


def _bytes(img: Image.Image | np.ndarray, fmt: str = "PNG", **kw) -> bytes:
    if isinstance(img, np.ndarray):
        img = Image.fromarray(img)
    buf = io.BytesIO()
    img.save(buf, format=fmt, **kw)
    return buf.getvalue()


@pytest.fixture(scope="module")
def enc() -> EfficientNetLite0Encoder:
    return EfficientNetLite0Encoder(batch_size=8).load()


@pytest.fixture(scope="module")
def photos() -> dict[str, bytes]:
    return {name: _bytes(getattr(skdata, name)()) for name in ("chelsea", "coffee", "rocket")}


@pytest.fixture(scope="module")
def photo_result(enc, photos) -> ImageBatchResult:
    return enc.encode_with_probs(list(photos.values()))


# -- the torchvision guard ------------------------------------------------------------------


def test_guard_lets_torchvision_and_timm_import_in_a_fresh_process() -> None:
    # A fresh interpreter: in this one the guard already ran when xrec.encoders.image loaded.
    # (open_clip after the guard: tests/test_clip.py.)
    code = textwrap.dedent(
        """
        from xrec import _torch_guard
        import torch, torchvision, timm
        import torchvision.transforms as T
        from PIL import Image
        x = T.Compose([T.Resize(8), T.CenterCrop(8), T.ToTensor()])(Image.new("RGB", (20, 10), (255, 0, 0)))
        assert tuple(x.shape) == (3, 8, 8), x.shape
        assert torch.allclose(x[0], torch.ones(8, 8)) and float(x[1:].abs().max()) == 0.0
        print("ok", _torch_guard.STATUS is not None)
        """
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.startswith("ok")


def test_guard_is_idempotent_and_defines_only_what_is_missing() -> None:
    import importlib

    import torch
    import torchvision  # noqa: F401

    before = _torch_guard._LIBRARY
    importlib.reload(_torch_guard)
    assert _torch_guard._LIBRARY is before
    # The schema torchvision's import needs exists either way (real extension or guard).
    assert hasattr(torch.ops.torchvision, "nms")
    if _torch_guard.STATUS is not None:
        assert "unavailable" in _torch_guard.STATUS


# -- weights and architecture ---------------------------------------------------------------


def test_key_mapping_follows_the_stage_repeats() -> None:
    # EfficientNet-Lite0 stage repeats 1, 2, 2, 3, 3, 4, 1 (Tan & Le 2019, Table 1; lite keeps B0's layout)
    assert timm_key("_blocks.0._depthwise_conv.weight") == "blocks.0.0.conv_dw.weight"
    assert timm_key("_blocks.0._project_conv.weight") == "blocks.0.0.conv_pw.weight"
    assert timm_key("_blocks.1._expand_conv.weight") == "blocks.1.0.conv_pw.weight"
    assert timm_key("_blocks.3._bn0.running_mean") == "blocks.2.0.bn1.running_mean"
    assert timm_key("_blocks.14._project_conv.weight") == "blocks.5.3.conv_pwl.weight"
    assert timm_key("_blocks.15._bn2.bias") == "blocks.6.0.bn3.bias"
    assert timm_key("_fc.weight") == "classifier.weight"
    with pytest.raises(ConfigError, match="_blocks.16"):
        timm_key("_blocks.16._bn0.weight")


def test_every_checkpoint_tensor_lands_in_the_model(enc: EfficientNetLite0Encoder) -> None:
    import torch

    raw = torch.load(default_weights_path(), map_location="cpu", weights_only=True)
    model_state = enc.model_.state_dict()
    assert len(raw) == len(model_state) == 296
    for key, tensor in raw.items():
        assert torch.equal(model_state[timm_key(key)], tensor), key


def test_stem_batchnorm_statistics_match_the_chosen_input_scaling(enc: EfficientNetLite0Encoder) -> None:
    # Outside reference: the running variance the checkpoint itself stored while training.
    # The stem conv's output variance on real photos must match it under the right input
    # scaling: [-1, 1] (TF EfficientNet-Lite) fits, ImageNet mean/std is ~4x too large.
    import torch
    import torchvision.transforms.functional as TF

    stem = enc.model_.conv_stem
    running_var = enc.model_.bn1.running_var

    def var_ratio(mean, std) -> float:
        outs = []
        for name in ("chelsea", "coffee", "rocket", "astronaut", "stereo_motorcycle"):
            arr = getattr(skdata, name)()
            arr = arr[0] if isinstance(arr, tuple) else arr
            x = TF.normalize(TF.to_tensor(Image.fromarray(arr).resize((224, 224))), mean, std)[None]
            with torch.inference_mode():
                outs.append(stem(x).transpose(0, 1).reshape(stem.out_channels, -1))
        return float((torch.cat(outs, 1).var(1) / running_var).median())

    assert 0.5 < var_ratio((0.5,) * 3, (0.5,) * 3) < 1.5
    assert var_ratio((0.485, 0.456, 0.406), (0.229, 0.224, 0.225)) > 2.5
    cfg = enc.transform_.transforms[-1]
    assert tuple(cfg.mean) == (0.5, 0.5, 0.5) and tuple(cfg.std) == (0.5, 0.5, 0.5)


# -- ImageNet classifications ---------------------------------------------------------------


def test_scikit_image_photos_get_the_right_imagenet_classes(enc, photos, photo_result) -> None:
    probs = photo_result.probs
    np.testing.assert_allclose(enc.classify([photos["rocket"]]), probs[2:], atol=1e-6)
    assert probs.shape == (3, 1000) and probs.dtype == np.float32
    np.testing.assert_allclose(probs.sum(1), 1.0, atol=1e-4)
    order = np.argsort(-probs, axis=1)
    # ImageNet-1k class indices (from memory, the standard class index):
    # 281-285 tabby / tiger cat / Persian / Siamese / Egyptian cat, 967 espresso, 968 cup,
    # 657 missile, 744 projectile.
    assert order[0, 0] in range(281, 286)  # chelsea: a domestic cat
    assert order[1, 0] in (967, 968)  # coffee: espresso or cup
    assert {657, 744} & set(order[2, :2].tolist())  # rocket: missile or projectile in the top 2


def test_imagenet_class_names() -> None:
    names = imagenet_class_names()
    assert len(names) == 1000 and all(isinstance(n, str) and n for n in names)
    # Known entries of the ImageNet-1k class index (from memory): 0 tench, 281 tabby cat, 967 espresso.
    assert names[0] == "tench" and names[281] == "tabby cat" and names[967] == "espresso"
    wordnet = imagenet_class_names("wordnet")
    assert len(wordnet) == 1000 and wordnet[281] == "tabby" and wordnet[0] == "tench"
    synsets = imagenet_synsets()
    # n01440764 = tench, n02123045 = tabby (WordNet ids, from memory)
    assert synsets[0] == "n01440764" and synsets[281] == "n02123045"
    assert synsets == sorted(synsets)  # the class index is the sorted synset order (from memory)
    with pytest.raises(ConfigError, match="style"):
        imagenet_class_names("latin")  # type: ignore[arg-type]


# -- vectors --------------------------------------------------------------------------------


def test_vectors_are_unit_float32_deterministic_and_batch_independent(enc, photos, photo_result) -> None:
    contents = list(photos.values())
    result = photo_result
    assert isinstance(result, ImageBatchResult)
    assert result.vectors.shape == (3, 1280) and result.vectors.dtype == np.float32
    np.testing.assert_allclose(np.linalg.norm(result.vectors, axis=1), 1.0, atol=1e-5)
    assert result.ok.all() and result.n_skipped == 0 and result.problems == {}
    one_by_one = EfficientNetLite0Encoder(batch_size=1)
    one_by_one.model_, one_by_one.transform_, one_by_one._min_side = enc.model_, enc.transform_, enc._min_side
    np.testing.assert_allclose(one_by_one.encode(contents), result.vectors, atol=1e-5)
    # different photos are not the same vector
    assert float(result.vectors[0] @ result.vectors[1]) < 0.95


def test_identity_names_the_weights_hash(enc, tmp_path) -> None:
    assert enc.modality == "image" and enc.dim == 1280
    assert enc.identity.startswith("efficientnet-lite0-in1k:tf_efficientnet_lite0:")
    assert enc.identity.split(":")[2] == enc.weights_sha256_[:16]  # then ":onnxruntime" on that runtime
    assert enc.cache_key == f"{enc.identity}@{enc.version}"
    with pytest.raises(ConfigError, match="does not exist"):
        EfficientNetLite0Encoder(weights=tmp_path / "none.pth").identity
    bad = tmp_path / "bad.pth"
    bad.write_bytes(b"not a checkpoint")
    with pytest.raises(ConfigError, match="cannot read weights"):
        EfficientNetLite0Encoder(weights=bad).load()


def test_crop_encodes_the_central_share_of_the_image(enc) -> None:
    square = np.asarray(skdata.chelsea())[:200, 100:300]  # 200 x 200
    cropped = EfficientNetLite0Encoder(batch_size=8, crop=0.5)
    # the central half of each side of a 200-pixel square is rows and columns 50..149
    expected = enc.encode_with_probs([_bytes(square[50:150, 50:150])])
    got = cropped.encode_with_probs([_bytes(square)])
    np.testing.assert_allclose(got.vectors, expected.vectors, atol=1e-5)
    np.testing.assert_allclose(got.probs, expected.probs, atol=1e-5)
    assert not np.allclose(got.vectors, enc.encode([_bytes(square)]), atol=1e-3)
    # a crop is its own cache identity; the whole image keeps the identity it always had
    assert cropped.identity == f"{enc.identity}:crop0.5"
    assert EfficientNetLite0Encoder(crop=1.0).identity == enc.identity
    for bad in (0.0, 1.5, True, "half"):
        with pytest.raises(ConfigError, match="crop"):
            EfficientNetLite0Encoder(crop=bad).load()  # type: ignore[arg-type]


def test_paths_and_bytes_give_the_same_vector(enc, photos, photo_result, tmp_path) -> None:
    path = tmp_path / "cat.png"
    path.write_bytes(photos["chelsea"])
    vectors = enc.encode([path, str(path)])
    np.testing.assert_allclose(vectors, photo_result.vectors[[0, 0]], atol=1e-5)


# -- image modes ----------------------------------------------------------------------------


def test_transparency_is_composited_on_white(enc) -> None:
    white = _bytes(Image.new("RGB", (64, 48), (255, 255, 255)))
    clear_red = _bytes(Image.new("RGBA", (64, 48), (255, 0, 0, 0)))
    pal = Image.new("P", (64, 48), 0)
    pal.putpalette([0, 0, 255] + [0] * 765)
    clear_palette = _bytes(pal, transparency=0)
    clear_grey = _bytes(Image.new("LA", (64, 48), (0, 0)))
    vectors = enc.encode([white, clear_red, clear_palette, clear_grey])
    for k in (1, 2, 3):
        np.testing.assert_allclose(vectors[k], vectors[0], atol=1e-6)
    # a half-transparent black square is grey on white, not black
    half = np.asarray(decode_image(_bytes(Image.new("RGBA", (8, 8), (0, 0, 0, 128)))))
    assert 120 <= int(half.mean()) <= 130


def test_grey_16bit_and_cmyk_images_convert_to_rgb(enc) -> None:
    arr = skdata.camera()  # 8-bit greyscale photo
    grey8 = _bytes(arr)
    rgb = _bytes(np.repeat(arr[:, :, None], 3, axis=2))
    grey16 = _bytes(Image.fromarray(arr.astype(np.uint16) * 257))  # same picture, 16-bit PNG
    cmyk = _bytes(Image.fromarray(skdata.coffee()).convert("CMYK"), "JPEG", quality=95)
    vectors = enc.encode([grey8, rgb, grey16, cmyk, _bytes(skdata.coffee(), "JPEG", quality=95)])
    np.testing.assert_allclose(vectors[0], vectors[1], atol=1e-6)
    np.testing.assert_allclose(vectors[2], vectors[0], atol=1e-3)
    assert float(vectors[3] @ vectors[4]) > 0.98
    assert decode_image(grey16).mode == "RGB"


def test_exif_orientation_is_applied(enc) -> None:
    upright = Image.fromarray(skdata.chelsea())
    stored = upright.transpose(Image.Transpose.ROTATE_90)  # what a camera might write
    exif = Image.Exif()
    exif[0x0112] = 6  # EXIF Orientation 6: rotate 90 deg clockwise to view (EXIF 2.3 spec, from memory)
    with_tag = _bytes(stored, "JPEG", quality=95, exif=exif.tobytes())
    assert decode_image(with_tag).size == upright.size
    vectors = enc.encode([_bytes(upright, "JPEG", quality=95), with_tag])
    assert float(vectors[0] @ vectors[1]) > 0.98


# -- bad input ------------------------------------------------------------------------------


def _bad_batch(photos, tmp_path) -> list:
    truncated = _bytes(skdata.coffee(), "JPEG", quality=90)
    truncated = truncated[: len(truncated) // 3]
    return [
        photos["chelsea"],  # 0 good
        tmp_path / "missing.jpg",  # 1 missing file
        b"this is not an image",  # 2 corrupt bytes
        truncated,  # 3 header fine, data cut short
        photos["coffee"],  # 4 good
        12345,  # 5 wrong type
        b"",  # 6 empty
    ]


def test_bad_items_raise_one_data_error_listing_them(enc, photos, tmp_path) -> None:
    with pytest.raises(DataError) as info:
        enc.encode(_bad_batch(photos, tmp_path))
    msg = str(info.value)
    assert "of 7 images" in msg and "on_error='skip'" in msg
    for fragment in ("#1 file not found", "missing.jpg", "#2 not a recognised image", "#5 not image bytes", "#6 empty"):
        assert fragment in msg
    # The truncated file passes the header check and fails at decoding, still named.
    with pytest.raises(DataError, match=r"#0 corrupt or truncated"):
        enc.encode([_bad_batch(photos, tmp_path)[3]])


def test_skip_returns_mask_zero_rows_and_warns(enc, photos, photo_result, tmp_path) -> None:
    batch = _bad_batch(photos, tmp_path)
    with pytest.warns(UserWarning, match=r"skipped 5 of 7 images"):
        result = enc.encode_with_probs(batch, on_error="skip")
    np.testing.assert_array_equal(result.ok, [True, False, False, False, True, False, False])
    assert result.n_skipped == 5 and sorted(result.problems) == [1, 2, 3, 5, 6]
    assert not result.vectors[~result.ok].any() and not result.probs[~result.ok].any()
    np.testing.assert_allclose(result.vectors[[0, 4]], photo_result.vectors[:2], atol=1e-5)
    skipper = EfficientNetLite0Encoder(on_error="skip")
    skipper.model_, skipper.transform_, skipper._min_side = enc.model_, enc.transform_, enc._min_side
    with pytest.warns(UserWarning, match="skipped 3 of 3"):  # nothing left to encode
        vectors, ok = skipper.encode_with_mask(batch[1:4])
    assert not ok.any() and vectors.shape == (3, 1280) and not vectors.any()


def test_pixel_limit_refuses_big_images_before_decoding(enc, photos) -> None:
    small = EfficientNetLite0Encoder(max_pixels=100_000)
    small.model_, small.transform_, small._min_side = enc.model_, enc.transform_, enc._min_side
    # chelsea is 451 x 300 = 135,300 pixels (skimage docs), coffee 600 x 400
    assert small.problems([photos["chelsea"], _bytes(Image.new("RGB", (300, 300)))]) == {
        0: "too many pixels (451x300 = 135,300 > max_pixels=100,000)"
    }
    with pytest.raises(DataError, match="too many pixels"):
        small.encode([photos["coffee"]])


def test_settings_are_checked(enc) -> None:
    with pytest.raises(ConfigError, match="on_error"):
        EfficientNetLite0Encoder(on_error="ignore").load()  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match="batch_size"):
        EfficientNetLite0Encoder(batch_size=0).load()
    with pytest.raises(DataError, match="single bytes"):
        enc.encode(b"\x89PNG")


def test_no_progress_output_when_switched_off(enc, photos, capsys) -> None:
    enc.encode([photos["coffee"]], progress=False)
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""


def test_images_skipped_through_the_cache_are_named_by_item_id_with_their_decode_error(enc, photos, tmp_path) -> None:
    import pandas as pd

    from xrec.data.catalog import Catalog
    from xrec.encoders.cache import EmbeddingCache, encode_catalog_images

    truncated = _bad_batch(photos, tmp_path)[3]  # passes the header check, fails when decoded
    # Reference for the reason: Pillow itself cannot load the cut file.
    with pytest.raises(OSError, match="truncated"):
        Image.open(io.BytesIO(truncated)).load()
    folder = tmp_path / "shop"
    folder.mkdir()
    names = {"cat": photos["chelsea"], "cut": truncated, "mug": photos["coffee"], "rocket": photos["rocket"]}
    for name, data in names.items():
        (folder / f"{name}.img").write_bytes(data)
    catalog = Catalog.from_frame(pd.DataFrame({"item": [f"sku-{n}" for n in names], "image": [f"{n}.img" for n in names]}),
                                 image="image", image_root=folder)
    skipper = EfficientNetLite0Encoder(on_error="skip", batch_size=3)
    skipper.model_, skipper.transform_, skipper._min_side = enc.model_, enc.transform_, enc._min_side
    with pytest.warns(UserWarning) as record:
        vectors, ok = encode_catalog_images(catalog, skipper, cache=EmbeddingCache(tmp_path / "c"), return_mask=True)
    message = " ".join(str(w.message) for w in record)
    assert "skipped 1 of 4 items: item 'sku-cut': corrupt or truncated" in message
    assert "could not encode it" not in message and "#1" not in message  # no batch-internal numbers
    np.testing.assert_array_equal(ok, [True, False, True, True])
    raiser = EfficientNetLite0Encoder(batch_size=3)
    raiser.model_, raiser.transform_, raiser._min_side = enc.model_, enc.transform_, enc._min_side
    with pytest.raises(DataError, match=r"cannot encode 1 of 4 items: item 'sku-cut': corrupt or truncated"):
        encode_catalog_images(catalog, raiser, cache=EmbeddingCache(tmp_path / "c2"))


def test_pickled_encoder_leaves_the_network_behind_and_encodes_the_same(enc, photos) -> None:
    """What a Dask worker receives: settings only; it loads the same weights on first use."""
    import pickle

    enc.load()
    copy = pickle.loads(pickle.dumps(enc))
    assert not hasattr(copy, "model_") and not hasattr(copy, "transform_")
    batch = list(photos.values())[:2]
    np.testing.assert_allclose(copy.encode(batch), enc.encode(batch), atol=1e-6)
