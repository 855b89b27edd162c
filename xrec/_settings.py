"""Settings of registry-built objects (sources, bridges): names taken from ``__init__``."""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from typing import Any

from xrec.errors import ConfigError


def setting_names(cls: type) -> set[str]:
    """Parameter names of ``cls.__init__`` (what a spec or blend file may set)."""
    return set(inspect.signature(cls.__init__).parameters) - {"self"}


def check_settings(cls: type, settings: Mapping[str, Any], label: str) -> None:
    """Raise :class:`ConfigError` naming every setting ``cls`` does not take."""
    allowed = setting_names(cls)
    unknown = set(settings) - allowed
    if unknown:
        raise ConfigError(f"{label} has no setting(s) {sorted(unknown)}; it takes {sorted(allowed)}")
