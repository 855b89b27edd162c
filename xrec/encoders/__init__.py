"""Encoders: images, text and attributes to vectors, with an on-disk cache."""

from xrec.encoders.base import Encoder

__all__ = ["Encoder"]
