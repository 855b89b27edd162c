"""Checked reading of parsed TOML tables and plain-value writing, for files xrec reads and writes.

Every error is a :class:`~xrec.errors.ConfigError` naming the field (``where.key``).
"""

from __future__ import annotations

import datetime as _dt
import os
from collections.abc import Mapping
from numbers import Integral, Real
from typing import Any

import numpy as np

from xrec.errors import ConfigError

__all__ = ["check_type", "get_value", "no_unknown", "plain", "require_table", "type_name"]


def plain(value: Any, where: str, *, drop_none: bool = True) -> Any:
    """``value`` as TOML-ready built-ins (dict/list/str/int/float/bool/datetime)."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (Integral, np.integer)):
        return int(value)
    if isinstance(value, (Real, np.floating)):
        return float(value)
    if isinstance(value, str):
        return value
    if isinstance(value, (_dt.datetime, _dt.date, _dt.time)):
        return value
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if v is None:
                if drop_none:
                    continue
                raise ConfigError(f"{where}.{k}: None cannot be written to TOML")
            out[str(k)] = plain(v, f"{where}.{k}", drop_none=drop_none)
        return out
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple, set, frozenset)):
        items = sorted(value, key=str) if isinstance(value, (set, frozenset)) else list(value)
        if any(v is None for v in items):
            raise ConfigError(f"{where}: a list holding None cannot be written to TOML")
        return [plain(v, f"{where}[{i}]", drop_none=drop_none) for i, v in enumerate(items)]
    if hasattr(value, "isoformat"):  # pandas.Timestamp and friends
        return value.isoformat()
    raise ConfigError(f"{where}: cannot write a {type(value).__name__} to a blend file")


def type_name(value: Any) -> str:
    return {dict: "a table", list: "an array", str: "a string", bool: "a boolean", int: "an integer", float: "a float"}.get(
        type(value), type(value).__name__
    )


def check_type(value: Any, types: tuple[type, ...], where: str) -> None:
    ok = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
    if not ok:
        names = " or ".join(type_name(t()) if t is not dict else "a table" for t in types)
        raise ConfigError(f"{where}: must be {names}, got {type_name(value)} {value!r}")


def get_value(table: Mapping[str, Any], key: str, typ: type, where: str, *, required: bool = True) -> Any:
    name = f"{where}.{key}" if where else key
    if key not in table:
        if required:
            raise ConfigError(f"{name}: missing")
        return None
    value = table[key]
    check_type(value, (typ,), name)
    return value


def require_table(value: Any, where: str) -> None:
    if not isinstance(value, Mapping):
        raise ConfigError(f"{where}: must be a table, got {type_name(value)}")


def no_unknown(table: Mapping[str, Any], allowed: set[str], where: str, *, what: str = "key") -> None:
    unknown = [k for k in table if k not in allowed]
    if unknown:
        name = f"{where}.{unknown[0]}" if where else unknown[0]
        raise ConfigError(f"{name}: unknown {what}; allowed here: {sorted(allowed)}")
