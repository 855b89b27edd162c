"""The ``default=`` hook that lets :func:`json.dump` write numpy values and paths."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np


def json_default(value: Any) -> Any:
    """numpy scalars and arrays as Python values, paths as strings; anything else is refused."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON-serializable: {type(value).__name__}")
