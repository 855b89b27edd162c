"""CLIP through open_clip: an image encoder and a text encoder sharing one vector space.

No CLIP weights ship with xrec or with any package it depends on. Point
:class:`ClipEncoders` at a weights file you have (a state dict saved from open_clip,
``.pt`` / ``.pth`` / ``.bin`` read with ``torch.load(weights_only=True)``, or
``.safetensors``), or give an open_clip pretrained tag when the machine can reach
the model hub (open_clip downloads and caches the file).
"""

from __future__ import annotations

from xrec import _torch_guard  # noqa: F401  (must precede any torchvision / open_clip import)

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from xrec.encoders._common import OnError, check_batching, check_on_error, file_sha256, text_problems, torch_threads
from xrec.encoders._image_io import (
    DEFAULT_MAX_PIXELS,
    BadImage,
    check_contents,
    decode_checked,
    image_problems,
    report_problems,
)
from xrec.encoders._onnx_graph import OnnxGraph, graph_file, resolve_runtime
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

_EXAMPLE_TAG = {"ViT-B-32": "laion2b_s34b_b79k", "ViT-B-16": "laion2b_s34b_b88k"}


class ClipEncoders:
    """One open_clip model, exposed as an image :class:`Encoder` and a text :class:`Encoder`.

    Both encoders share the model instance, so an image vector and a text vector can
    be compared directly (cosine similarity). The model is loaded on first use, or by
    :meth:`load`.

    Parameters
    ----------
    model_name
        An open_clip architecture name (``open_clip.list_models()``), e.g. ``"ViT-B-32"``.
    weights
        Path of a weights file for that architecture: an open_clip state dict
        (``.pt``, ``.pth``, ``.bin``; read with ``torch.load(weights_only=True)``) or
        ``.safetensors``. Loaded strictly: every tensor must fit.
    pretrained_tag
        An open_clip pretrained tag (``open_clip.list_pretrained_tags_by_model(model_name)``),
        downloaded by open_clip; needs network access. Give ``weights`` or
        ``pretrained_tag``, not both.
    batch_size
        Items per forward pass.
    num_threads
        torch intra-op threads while encoding (restored after); ``None`` leaves torch's
        setting alone.
    on_error
        ``"raise"`` (default): bad items (unreadable images, empty texts) raise
        :class:`DataError` listing them. ``"skip"``: they get all-zero rows, ``False``
        in the mask of ``encode_with_mask`` and a warning.
    max_pixels
        Pixel limit for images, checked before decoding (see
        :class:`~xrec.encoders.image.EfficientNetLite0Encoder`).
    runtime
        Runtime of the image tower: ``"auto"`` (default) runs it through ONNX Runtime when
        ``onnxruntime`` and ``onnx`` are installed and the weights come from a file (the
        exported graph is kept by the file's hash, see :mod:`xrec.encoders._onnx_graph`),
        else PyTorch; ``"onnx"`` / ``"torch"`` choose. The text tower stays on PyTorch.
        ONNX Runtime adds ``:onnxruntime`` to the image encoder's cache identity.
    graph_dir
        Folder for the exported graph; default the embedding cache folder.

    Attributes
    ----------
    image : ClipImageEncoder
        Image bytes (or paths) -> vectors.
    text : ClipTextEncoder
        Strings -> vectors in the same space.
    model_ : torch.nn.Module
        The open_clip model in eval mode (after :meth:`load`).
    preprocess_ : callable
        open_clip's evaluation transform, PIL image -> tensor.
    tokenizer_ : callable
        open_clip's tokenizer for the model.
    weights_sha256_ : str
        Hash of the weights file (when ``weights`` is given).

    Raises
    ------
    ConfigError
        On load (or when ``identity`` / ``dim`` is first read) when neither ``weights``
        nor ``pretrained_tag`` is given, both are, the file is missing or does not fit
        the architecture, or the architecture / tag is unknown.

    Examples
    --------
    >>> clip = ClipEncoders("ViT-B-32", weights="open_clip_vit_b_32.safetensors")  # doctest: +SKIP
    >>> img = clip.image.encode([open("shoe.jpg", "rb").read()])  # doctest: +SKIP
    >>> txt = clip.text.encode(["a red running shoe"])  # doctest: +SKIP
    >>> float(img[0] @ txt[0])  # doctest: +SKIP
    """

    def __init__(
        self,
        model_name: str = "ViT-B-32",
        weights: str | os.PathLike | None = None,
        pretrained_tag: str | None = None,
        *,
        batch_size: int = 32,
        num_threads: int | None = 2,
        on_error: OnError = "raise",
        max_pixels: int | None = DEFAULT_MAX_PIXELS,
        runtime: str = "auto",
        graph_dir: str | os.PathLike | None = None,
    ) -> None:
        self.model_name = model_name
        self.weights = weights
        self.pretrained_tag = pretrained_tag
        self.batch_size = batch_size
        self.num_threads = num_threads
        self.on_error = on_error
        self.max_pixels = max_pixels
        self.runtime = runtime
        self.graph_dir = graph_dir
        self.image = ClipImageEncoder(self)
        self.text = ClipTextEncoder(self)

    def __repr__(self) -> str:
        return (
            f"ClipEncoders(model_name={self.model_name!r}, weights={self.weights!r}, "
            f"pretrained_tag={self.pretrained_tag!r}, batch_size={self.batch_size}, "
            f"num_threads={self.num_threads}, on_error={self.on_error!r}, runtime={self.runtime!r})"
        )

    # -- settings -------------------------------------------------------------------------

    def _model_config(self) -> dict[str, Any]:
        import open_clip

        config = open_clip.get_model_config(self.model_name)
        if config is None:
            raise ConfigError(
                f"clip: unknown model_name {self.model_name!r}; open_clip.list_models() lists the "
                "architectures (a custom one can be registered with open_clip.add_model_config)"
            )
        return config

    def _check_settings(self) -> None:
        who = "clip"
        check_on_error(self.on_error, who)
        check_batching(self.batch_size, self.num_threads, who)
        if self.weights is None and self.pretrained_tag is None:
            example = _EXAMPLE_TAG.get(self.model_name, "<tag>")
            raise ConfigError(
                f"clip: no weights for {self.model_name!r}. No CLIP weights are installed with xrec; "
                "pass weights='path/to/file' (an open_clip state dict, .pt/.pth/.bin or .safetensors, "
                f"for this architecture), or pretrained_tag='{example}' to let open_clip download them "
                f"(needs network; open_clip.list_pretrained_tags_by_model({self.model_name!r}) lists the tags)"
            )
        if self.weights is not None and self.pretrained_tag is not None:
            raise ConfigError("clip: give weights or pretrained_tag, not both")
        self._model_config()
        if self.weights is not None and not Path(self.weights).is_file():
            raise ConfigError(f"clip: weights file {str(self.weights)!r} does not exist")
        if self.pretrained_tag is not None:
            import open_clip

            tags = open_clip.list_pretrained_tags_by_model(self.model_name)
            if self.pretrained_tag not in tags:
                raise ConfigError(
                    f"clip: unknown pretrained_tag {self.pretrained_tag!r} for {self.model_name!r}; "
                    f"known tags: {', '.join(tags) or 'none'}"
                )

    @property
    def identity(self) -> str:
        """``open_clip:<model>:<16 hex of the weights file's sha256>`` (or ``:tag=<tag>``)."""
        self._check_settings()
        if self.weights is not None:
            if not hasattr(self, "weights_sha256_"):
                self.weights_sha256_ = file_sha256(Path(self.weights))
            return f"open_clip:{self.model_name}:{self.weights_sha256_[:16]}"
        return f"open_clip:{self.model_name}:tag={self.pretrained_tag}"

    @property
    def dim(self) -> int:
        """Length of the shared image/text vectors (the model's ``embed_dim``)."""
        return int(self._model_config()["embed_dim"])

    # -- loading --------------------------------------------------------------------------

    def load(self) -> ClipEncoders:
        """Build the model and load its weights now (otherwise the first encode does).

        Returns
        -------
        ClipEncoders
            ``self``.
        """
        if hasattr(self, "model_"):
            return self
        self._check_settings()
        import open_clip

        source = str(self.weights) if self.weights is not None else str(self.pretrained_tag)
        try:
            model, _, preprocess = open_clip.create_model_and_transforms(
                self.model_name, pretrained=source, device="cpu", weights_only=True
            )
        except Exception as exc:  # open_clip, torch and safetensors raise many types here
            if self.weights is None:
                raise ConfigError(
                    f"clip: could not fetch weights for tag {self.pretrained_tag!r} ({type(exc).__name__}: {exc}); "
                    "without network access, download the file elsewhere and pass weights='path'"
                ) from None
            raise ConfigError(
                f"clip: cannot load weights file {source!r} into {self.model_name!r} (damaged, or saved "
                f"from another architecture): {type(exc).__name__}: {exc}"
            ) from None
        model.eval()
        if self.weights is not None:
            self.identity  # noqa: B018  (hash the file now, so identity is ready)
        self.tokenizer_ = open_clip.get_tokenizer(self.model_name)
        self.preprocess_ = preprocess
        self.image_graph_ = None
        if self.image_runtime() == "onnx":
            import torch

            size = getattr(model.visual, "image_size", 224)
            side = int(max(size) if isinstance(size, (tuple, list)) else size)
            self.image_graph_ = OnnxGraph(
                _image_tower(model), torch.zeros((2, 3, side, side)), graph_file(self.graph_dir, f"open_clip-{self.model_name}",
                                                                              self.weights_sha256_),
                num_threads=self.num_threads, output_names=("vectors",),
            )
        self.model_ = model
        return self

    def image_runtime(self) -> str:
        """``"onnx"`` or ``"torch"``: where the image tower runs (ONNX Runtime only for a weights file)."""
        if self.weights is None:
            if self.runtime == "onnx":
                raise ConfigError("clip: runtime='onnx' needs a weights file (the graph is kept by the file's hash)")
            resolve_runtime(self.runtime, "clip")  # an unknown value still fails
            return "torch"
        return resolve_runtime(self.runtime, "clip")

    def _image_size(self) -> int:
        size = getattr(self.model_.visual, "image_size", 224)
        return int(max(size) if isinstance(size, (tuple, list)) else size)


