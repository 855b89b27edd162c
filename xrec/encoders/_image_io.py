"""Reading and decoding item images with Pillow, with one reason per item that fails.

Bad input (a path that does not exist, bytes that are not an image, a truncated file, an
image over the pixel limit, a mode that cannot be converted) raises :class:`BadImage`
inside; the encoders turn the reasons into one :class:`~xrec.errors.DataError` or a
warning (:func:`report_problems`). Shared by the EfficientNet and CLIP image encoders.
"""

from __future__ import annotations

import io
import os
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from xrec.encoders import _common
from xrec.errors import DataError

__all__ = [
    "DEFAULT_MAX_PIXELS",
    "BadImage",
    "centre_crop",
    "check_contents",
    "decode_checked",
    "decode_image",
    "describe_problems",
    "image_problems",
    "open_image",
    "read_image_bytes",
    "report_problems",
    "to_rgb",
]


#: Default pixel limit (width x height) above which an image is refused before
#: decoding. It equals Pillow's own decompression-bomb warning threshold.
DEFAULT_MAX_PIXELS = 89_478_485


class BadImage(Exception):
    """One item cannot be decoded; the message is the reason shown to the user."""


def read_image_bytes(content: Any) -> bytes:
    if isinstance(content, (bytes, bytearray, memoryview)):
        data = bytes(content)
    elif isinstance(content, (str, os.PathLike)):
        path = Path(content)
        if not path.is_file():
            raise BadImage(f"file not found: {str(path)!r}")
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise BadImage(f"cannot read file {str(path)!r} ({type(exc).__name__})") from None
    else:
        raise BadImage(f"not image bytes or a path ({type(content).__name__}: {content!r:.40})")
    if not data:
        raise BadImage("empty content (0 bytes)")
    return data


def open_image(data: bytes, max_pixels: int | None) -> Any:
    """Open image data lazily (header only) and apply the pixel limit."""
    from PIL import Image, UnidentifiedImageError

    try:
        with warnings.catch_warnings():
            # The limit below is ours; Pillow's warning would only repeat it.
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            img = Image.open(io.BytesIO(data))
    except Image.DecompressionBombError as exc:
        raise BadImage(f"too many pixels ({exc})") from None
    except UnidentifiedImageError:
        raise BadImage(f"not a recognised image format ({len(data)} bytes, starting {data[:8]!r})") from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise BadImage(f"unreadable image header ({type(exc).__name__}: {exc})") from None
    width, height = img.size
    if width < 1 or height < 1:
        raise BadImage(f"empty image ({width}x{height})")
    if max_pixels is not None and width * height > max_pixels:
        raise BadImage(f"too many pixels ({width}x{height} = {width * height:,} > max_pixels={max_pixels:,})")
    return img


def to_rgb(img: Any) -> Any:
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
        return decode_checked(content, max_pixels, min_side)
    except BadImage as exc:
        raise DataError(f"image: {exc}") from None


def decode_checked(content: Any, max_pixels: int | None, min_side: int | None) -> Any:
    from PIL import ImageOps

    img = open_image(read_image_bytes(content), max_pixels)
    try:
        if min_side is not None and img.format == "JPEG":
            # draft() keeps the image at least this large: the later resize still antialiases.
            img.draft("RGB", (min_side, min_side))
        img.load()
        img = ImageOps.exif_transpose(img)
    except (OSError, ValueError, SyntaxError, EOFError, MemoryError) as exc:
        raise BadImage(f"corrupt or truncated image data ({type(exc).__name__}: {exc})") from None
    try:
        return to_rgb(img)
    except (OSError, ValueError) as exc:
        raise BadImage(f"unsupported image mode {img.mode!r} ({type(exc).__name__}: {exc})") from None


def centre_crop(img: Any, share: float) -> Any:
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
            open_image(read_image_bytes(content), max_pixels).close()
        except BadImage as exc:
            problems[i] = str(exc)
    return problems


def check_contents(contents: Any, who: str) -> list[Any]:
    if isinstance(contents, (str, bytes, bytearray, os.PathLike)):
        raise DataError(f"{who}: expected a sequence of images, got a single {type(contents).__name__}")
    return list(contents)


def report_problems(problems: dict[int, str], total: int, on_error: str, who: str, what: str = "images") -> None:
    """Raise or warn about the items that could not be encoded."""
    if not problems:
        return
    listing = describe_problems(problems, total, what)
    if on_error == "raise":
        raise DataError(f"{who}: cannot encode {listing}; pass on_error='skip' to skip them")
    warnings.warn(f"{who}: skipped {listing}; their rows are zero", stacklevel=3)
