"""Settings of registry-built objects (sources, bridges): names and types taken from ``__init__``.

A setting is checked against the annotation of its ``__init__`` parameter. The annotation
words understood are ``bool``, ``int``, ``float``, ``str``, ``None``, ``Sequence[X]`` and
``Mapping[K, V]``, joined by ``|``:

- ``bool`` takes only ``True`` / ``False`` (never ``"false"``, ``0`` or ``1``);
- ``int`` takes integers but not bools; ``float`` takes any real number but not bools;
- ``str`` takes only text; ``Sequence[X]`` a list or tuple (not a string) of ``X``;
  ``Mapping[K, V]`` a table of ``K`` keys and ``V`` values.

An annotation with any other word (an array, a class) is not checked here; the object
checks that setting itself.
"""

from __future__ import annotations

import inspect
import numbers
import re
from collections.abc import Mapping
from typing import Any

import numpy as np

from xrec.errors import ConfigError


def setting_names(cls: type) -> set[str]:
    """Parameter names of ``cls.__init__`` (what a spec or blend file may set)."""
    return set(inspect.signature(cls.__init__).parameters) - {"self"}


def check_settings(cls: type, settings: Mapping[str, Any], label: str) -> None:
    """Raise :class:`ConfigError` naming every setting ``cls`` does not take or needs, or a value of the wrong type.

    Types come from the annotations of ``cls.__init__`` (see the module docstring).
    """
    params = inspect.signature(cls.__init__).parameters
    allowed = set(params) - {"self"}
    unknown = set(settings) - allowed
    if unknown:
        raise ConfigError(f"{label} has no setting(s) {sorted(unknown)}; it takes {sorted(allowed)}")
    required = [
        n for n, p in params.items()
        if n != "self" and p.default is inspect.Parameter.empty and p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)
    ]
    missing = [n for n in required if n not in settings]
    if missing:
        raise ConfigError(f"{label} needs setting(s) {missing}")
    for name, value in settings.items():
        annotation = params[name].annotation
        if not isinstance(annotation, str):  # a module without `from __future__ import annotations`
            annotation = inspect.formatannotation(annotation)
        alternatives = _split_top(annotation, "|")
        checks = [_CHECKS.get(a) or _container_check(a) for a in alternatives]
        if any(c is None for c in checks) or annotation is inspect.Parameter.empty:
            continue  # a type this module does not know: the object checks it
        if not any(c(value) for c in checks):
            raise ConfigError(f"{label}: setting {name} must be {_describe(alternatives)}, got {value!r} ({type(value).__name__})")


def _is_bool(v: Any) -> bool:
    return isinstance(v, (bool, np.bool_))


_CHECKS = {
    "bool": _is_bool,
    "int": lambda v: isinstance(v, numbers.Integral) and not _is_bool(v),
    "float": lambda v: isinstance(v, numbers.Real) and not _is_bool(v),
    "str": lambda v: isinstance(v, str),
    "None": lambda v: v is None,
}
_WORDS = {"bool": "true or false", "int": "an integer", "float": "a number", "str": "a string", "None": "absent (None)"}
_PLURAL = {"bool": "true/false values", "int": "integers", "float": "numbers", "str": "strings", "None": "None"}
_CONTAINER = re.compile(r"^(Sequence|Mapping)\[(.*)\]$")


def _split_top(text: str, sep: str) -> list[str]:
    """``text`` split on ``sep`` outside brackets, parts stripped."""
    parts, depth, start = [], 0, 0
    for i, ch in enumerate(text):
        depth += ch == "["
        depth -= ch == "]"
        if ch == sep and depth == 0:
            parts.append(text[start:i].strip())
            start = i + 1
    parts.append(text[start:].strip())
    return parts


def _container_check(annotation: str):
    m = _CONTAINER.match(annotation)
    if not m:
        return None
    inner = [_CHECKS.get(a) for a in _split_top(m.group(2), ",")]
    if any(c is None for c in inner):
        return None
    if m.group(1) == "Sequence":
        if len(inner) != 1:
            return None
        (item,) = inner
        return lambda v: isinstance(v, (list, tuple)) and all(item(x) for x in v)
    if len(inner) != 2:
        return None
    key, val = inner
    return lambda v: isinstance(v, Mapping) and all(key(k) and val(x) for k, x in v.items())


def _describe(alternatives: list[str]) -> str:
    words = []
    for a in alternatives:
        m = _CONTAINER.match(a)
        if a in _WORDS:
            words.append(_WORDS[a])
        elif m and m.group(1) == "Sequence":
            words.append(f"a list of {_PLURAL[m.group(2).strip()]}")
        elif m:
            key, val = _split_top(m.group(2), ",")
            words.append(f"a table of {_PLURAL[key]} to {_PLURAL[val]}")
        else:
            words.append(a)
    return " or ".join(words)