class _ClipPart(Encoder):
    """Shared plumbing of the two CLIP encoders."""

    def __init__(self, parent: ClipEncoders) -> None:
        self.parent = parent

    @property
    def identity(self) -> str:  # type: ignore[override]
        return f"{self.parent.identity}:{self.modality}"

    @property
    def dim(self) -> int:
        return self.parent.dim

    @property
    def on_error(self) -> str:
        return self.parent.on_error

    @property
    def model_(self) -> Any:
        """The shared open_clip model (loads it on first access)."""
        return self.parent.load().model_

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Vectors ``(len(contents), dim)``, float32, L2-normalized rows (zero rows where skipped)."""
        return self.encode_with_mask(contents, progress=progress)[0]

    def encode_with_mask(
        self, contents: Sequence[Any], *, progress: bool = False, on_error: OnError | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Vectors and a mask of the items that were encoded.

        Returns
        -------
        vectors : np.ndarray
            ``(len(contents), dim)`` float32; unit rows, all-zero rows where skipped.
        ok : np.ndarray
            ``(len(contents),)`` bool, ``False`` where an item was skipped.

        Raises
        ------
        DataError
            With ``on_error="raise"``, listing every bad item.
        """
        import torch
        from tqdm.auto import tqdm

        who = f"clip {self.modality} encoder"
        policy = self.parent.on_error if on_error is None else on_error
        check_on_error(policy, who)
        contents = self._contents(contents, who)
        parent = self.parent.load()
        n = len(contents)
        problems = self.problems(contents) if policy == "raise" else {}
        what = f"{self.modality}s"
        report_problems(problems, n, policy, who, what)
        out = np.zeros((n, parent.dim), dtype=np.float32)
        ok = np.zeros(n, dtype=bool)
        with tqdm(total=n, disable=not progress, unit=self.modality[:3], desc=who) as bar, torch_threads(parent.num_threads):
            for start in range(0, n, parent.batch_size):
                stop = min(start + parent.batch_size, n)
                rows, batch = self._prepare(contents, range(start, stop), problems)
                if rows:
                    with torch.inference_mode():
                        vectors = self._forward(batch)
                    out[rows] = torch.nn.functional.normalize(vectors.float(), dim=1).numpy()
                    ok[rows] = True
                bar.update(stop - start)
        report_problems(problems, n, policy, who, what)
        return out, ok


