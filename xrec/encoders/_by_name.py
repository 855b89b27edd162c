"""Encoders by name: the plain values a spec or blend file holds, one loaded model per process.

Every process-wide model table lives here: the text and image encoders (``_SHARED``) and the
CLIP models (``_CLIP``), so a model several sources use is loaded once.
"""

from __future__ import annotations

import os
from typing import Any

from xrec.encoders.base import Encoder
from xrec.errors import ConfigError

__all__ = ["IMAGE_ENCODERS", "TEXT_ENCODERS", "make_clip_encoders", "make_image_encoder", "make_text_encoder"]

TEXT_ENCODERS = ("minilm", "minilm_int8")
IMAGE_ENCODERS = ("efficientnet_lite0", "efficientnet_lite0_onnx", "efficientnet_lite0_torch")
# Image encoder name -> runtime: the plain name takes the faster one installed.
_IMAGE_RUNTIMES = {"efficientnet_lite0": "auto", "efficientnet_lite0_onnx": "onnx", "efficientnet_lite0_torch": "torch"}
# One encoder (one loaded model) per name and error policy for the whole process: several
# content sources fitted side by side would otherwise each load the same weights.
_SHARED: dict[tuple[str, str, str], Encoder] = {}

def make_text_encoder(name: str = "minilm", *, on_error: str = "skip") -> Encoder:
    """The text encoder a setting names.

    Parameters
    ----------
    name
        ``"minilm"``: :class:`~xrec.encoders.text.MiniLMTextEncoder` (all-MiniLM-L6-v2, 384-d);
        ``"minilm_int8"``: the same with ``precision="int8"`` (its own cache entries).
    on_error
        Passed to the encoder: ``"skip"`` gives blank texts a zero row and a warning.

    Returns
    -------
    Encoder
        Shared by every caller in this process that asks for the same name and policy,
        so its model is loaded once.

    Raises
    ------
    ConfigError
        For an unknown name.
    """
    key = ("text", name, on_error)
    if key in _SHARED:
        return _SHARED[key]
    if name in ("minilm", "minilm_int8"):
        from xrec.encoders.text import MiniLMTextEncoder

        precision = "int8" if name == "minilm_int8" else "fp32"
        return _SHARED.setdefault(key, MiniLMTextEncoder(on_error=on_error, precision=precision))  # type: ignore[arg-type]
    raise ConfigError(f"text encoder {name!r} is unknown; known: {list(TEXT_ENCODERS)} (CLIP: use kind 'cross_modal' with bridge='clip')")


def make_image_encoder(name: str = "efficientnet_lite0", *, on_error: str = "skip", crop: float = 1.0) -> Encoder:
    """The image encoder a setting names.

    Parameters
    ----------
    name
        ``"efficientnet_lite0"``: :class:`~xrec.encoders.image.EfficientNetLite0Encoder`
        (ImageNet-1k, 1,280-d pooled features) on ONNX Runtime when installed, else PyTorch;
        ``"efficientnet_lite0_onnx"`` / ``"efficientnet_lite0_torch"`` name the runtime
        (each has its own cache entries), e.g. to compare the two.
    on_error
        Passed to the encoder: ``"skip"`` gives unreadable images a zero row and a warning.
    crop
        Share of each side kept around the centre (see the encoder's ``crop``).

    Returns
    -------
    Encoder
        Shared within the process, like :func:`make_text_encoder`'s.

    Raises
    ------
    ConfigError
        For an unknown name.
    """
    key = ("image", name, on_error, crop)
    if key in _SHARED:
        return _SHARED[key]
    if name in _IMAGE_RUNTIMES:
        from xrec.encoders.image import EfficientNetLite0Encoder

        encoder = EfficientNetLite0Encoder(on_error=on_error, crop=crop, runtime=_IMAGE_RUNTIMES[name])  # type: ignore[arg-type]
        encoder.check_settings()  # a bad crop fails here, before the encoder is shared
        return _SHARED.setdefault(key, encoder)
    raise ConfigError(f"image encoder {name!r} is unknown; known: {list(IMAGE_ENCODERS)}")


# One CLIP model per (architecture, weights file and its version) for the whole process.
_CLIP: dict[tuple[str, str, int, int], Any] = {}


def make_clip_encoders(model: str, weights: str | os.PathLike) -> Any:
    """The :class:`~xrec.encoders.clip.ClipEncoders` of ``model`` with ``weights`` (``on_error="skip"``).

    Shared within the process while the weights file keeps its modification time and size.
    """
    try:
        stat = os.stat(weights)
        key = (str(model), str(weights), stat.st_mtime_ns, stat.st_size)
    except OSError:
        key = (str(model), str(weights), 0, 0)  # ClipEncoders names the missing file
    if key not in _CLIP:
        from xrec.encoders.clip import ClipEncoders

        _CLIP[key] = ClipEncoders(model, weights=weights, on_error="skip")
    return _CLIP[key]
