"""Checks of settings and arguments, written once: integers that are not bools, numbers, choices,
``"name@k"`` metric columns, and the "is it fitted?" check.

Every check raises :class:`~xrec.errors.ConfigError` (or :class:`~xrec.errors.NotFittedError`)
with a message of the form ``"<what> must be <expected>, got <value>"``. ``what`` is the
caller's name for the setting, e.g. ``"n_strata"``, ``"conse setting 'top_t'"`` or, for the
``field: ...`` style of blend files, ``"depth:"``.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from typing import Any

import numpy as np

from xrec.errors import ConfigError, NotFittedError

__all__ = ["check_choice", "check_fitted", "check_int", "check_number", "is_int", "is_number", "parse_metric_column"]


def is_int(value: Any) -> bool:
    """Whether ``value`` is an integer (Python or numpy) and not a bool."""
    return isinstance(value, (numbers.Integral, np.integer)) and not isinstance(value, (bool, np.bool_))


def is_number(value: Any) -> bool:
    """Whether ``value`` is a real number (Python or numpy, integer or float) and not a bool."""
    return isinstance(value, (numbers.Real, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _bounds_text(low: float | None, high: float | None, low_open: bool, high_open: bool) -> str:
    parts = []
    if low is not None:
        parts.append(f"{'>' if low_open else '>='} {low}")
    if high is not None:
        parts.append(f"{'<' if high_open else '<='} {high}")
    return " and ".join(parts)


def check_int(
    value: Any,
    what: str,
    *,
    low: int | None = None,
    high: int | None = None,
    allow_none: bool = False,
    expected: str | None = None,
) -> int | None:
    """``value`` as an ``int`` when it is an integer (not a bool) in ``[low, high]``.

    Parameters
    ----------
    value
        The value to check.
    what
        How the message names the setting.
    low, high
        Inclusive bounds; ``None`` leaves that side open.
    allow_none
        Let ``None`` through (returned as ``None``).
    expected
        The message's description of a valid value; default built from the bounds
        (``"a positive integer"`` for ``low=1``, else ``"an integer >= low"`` ...).

    Raises
    ------
    ConfigError
        ``"<what> must be <expected>[ or None], got <value!r>"``.
    """
    if value is None and allow_none:
        return None
    if not is_int(value) or (low is not None and value < low) or (high is not None and value > high):
        if expected is None:
            bounds = _bounds_text(low, high, False, False)
            expected = "a positive integer" if (low == 1 and high is None) else f"an integer {bounds}".rstrip()
        raise ConfigError(f"{what} must be {expected}{' or None' if allow_none else ''}, got {value!r}")
    return int(value)


def check_number(
    value: Any,
    what: str,
    *,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
    allow_none: bool = False,
    expected: str | None = None,
) -> float | None:
    """``value`` as a ``float`` when it is a finite real number (not a bool) within the bounds.

    ``low_open`` / ``high_open`` exclude the bound itself (``> low``, ``< high``). Other
    parameters and the message are as for :func:`check_int`; the default description is
    ``"a finite number"`` followed by the bounds.

    Raises
    ------
    ConfigError
        When ``value`` is not a number, is NaN or infinite, or lies outside the bounds.
    """
    if value is None and allow_none:
        return None
    ok = is_number(value) and math.isfinite(float(value))
    if ok and low is not None:
        ok = float(value) > low if low_open else float(value) >= low
    if ok and high is not None:
        ok = float(value) < high if high_open else float(value) <= high
    if not ok:
        if expected is None:
            expected = f"a finite number {_bounds_text(low, high, low_open, high_open)}".rstrip()
        raise ConfigError(f"{what} must be {expected}{' or None' if allow_none else ''}, got {value!r}")
    return float(value)


def check_choice(value: Any, what: str, choices: Iterable[Any]) -> Any:
    """``value`` when it is one of ``choices``, else ``ConfigError("<what> must be one of [...], got ...")``."""
    options = list(choices)
    try:
        known = value in options
    except TypeError:  # an unhashable or uncomparable value is no choice
        known = False
    if not known or isinstance(value, (bool, np.bool_)) and not any(isinstance(c, bool) for c in options):
        raise ConfigError(f"{what} must be one of {options}, got {value!r}")
    return value


def parse_metric_column(
    metric: Any,
    *,
    names: Iterable[str] | None = None,
    ks: Iterable[int] | None = None,
    field: str = "metric",
) -> tuple[str, int]:
    """Split a metric column ``"<name>@<k>"`` into ``(name, k)``.

    Parameters
    ----------
    metric
        E.g. ``"ndcg@10"``.
    names
        Metric names allowed (default any non-empty name).
    ks
        Cut-offs allowed (default any non-negative integer).
    field
        How the message names the setting.

    Raises
    ------
    ConfigError
        ``"<field>: expected '<name>@<k>' ..., got ..."`` for a malformed string or an unknown
        name; ``"<field>: cut-off K of ... is not among ks=[...]"`` for a cut-off not in ``ks``.
    """
    name, sep, k = str(metric).rpartition("@")
    allowed = None if names is None else list(names)
    if not sep or not name or not k.isdigit() or (allowed is not None and name not in allowed):
        with_names = f" with name in {allowed}" if allowed is not None else ""
        raise ConfigError(f"{field}: expected '<name>@<k>'{with_names}, got {metric!r}")
    if ks is not None:
        cut_offs = list(ks)
        if int(k) not in cut_offs:
            raise ConfigError(f"{field}: cut-off {k} of {metric!r} is not among ks={cut_offs}")
    return name, int(k)


def check_fitted(estimator: Any, *, attribute: str = "fitted_", how: str = "call fit(...) first", message: str | None = None) -> None:
    """Raise :class:`~xrec.errors.NotFittedError` unless ``estimator.<attribute>`` is true.

    The message is ``"<class> is not fitted: <how>"`` unless ``message`` replaces it.
    """
    if not getattr(estimator, attribute, False):
        raise NotFittedError(message or f"{type(estimator).__name__} is not fitted: {how}")