class ClipImageEncoder(_ClipPart):
    """Image half of :class:`ClipEncoders`: raw image bytes (or paths) -> shared-space vectors.

    Images are decoded like :class:`~xrec.encoders.image.EfficientNetLite0Encoder`
    does (transparency on white, EXIF orientation, pixel limit), then open_clip's
    evaluation transform for the model is applied.
    """

    modality = "image"
    version = "1"

    def _contents(self, contents: Any, who: str) -> list[Any]:
        return check_contents(contents, who)

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """Images refused by the cheap header checks, with reasons."""
        return image_problems(check_contents(contents, "clip image encoder"), max_pixels=self.parent.max_pixels)

    def _prepare(self, contents: list[Any], rows: range, problems: dict[int, str]) -> tuple[list[int], Any]:
        import torch

        parent = self.parent
        kept, tensors = [], []
        for i in rows:
            try:
                img = decode_checked(contents[i], parent.max_pixels, 2 * parent._image_size())
            except BadImage as exc:
                problems[i] = str(exc)
                continue
            kept.append(i)
            tensors.append(parent.preprocess_(img))
        return kept, (torch.stack(tensors) if tensors else None)

    @property
    def identity(self) -> str:  # type: ignore[override]
        """The model's identity, ``:image``, and ``:onnxruntime`` when the tower runs there."""
        base = f"{self.parent.identity}:{self.modality}"
        return f"{base}:onnxruntime" if self.parent.image_runtime() == "onnx" else base

    def _forward(self, batch: Any) -> Any:
        graph = getattr(self.parent, "image_graph_", None)
        if graph is None:
            return self.parent.model_.encode_image(batch)
        import torch

        return torch.from_numpy(graph.run(batch.numpy())[0])


