"""Make ``import torchvision`` (and so ``timm`` / ``open_clip``) work beside a CPU torch.

The torchvision wheel on PyPI can be built against a different torch (for
example a CUDA build beside a CPU-only torch). Its compiled extension ``_C``
then fails to load, torchvision silently carries on without its custom
operators, and at import time ``torchvision._meta_registrations`` calls
``torch.library.register_fake("torchvision::nms")`` on an operator that was
never defined, which raises ``RuntimeError: operator torchvision::nms does not
exist``. Nothing xrec uses needs those operators (detection ops such as
``nms``); the image transforms and the models are pure Python on top of torch.

Importing this module fixes that, and only that: if torchvision is installed
and its extension cannot be loaded, the schemas of the operators torchvision
registers fake kernels for at import time are defined here (no kernels), so the
import succeeds. Calling such an operator still fails with torch's usual "no
kernel" error. When the extension loads, or torchvision is absent, or it was
already imported, nothing is changed. Importing the module twice is harmless.

It must be imported before anything imports torchvision, timm or open_clip;
every xrec module that uses them starts with ``from xrec import _torch_guard``.
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
import os
import sys

import torch

# Operators that torchvision's import-time code registers fake kernels for
# unconditionally; the rest are guarded by ``extension._has_ops()``. The
# schemas match torchvision's C++ definitions (csrc/ops/nms.cpp and the
# quantized variant).
_MISSING_SCHEMAS: dict[str, str] = {
    "nms": "nms(Tensor dets, Tensor scores, float iou_threshold) -> Tensor",
    "qnms": "qnms(Tensor dets, Tensor scores, float iou_threshold) -> Tensor",
}

# The Library object owns the definitions: it must live as long as the process.
# ``globals().get`` keeps an earlier object alive across ``importlib.reload``.
_LIBRARY: torch.library.Library | None = globals().get("_LIBRARY")
#: Why the guard acted, or None when it did not need to (for diagnostics).
STATUS: str | None = globals().get("STATUS")


def _extension_path() -> str | None:
    """Path of torchvision's compiled ``_C`` extension, without importing torchvision."""
    spec = importlib.util.find_spec("torchvision")
    if spec is None or not spec.submodule_search_locations:
        return None
    lib_dir = list(spec.submodule_search_locations)[0]
    finder = importlib.machinery.FileFinder(
        lib_dir,
        (importlib.machinery.ExtensionFileLoader, importlib.machinery.EXTENSION_SUFFIXES),
    )
    ext = finder.find_spec("_C")
    return None if ext is None else ext.origin


def _op_defined(name: str) -> bool:
    try:
        getattr(torch.ops.torchvision, name)
    except (AttributeError, RuntimeError):
        return False
    return True


def _apply() -> None:
    global _LIBRARY, STATUS
    if _LIBRARY is not None or "torchvision" in sys.modules:
        return
    path = _extension_path()
    if path is None:
        return  # torchvision absent, or an install without the extension file
    try:
        # Same call torchvision makes; loading twice is a no-op for torch.
        torch.ops.load_library(path)
        return
    except (OSError, ImportError) as exc:
        cause = exc.__cause__ or exc
        STATUS = f"torchvision extension {os.path.basename(path)} unavailable ({cause}); op schemas defined"
    missing = [name for name in _MISSING_SCHEMAS if not _op_defined(name)]
    if not missing:
        return
    lib = torch.library.Library("torchvision", "FRAGMENT")
    for name in missing:
        lib.define(_MISSING_SCHEMAS[name])
    _LIBRARY = lib


_apply()
