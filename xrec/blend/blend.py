"""Weighted blends of normalized sources."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from xrec._validation import is_number
from xrec.blend._base import Combiner, check_sources
from xrec.blend.normalize import check_normalizer, normalize
from xrec.errors import ConfigError


def check_weight(value: object, field: str) -> float:
    """A finite, non-negative weight as float, else :class:`ConfigError` naming ``field``."""
    if not is_number(value):
        raise ConfigError(f"{field}: must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise ConfigError(f"{field}: must be a finite number, got {value!r}")
    if value < 0:
        raise ConfigError(f"{field}: must be >= 0, got {value:g}")
    return value


def check_one_per_source(table: Mapping[str, object], sources: Mapping[str, Any], field: str, noun: str, *, hint: str = "") -> None:
    """Raise :class:`ConfigError` unless ``table`` has exactly one entry per source (named in ``field``)."""
    unknown = [name for name in table if name not in sources]
    if unknown:
        raise ConfigError(f"{field}: {unknown} are not sources of this blend; its sources are {list(sources)}")
    missing = [name for name in sources if name not in table]
    if missing:
        raise ConfigError(f"{field}: no {noun} for source(s) {missing}{hint}")


def check_weights(weights: Mapping[str, object], sources: Mapping[str, Any]) -> dict[str, float]:
    """One valid weight per source (in the sources' order); at least one must be positive."""
    if not isinstance(weights, Mapping):
        raise ConfigError(f"weights: give a mapping of source name -> weight, got {type(weights).__name__}")
    check_one_per_source(weights, sources, "weights", "weight", hint=" (give 0 to leave a source out)")
    out = {name: check_weight(weights[name], f"weights.{name}") for name in sources}
    if not any(w > 0 for w in out.values()):
        raise ConfigError(f"weights: all weights are zero ({out}); at least one source needs a positive weight")
    return out


def check_normalizers(normalizers: str | Mapping[str, str], sources: Mapping[str, Any]) -> dict[str, str]:
    """One normalizer name per source: a single name for all, or a complete mapping."""
    if isinstance(normalizers, str):
        check_normalizer(normalizers, "normalizers")
        return {name: normalizers for name in sources}
    if not isinstance(normalizers, Mapping):
        raise ConfigError(f"normalizers: give a name or a mapping of source name -> name, got {type(normalizers).__name__}")
    check_one_per_source(normalizers, sources, "normalizers", "normalizer")
    return {name: check_normalizer(normalizers[name], f"normalizers.{name}") for name in sources}


class Blend(Combiner):
    """Score = Σ_s w_s · normalize_s(source_s.score(users)), per user, over candidate items.

    Parameters
    ----------
    sources
        Name -> source. Sources may be fitted already (e.g. shared between several
        blends); :meth:`fit` fits only those that are not.
    weights
        Name -> finite weight >= 0, one for every source, at least one positive. A
        source with weight 0 is never scored.
    normalizers
        One of ``"none"``, ``"minmax"``, ``"zscore"`` (default), ``"rank"`` for every
        source, or a mapping giving one per source (see :mod:`xrec.blend.normalize`).

    Attributes
    ----------
    train_matrix_
        The fold's training matrix; its rows mark each user's seen items.
    n_items_
        Number of catalog items.

    Notes
    -----
    Seen items receive the lowest blended value of their row (each normalized
    source gives them its row minimum and weights are non-negative), so they can
    never outrank a candidate; rankings still exclude them explicitly.

    The weight of a source is resolved per item by :meth:`item_weights`; a plain
    blend returns one number per source. Variants that vary a source's weight
    across items (:class:`~xrec.blend.gating.GatedBlend`, by item popularity band)
    override that method and return an ``(n_items,)`` vector, which :meth:`score`
    broadcasts over the block.

    Examples
    --------
    >>> blend = Blend({"als": als, "genres": genres}, {"als": 1.0, "genres": 0.3}).fit(fold)  # doctest: +SKIP
    >>> scores = blend.score(np.arange(100))  # doctest: +SKIP
    """

    method = "weighted"

    def __init__(
        self,
        sources: Mapping[str, Any],
        weights: Mapping[str, float],
        normalizers: str | Mapping[str, str] = "zscore",
    ) -> None:
        self.sources = check_sources(sources)
        self.weights = check_weights(weights, self.sources)
        self.normalizers = check_normalizers(normalizers, self.sources)

    def item_weights(self) -> dict[str, float | np.ndarray]:
        """Weight of each source that takes part, as a number or an ``(n_items,)`` float32 vector.

        Sources whose weight is zero everywhere are left out, so they are not scored.
        """
        return {name: w for name, w in self.weights.items() if w > 0}

    def score(self, users: np.ndarray) -> np.ndarray:
        """Blended scores of shape ``(len(users), n_items)``, float32; higher is better."""
        self._check_fitted()
        users = np.asarray(users, dtype=np.int64)
        cand = self.candidates(users)
        out = np.zeros((len(users), self.n_items_), dtype=np.float32)
        for name, weight in self.item_weights().items():
            normalized = normalize(self._source_block(name, users), self.normalizers[name], candidates=cand)
            weight = np.asarray(weight, dtype=np.float32)
            normalized *= weight
            out += normalized
        return out

    def with_weights(self, weights: Mapping[str, float]) -> Blend:
        """A new blend with other weights, sharing this blend's (fitted) sources and training matrix."""
        other = type(self).__new__(type(self))
        other.sources = self.sources
        other.weights = check_weights(weights, self.sources)
        other.normalizers = dict(self.normalizers)
        self._copy_fitted_state(other)
        return other

    def get_params(self) -> dict[str, Any]:
        """Weights and normalizers (the sources are described by their own ``get_params``)."""
        return {"weights": dict(self.weights), "normalizers": dict(self.normalizers)}

    def __repr__(self) -> str:
        parts = ", ".join(f"{n}: {w:g}·{self.normalizers[n]}" for n, w in self.weights.items())
        return f"Blend({parts})"
