"""Encoders: images, text and attributes to vectors, with an on-disk cache.

The torch-based encoders are imported on first use, so ``import xrec.encoders`` stays light.
"""

from typing import Any

from xrec.encoders.attributes import AttributeEncoder
from xrec.encoders.base import Encoder
from xrec.encoders.cache import EmbeddingCache, encode_catalog_images, encode_catalog_text

_LAZY = {
    "EfficientNetLite0Encoder": "xrec.encoders.image",
    "ImageBatchResult": "xrec.encoders.image",
    "MiniLMTextEncoder": "xrec.encoders.text",
    "ClipEncoders": "xrec.encoders.clip",
    "imagenet_class_names": "xrec.encoders._imagenet",
    "encode_sharded": "xrec.encoders.sharded",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'xrec.encoders' has no attribute {name!r}")


__all__ = [
    "AttributeEncoder",
    "ClipEncoders",
    "EfficientNetLite0Encoder",
    "EmbeddingCache",
    "Encoder",
    "ImageBatchResult",
    "MiniLMTextEncoder",
    "encode_catalog_images",
    "encode_catalog_text",
    "encode_sharded",
    "imagenet_class_names",
]
