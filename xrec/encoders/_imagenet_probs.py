"""ImageNet class probabilities as an encoder, and the text vectors of the class names."""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import numpy as np

from xrec.encoders._by_name import make_image_encoder, make_text_encoder
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError

__all__ = ["ImageNetProbsEncoder", "class_name_vectors"]


class _ReadsThroughBase(Encoder):
    """An encoder that answers through ``self.base``, an image classifier's encoder."""

    modality = "image"
    base: Encoder

    @property
    def version(self) -> str:  # type: ignore[override]
        """The base encoder's version."""
        return self.base.version

    @property
    def on_error(self) -> str:
        """The base encoder's ``on_error`` policy (``"raise"`` when it has none)."""
        return getattr(self.base, "on_error", "raise")


class ImageNetProbsEncoder(_ReadsThroughBase):
    """The ImageNet-1k class probabilities of an image classifier, as an encoder.

    Wrapping the probabilities as "vectors" lets the embedding cache store them beside
    (not instead of) the classifier's features, under their own identity.

    Parameters
    ----------
    base
        An image encoder with ``encode_with_probs`` (e.g.
        :class:`~xrec.encoders.image.EfficientNetLite0Encoder`); default the shared
        EfficientNet-Lite0 encoder.

    Notes
    -----
    Rows sum to 1 (they are not L2-normalized); skipped images give all-zero rows.
    :meth:`features_encoder` gives a twin that encodes features and keeps the
    probabilities of the same forward pass for this encoder, so that caching both
    costs one pass per image.
    """

    def __init__(self, base: Encoder | None = None) -> None:
        if base is None:
            base = make_image_encoder("efficientnet_lite0")
        if not callable(getattr(base, "encode_with_probs", None)):
            raise ConfigError(f"ImageNetProbsEncoder: {type(base).__name__} gives no class probabilities (no encode_with_probs)")
        self.base = base
        self._kept: dict[str, np.ndarray] = {}

    @property
    def identity(self) -> str:  # type: ignore[override]
        """The base encoder's identity with a ``:class-probs`` suffix."""
        return f"{self.base.identity}:class-probs"

    @property
    def dim(self) -> int:
        """Number of ImageNet classes (vector length)."""
        return int(getattr(self.base, "n_classes", 1000))

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """The base encoder's cheap checks."""
        finder = getattr(self.base, "problems", None)
        return finder(contents) if callable(finder) else {}

    def features_encoder(self) -> Encoder:
        """An encoder with the base's identity (same cache entries) that gives features and
        keeps each image's probabilities for this encoder's next call."""
        return _FeaturesKeepingProbs(self)

    def encode_with_mask(self, contents: Sequence[Any], *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Probabilities ``(n, n_classes)`` and the mask of images that were encoded."""
        return self._probs(contents, progress, {})[:2]

    def encode_with_problems(
        self, contents: Sequence[Any], *, progress: bool = False
    ) -> tuple[np.ndarray, np.ndarray, dict[int, str]]:
        """Probabilities, mask and each failed image's decode error (see the base encoder's method)."""
        return self._probs(contents, progress, {"on_error": "skip", "warn": False})

    def _probs(self, contents: Sequence[Any], progress: bool, options: dict) -> tuple[np.ndarray, np.ndarray, dict[int, str]]:
        from xrec.encoders.cache import content_hash

        contents = list(contents)
        keys = [content_hash(c) for c in contents]
        out = np.zeros((len(contents), self.dim), dtype=np.float32)
        ok = np.zeros(len(contents), dtype=bool)
        problems: dict[int, str] = {}
        todo = []
        for i, key in enumerate(keys):
            kept = self._kept.pop(key, None) if key is not None else None
            if kept is None:
                todo.append(i)
            else:
                out[i], ok[i] = kept, True
        if todo:
            result = self.base.encode_with_probs([contents[i] for i in todo], progress=progress, **options)  # type: ignore[attr-defined]
            out[todo], ok[todo] = result.probs, result.ok
            problems = {todo[j]: reason for j, reason in result.problems.items()}
        return out, ok, problems

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Probabilities ``(n, n_classes)``, float32, rows summing to 1."""
        return self.encode_with_mask(contents, progress=progress)[0]


class _FeaturesKeepingProbs(_ReadsThroughBase):
    """The base image encoder's features; each forward pass's probabilities go to the probs encoder."""

    def __init__(self, probs: ImageNetProbsEncoder) -> None:
        self.probs = probs
        self.base = probs.base

    @property
    def identity(self) -> str:  # type: ignore[override]
        return self.base.identity

    @property
    def dim(self) -> int:
        return self.base.dim

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        return self.probs.problems(contents)

    def encode_with_mask(self, contents: Sequence[Any], *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
        return self._features(contents, progress, {})[:2]

    def encode_with_problems(
        self, contents: Sequence[Any], *, progress: bool = False
    ) -> tuple[np.ndarray, np.ndarray, dict[int, str]]:
        return self._features(contents, progress, {"on_error": "skip", "warn": False})

    def _features(self, contents: Sequence[Any], progress: bool, options: dict) -> tuple[np.ndarray, np.ndarray, dict[int, str]]:
        from xrec.encoders.cache import content_hash

        contents = list(contents)
        result = self.base.encode_with_probs(contents, progress=progress, **options)  # type: ignore[attr-defined]
        for content, probs, good in zip(contents, result.probs, result.ok):
            key = content_hash(content)
            if good and key is not None:
                self.probs._kept[key] = probs
        return result.vectors, result.ok, dict(result.problems)

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        return self.encode_with_mask(contents, progress=progress)[0]


def class_name_vectors(
    text_encoder: Encoder | str = "minilm",
    *,
    style: str = "clip",
    template: str = "{}",
    cache_dir: str | os.PathLike | None = None,
    progress: bool = False,
) -> np.ndarray:
    """Text vectors of the 1,000 ImageNet class names, in class-index order, cached.

    Parameters
    ----------
    text_encoder
        An encoder or a name for :func:`make_text_encoder`.
    style
        Class-name spelling, see :func:`xrec.encoders._imagenet.imagenet_class_names`.
    template
        Each name is put into this text at ``{}`` (e.g. ``"a photo of a {}"``).
    cache_dir
        Embedding cache folder; ``None`` uses the cache's default folder.
    progress
        Progress bar while encoding uncached names.
    """
    from xrec.encoders._imagenet import imagenet_class_names
    from xrec.encoders.cache import EmbeddingCache

    if "{}" not in template:
        raise ConfigError(f"template must contain '{{}}' where the class name goes, got {template!r}")
    # class names are never blank, so the shared "skip" encoder is as strict here
    encoder = make_text_encoder(text_encoder) if isinstance(text_encoder, str) else text_encoder
    texts = [template.format(name) for name in imagenet_class_names(style)]  # type: ignore[arg-type]
    return EmbeddingCache(cache_dir).encode(encoder, texts, progress=progress)
