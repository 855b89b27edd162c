"""Running an image network through ONNX Runtime: export once from PyTorch, keep the graph, run on CPU.

The graph is exported from the loaded PyTorch module with torch's TorchScript-based
exporter (``dynamo=False``: it needs only the ``onnx`` package, no network and no
extra compiler) and stored under ``<cache folder>/onnx-graphs/`` in a file named by the
network, the first 16 hex digits of the weights file's hash, the torch version and this
module's export version, written atomically (:func:`xrec._files.write_bytes_atomic`).
A graph file that ONNX Runtime cannot load (cut short, damaged) is exported again.

On this 2-core CPU, ONNX Runtime runs EfficientNet-Lite0 about twice as fast as PyTorch
eager at the same thread count (``benchmarks/bench_encoders.py``) with outputs equal
to ~1e-6 after normalization.
"""

from __future__ import annotations

import importlib.util
import io
import os
import warnings
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from xrec._files import write_bytes_atomic
from xrec.errors import ConfigError

__all__ = ["RUNTIMES", "OnnxGraph", "graph_file", "onnx_available", "resolve_runtime"]

#: ``"auto"`` is ONNX Runtime when ``onnxruntime`` and ``onnx`` are installed, else PyTorch.
RUNTIMES = ("auto", "onnx", "torch")
# Bump when the exported wrapper (its outputs, opset, input layout) changes.
_EXPORT_VERSION = "1"
_OPSET = 17


def onnx_available() -> bool:
    """Whether ONNX Runtime and the ``onnx`` package (needed by the exporter) are installed."""
    return importlib.util.find_spec("onnxruntime") is not None and importlib.util.find_spec("onnx") is not None


def resolve_runtime(runtime: Any, who: str) -> str:
    """``"onnx"`` or ``"torch"`` for a ``runtime`` setting; ``"auto"`` picks ONNX Runtime when installed.

    Raises
    ------
    ConfigError
        For an unknown value, or ``"onnx"`` when ``onnxruntime`` / ``onnx`` is missing.
    """
    if runtime not in RUNTIMES:
        raise ConfigError(f"{who}: runtime must be one of {list(RUNTIMES)}, got {runtime!r}")
    if runtime == "torch":
        return "torch"
    if onnx_available():
        return "onnx"
    if runtime == "onnx":
        raise ConfigError(f"{who}: runtime='onnx' needs the packages onnxruntime and onnx (pip install onnxruntime onnx)")
    return "torch"


def graph_file(folder: str | os.PathLike | None, name: str, weights_hash: str) -> Path:
    """Where the graph of network ``name`` with these weights is kept.

    ``folder`` defaults to the embedding cache folder (``$XREC_CACHE_DIR``, else ``.xrec-cache``).
    """
    import torch

    from xrec.encoders.cache import DEFAULT_DIR, ENV_VAR

    root = Path(folder if folder is not None else os.environ.get(ENV_VAR) or DEFAULT_DIR)
    torch_version = torch.__version__.split("+")[0]
    return root / "onnx-graphs" / f"{name}-{weights_hash[:16]}-torch{torch_version}-x{_EXPORT_VERSION}.onnx"


def _export(module: Any, example: Any, path: Path, input_name: str, output_names: Sequence[str]) -> None:
    import torch

    buf = io.BytesIO()
    fastpath = torch.backends.mha.get_fastpath_enabled()
    # nn.MultiheadAttention's fused inference kernel (CLIP's ViT) has no ONNX form; the plain
    # path it falls back to computes the same attention.
    torch.backends.mha.set_fastpath_enabled(False)
    try:
        with warnings.catch_warnings(), torch.inference_mode(False), torch.no_grad():
            # The TorchScript exporter is deprecated in favour of the dynamo one; it still works
            # offline with only the onnx package, which the dynamo exporter does not.
            warnings.simplefilter("ignore")
            torch.onnx.export(
                module,
                (example,),
                buf,
                dynamo=False,
                input_names=[input_name],
                output_names=list(output_names),
                dynamic_axes={input_name: {0: "n"}, **{o: {0: "n"} for o in output_names}},
                opset_version=_OPSET,
            )
    finally:
        torch.backends.mha.set_fastpath_enabled(fastpath)
    path.parent.mkdir(parents=True, exist_ok=True)
    write_bytes_atomic(path, buf.getvalue())


class OnnxGraph:
    """An exported network in an ONNX Runtime CPU session.

    Parameters
    ----------
    module
        The PyTorch module to export (eval mode); called with one float32 batch.
    example
        An input batch for tracing (its first axis is exported as dynamic).
    path
        Graph file: read when present and loadable, else exported and written there.
    num_threads
        ONNX Runtime intra-op threads; ``None`` lets it choose (one per core).
    output_names
        Names of the module's outputs, in order.

    Attributes
    ----------
    path : Path
        The graph file.
    exported : bool
        Whether this instance exported the graph (``False`` when it was read from disk).
    """

    def __init__(
        self,
        module: Any,
        example: Any,
        path: Path,
        *,
        num_threads: int | None,
        output_names: Sequence[str],
        input_name: str = "pixels",
    ) -> None:
        self.path = Path(path)
        self.input_name = input_name
        self.exported = False
        self.num_threads = num_threads
        if not self.path.is_file():
            _export(module, example, self.path, input_name, output_names)
            self.exported = True
        try:
            self.session = self._session()
        except Exception:  # a damaged file: onnxruntime raises its own exception types
            if self.exported:
                raise
            _export(module, example, self.path, input_name, output_names)
            self.exported = True
            self.session = self._session()

    def _session(self) -> Any:
        import onnxruntime as ort

        options = ort.SessionOptions()
        if self.num_threads is not None:
            options.intra_op_num_threads = self.num_threads
        options.inter_op_num_threads = 1
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        return ort.InferenceSession(str(self.path), options, providers=["CPUExecutionProvider"])

    def run(self, batch: np.ndarray) -> list[np.ndarray]:
        """The graph's outputs for one ``(n, ...)`` float32 batch."""
        if self.session is None:  # after unpickling (e.g. on a Dask worker): reopen the kept file
            self.session = self._session()
        return self.session.run(None, {self.input_name: np.ascontiguousarray(batch, dtype=np.float32)})

    def __getstate__(self) -> dict[str, Any]:
        # An ONNX Runtime session cannot be pickled; the graph file is reopened where it lands.
        return {**self.__dict__, "session": None}
