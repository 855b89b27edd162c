"""The source interface: anything that scores users × items from one signal."""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from abc import ABC, abstractmethod
from typing import Any, ClassVar, Self

import numpy as np

from xrec._settings import check_settings
from xrec._validation import check_fitted
from xrec.errors import ConfigError
from xrec.fold import Fold

_REGISTRY: dict[str, type[Source]] = {}


class Source(ABC):
    """Scores a block of users against every catalog item.

    Subclasses set ``kind`` (the name used in specs and blend files), store their
    settings in ``__init__`` under the same names as its parameters, learn in
    :meth:`fit` (state ends with ``_``) and return float32 blocks from :meth:`score`.
    """

    kind: ClassVar[str] = ""
    #: settings that hold file paths (a path, a table with "path" / "ids" keys, or a table
    #: of such tables); a spec gives them relative to the spec file, inside its folder unless
    #: ``data.allow_outside`` (checked by :func:`xrec.experiment.build_sources`)
    path_settings: ClassVar[tuple[str, ...]] = ()

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if cls.kind:
            if cls.kind in _REGISTRY and _REGISTRY[cls.kind] is not cls:
                raise TypeError(f"source kind {cls.kind!r} registered twice")
            _REGISTRY[cls.kind] = cls

    @classmethod
    def resolve_paths(cls, settings: dict[str, Any], resolve: Callable[[str], Any]) -> dict[str, Any]:
        """``settings`` with the file paths of :attr:`path_settings` passed through ``resolve``.

        A setting may be a path, a table whose ``"path"`` and ``"ids"`` entries are paths, or
        a table of paths or of such tables; anything else is left as it is (and checked when
        fitting).
        """
        return cls._map_paths(settings, lambda field, value: str(resolve(value)))

    @classmethod
    def path_fields(cls, settings: dict[str, Any]) -> dict[str, str]:
        """The file paths in ``settings`` by dotted field name (``"path"``, ``"vectors.image.path"``, ...).

        The same paths :meth:`resolve_paths` passes through its function, as written.
        """
        found: dict[str, str] = {}

        def collect(field: str, value: str) -> str:
            found[field] = value
            return value

        cls._map_paths(settings, collect)
        return found

    @classmethod
    def _map_paths(cls, settings: dict[str, Any], change: Callable[[str, str], str]) -> dict[str, Any]:
        """``settings`` with each path of :attr:`path_settings` replaced by ``change(field, path)``."""

        def one_file(field: str, value: Any) -> Any:
            if isinstance(value, str):
                return change(field, value)
            if isinstance(value, Mapping) and "path" in value:
                return {
                    k: change(f"{field}.{k}", v) if k in ("path", "ids") and isinstance(v, str) else v
                    for k, v in value.items()
                }
            return value

        out = dict(settings)
        for key in cls.path_settings:
            if key not in out:
                continue
            value = out[key]
            if isinstance(value, Mapping) and "path" not in value:
                out[key] = {k: one_file(f"{key}.{k}", v) for k, v in value.items()}
            else:
                out[key] = one_file(key, value)
        return out

    @abstractmethod
    def fit(self, fold: Fold) -> Self:
        """Learn from ``fold.train`` (never from ``fold.heldout``); return ``self``."""

    @abstractmethod
    def score(self, users: np.ndarray) -> np.ndarray:
        """Scores of shape ``(len(users), n_items)``, float32; higher is better."""

    @property
    def is_low_rank(self) -> bool:
        """True when scores are ``user_factors_[users] @ item_factors_.T``."""
        return False

    def get_params(self) -> dict[str, Any]:
        """Settings given to ``__init__`` (what a blend file records)."""
        sig = inspect.signature(type(self).__init__)
        return {name: getattr(self, name) for name in sig.parameters if name != "self"}

    def _check_fitted(self) -> None:
        check_fitted(self, how="call fit(fold) first")

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"


class LowRankSource(Source):
    """A source whose scores factor into user and item vectors (computed by chunked matmul)."""

    user_factors_: np.ndarray
    item_factors_: np.ndarray

    @property
    def is_low_rank(self) -> bool:
        """Always ``True``: scores are ``user_factors_[users] @ item_factors_.T``."""
        return True

    def score(self, users: np.ndarray) -> np.ndarray:
        """``user_factors_[users] @ item_factors_.T`` as float32, shape ``(len(users), n_items)``."""
        self._check_fitted()
        users = np.asarray(users)
        return np.ascontiguousarray(self.user_factors_[users] @ self.item_factors_.T, dtype=np.float32)


def source_kinds() -> list[str]:
    """Names of every registered source kind."""
    import xrec.sources  # noqa: F401  (registers the built-in kinds)

    return sorted(_REGISTRY)


def source_class(kind: str) -> type[Source] | None:
    """The class registered under ``kind``, or ``None`` for an unknown kind."""
    import xrec.sources  # noqa: F401  (registers the built-in kinds)

    return _REGISTRY.get(kind)


def make_source(kind: str, **params: Any) -> Source:
    """Build a source by its kind name; unknown kinds or settings give a :class:`ConfigError`.

    Parameters
    ----------
    kind
        A registered kind (see :func:`source_kinds`), e.g. ``"als"``, ``"attributes"``, ``"text"``.
    **params
        Keyword arguments of that source class's ``__init__``.

    Returns
    -------
    Source
        The unfitted source.
    """
    import xrec.sources  # noqa: F401

    if kind not in _REGISTRY:
        raise ConfigError(f"unknown source kind {kind!r}; known: {sorted(_REGISTRY)}")
    cls = _REGISTRY[kind]
    check_settings(cls, params, f"source {kind!r}")
    return cls(**params)