class ClipTextEncoder(_ClipPart):
    """Text half of :class:`ClipEncoders`: strings -> shared-space vectors.

    Texts longer than the model's context (77 tokens for the OpenAI-style models) are
    truncated by open_clip's tokenizer.
    """

    modality = "text"
    version = "1"

    def _contents(self, contents: Any, who: str) -> list[Any]:
        if isinstance(contents, str):
            raise DataError(f"{who}: expected a sequence of texts, got a single str")
        return list(contents)

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """Texts that are not strings or are blank, with reasons."""
        return text_problems(self._contents(contents, "clip text encoder"))

    def _prepare(self, contents: list[Any], rows: range, problems: dict[int, str]) -> tuple[list[int], Any]:
        bad = text_problems([contents[i] for i in rows])
        kept = [i for k, i in enumerate(rows) if k not in bad]
        for k, reason in bad.items():
            problems[rows[k]] = reason
        if not kept:
            return [], None
        return kept, self.parent.tokenizer_([contents[i] for i in kept])

    def _forward(self, batch: Any) -> Any:
        return self.parent.model_.encode_text(batch)


def _image_tower(model: Any) -> Any:
    """The open_clip model's ``encode_image`` as a module (what is exported to ONNX)."""
    import torch

    class ImageTower(torch.nn.Module):
        def __init__(self, net: Any) -> None:
            super().__init__()
            self.net = net

        def forward(self, x: Any) -> Any:
            return self.net.encode_image(x)

    return ImageTower(model).eval()
