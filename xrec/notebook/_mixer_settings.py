"""Checks of the weight mixer's settings and the user sample it evaluates on."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from xrec._validation import check_number
from xrec.errors import ConfigError, DataError


def check_metrics(metrics: Sequence[str] | str) -> tuple[str, ...]:
    """The per-user metrics to show, each one of the rank metrics, duplicates dropped."""
    from xrec.evaluate._metrics import RANK_METRICS

    wanted = [metrics] if isinstance(metrics, str) else list(metrics)
    bad = [m for m in wanted if m not in RANK_METRICS]
    if bad or not wanted:
        raise ConfigError(f"metrics: choose among {list(RANK_METRICS)}, got {wanted}")
    return tuple(dict.fromkeys(wanted))


def start_weights(weights: Mapping[str, float] | None, names: Sequence[str]) -> dict[str, float]:
    """Starting slider values: 0.5 each by default; every source named once, in [0, 1], one positive."""
    start = {n: 0.5 for n in names} if weights is None else dict(weights)
    unknown = [n for n in start if n not in names]
    missing = [n for n in names if n not in start]
    if unknown or missing:
        raise ConfigError(f"weights: unknown source(s) {unknown}, missing source(s) {missing}; sources are {list(names)}")
    for n, v in start.items():
        check_number(v, f"weights.{n}:", low=0, high=1, expected="a number in [0, 1] (slider range)")
    if not any(float(v) > 0 for v in start.values()):
        raise ConfigError("weights: at least one starting weight must be positive")
    return {n: float(start[n]) for n in names}


def pick_users(fold: Any, users: np.ndarray | None, sample_size: int, seed: int) -> np.ndarray:
    """The users given (sorted, unique), else a sample stratified by training activity."""
    from xrec.blend.engine import sample_users

    if users is not None:
        users = np.unique(np.asarray(users, dtype=np.int64))
        if users.size == 0:
            raise DataError("users is empty")
        return users
    return sample_users(fold, n=sample_size, seed=seed).users


class WaitedValue:
    """A read-only attribute that first waits for the owner's pending update (``owner.wait()``).

    ``WaitedValue("_chart_data", "doc")`` reads ``obj._chart_data`` after ``obj.wait()``.
    """

    def __init__(self, stored: str, doc: str) -> None:
        self.stored = stored
        self.__doc__ = doc

    def __get__(self, obj: Any, owner: type | None = None) -> Any:
        if obj is None:
            return self
        obj.wait()
        return getattr(obj, self.stored)

    def __set__(self, obj: Any, value: Any) -> None:
        raise AttributeError(f"{self.stored.lstrip('_')}_ is read-only")
