"""Column declarations given as one name or a list of names."""

from __future__ import annotations

from typing import Any

from xrec.errors import ConfigError


def column_names(value: Any, where: str) -> tuple[str, ...]:
    """``value`` as a tuple of column names: one name (a string) or a list of names.

    A single string is one column (``"brand"``), never a list of letters.

    Raises
    ------
    ConfigError
        ``value`` is neither a string nor a list/tuple of strings; the message names ``where``.
    """
    if isinstance(value, str):
        return (value,)
    if isinstance(value, (list, tuple)) and all(isinstance(v, str) for v in value):
        return tuple(value)
    raise ConfigError(f"{where}: a column name or a list of column names, got {value!r}")


def column_name(value: Any, where: str, *, optional: bool = False) -> str | None:
    """``value`` as one column name (``None`` allowed when ``optional``)."""
    if value is None and optional:
        return None
    if isinstance(value, str) and value:
        return value
    raise ConfigError(f"{where}: a column name (a non-empty string), got {value!r}")
