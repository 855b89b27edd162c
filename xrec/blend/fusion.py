"""Tuning-free fusion rules: reciprocal rank fusion, CombSUM and CombMNZ.

Each rule combines several sources without weights, so it makes a strong
baseline for a tuned :class:`~xrec.blend.Blend`. Every rule is a scorer with
``fit(fold)`` and ``score(users)`` (usable by ``evaluate`` and blend files);
all per-user statistics are taken over the user's candidate items (not seen in
training), and seen items receive the row's lowest fused value.

Rules
-----
Reciprocal rank fusion (Cormack, Clarke & Büttcher, SIGIR 2009)
    ``score(i) = Σ_s 1 / (k + rank_s(i))`` with ``rank_s(i)`` the 1-based rank of
    item ``i`` among the user's candidates under source ``s`` (1 = best). Tied
    items share the mean of the ranks they span, so a tie never favours the item
    with the smaller index. With ``depth`` set, a source contributes only to the
    items it ranks within its top ``depth`` (ties at the cut included).
CombSUM (Fox & Shaw, TREC-2, 1994)
    ``score(i) = Σ_s n_s(i)`` with ``n_s`` the source's per-user normalized score
    (min-max by default, see :mod:`xrec.blend.normalize`).
CombMNZ (Fox & Shaw, TREC-2, 1994)
    ``score(i) = CombSUM(i) × m(i)``, where ``m(i)`` counts the sources that
    *retrieved* item ``i``: a source retrieves an item when fewer than ``depth``
    candidates score strictly higher under it (its top ``depth``, ties at the cut
    included; default 100). The normalizer must give non-negative values
    (``"minmax"`` or ``"rank"``) so that the multiplication keeps the order meaningful.
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from typing import Any

import numpy as np

from xrec._validation import check_int, check_number
from xrec.blend._base import Combiner, check_sources, fill_seen_with_row_min
from xrec.blend._rank import average_ranks, within_depth
from xrec.blend.normalize import check_normalizer, normalize
from xrec.errors import ConfigError

FUSION_METHODS: tuple[str, ...] = ("rrf", "combsum", "combmnz")


def _check_depth(depth: object, field: str, *, optional: bool) -> int | None:
    return check_int(depth, f"{field}:", low=1, allow_none=optional)


class Fusion(Combiner):
    """Base of the fusion rules; ``method`` names the rule in blend files."""

    method: str = ""

    def get_params(self) -> dict[str, Any]:
        """The rule's settings (not the sources)."""
        raise NotImplementedError

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({list(self.sources)}, {args})"


class ReciprocalRankFusion(Fusion):
    """Reciprocal rank fusion: ``Σ_s 1 / (k + rank_s(item))`` over the user's candidates.

    Parameters
    ----------
    sources
        Name -> source.
    k
        Damping constant, > 0; 60 as in Cormack, Clarke & Büttcher (2009).
    depth
        Only the top ``depth`` candidates of each source contribute; ``None`` (default) uses all.
    """

    method = "rrf"

    def __init__(self, sources: Mapping[str, Any], k: float = 60.0, depth: int | None = None) -> None:
        self.sources = check_sources(sources)
        self.k = check_number(k, "k:", low=0, low_open=True)
        self.depth = _check_depth(depth, "depth", optional=True)

    def get_params(self) -> dict[str, Any]:
        """Settings as passed to ``__init__`` (written to blend files)."""
        return {"k": self.k, "depth": self.depth}

    def score(self, users: np.ndarray) -> np.ndarray:
        """Fused scores of shape ``(len(users), n_items)``, float32; higher is better."""
        self._check_fitted()
        users = np.asarray(users, dtype=np.int64)
        cand = self.candidates(users)
        n_cand = cand.n_cand[:, None].astype(np.float64)
        total = np.zeros(cand.shape)
        for name in self.sources:
            block = self._source_block(name, users)
            rank_desc = n_cand + 1.0 - average_ranks(block, cand)
            contrib = 1.0 / (self.k + rank_desc)
            keep = cand.mask if self.depth is None else within_depth(block, cand, self.depth)
            total += np.where(keep, contrib, 0.0)
        return fill_seen_with_row_min(total.astype(np.float32), cand)


class CombSum(Fusion):
    """CombSUM: the sum of the sources' per-user normalized scores.

    Parameters
    ----------
    sources
        Name -> source.
    normalizer
        Per-user normalizer applied to every source (default ``"minmax"``).
    """

    method = "combsum"

    def __init__(self, sources: Mapping[str, Any], normalizer: str = "minmax") -> None:
        self.sources = check_sources(sources)
        self.normalizer = check_normalizer(normalizer, "normalizer")

    def get_params(self) -> dict[str, Any]:
        """Settings as passed to ``__init__`` (written to blend files)."""
        return {"normalizer": self.normalizer}

    def score(self, users: np.ndarray) -> np.ndarray:
        """Fused scores of shape ``(len(users), n_items)``, float32; higher is better."""
        self._check_fitted()
        users = np.asarray(users, dtype=np.int64)
        cand = self.candidates(users)
        total = np.zeros(cand.shape, dtype=np.float32)
        for name in self.sources:
            total += normalize(self._source_block(name, users), self.normalizer, candidates=cand)
        return fill_seen_with_row_min(total, cand)


class CombMNZ(Fusion):
    """CombMNZ: CombSUM times the number of sources that retrieved the item (top ``depth``).

    Parameters
    ----------
    sources
        Name -> source.
    normalizer
        ``"minmax"`` (default) or ``"rank"``: a non-negative per-user normalizer.
    depth
        A source retrieves an item when fewer than ``depth`` candidates score strictly
        higher under it (default 100).
    """

    method = "combmnz"

    def __init__(self, sources: Mapping[str, Any], normalizer: str = "minmax", depth: int = 100) -> None:
        self.sources = check_sources(sources)
        check_normalizer(normalizer, "normalizer")
        if normalizer not in ("minmax", "rank"):
            raise ConfigError(f"normalizer: CombMNZ needs a non-negative normalizer ('minmax' or 'rank'), got {normalizer!r}")
        self.normalizer = normalizer
        self.depth = _check_depth(depth, "depth", optional=False)

    def get_params(self) -> dict[str, Any]:
        """Settings as passed to ``__init__`` (written to blend files)."""
        return {"normalizer": self.normalizer, "depth": self.depth}

    def score(self, users: np.ndarray) -> np.ndarray:
        """Fused scores of shape ``(len(users), n_items)``, float32; higher is better."""
        self._check_fitted()
        users = np.asarray(users, dtype=np.int64)
        cand = self.candidates(users)
        total = np.zeros(cand.shape, dtype=np.float32)
        hits = np.zeros(cand.shape, dtype=np.float32)
        for name in self.sources:
            block = self._source_block(name, users)
            total += normalize(block, self.normalizer, candidates=cand)
            hits += within_depth(block, cand, self.depth)
        return fill_seen_with_row_min(total * hits, cand)


_RULES: dict[str, type[Fusion]] = {cls.method: cls for cls in (ReciprocalRankFusion, CombSum, CombMNZ)}


def make_fusion(method: str, sources: Mapping[str, Any], **params: Any) -> Fusion:
    """Build a fusion rule by its name (``"rrf"``, ``"combsum"``, ``"combmnz"``).

    Parameters
    ----------
    method
        ``"rrf"`` (:class:`ReciprocalRankFusion`), ``"combsum"`` (:class:`CombSum`) or
        ``"combmnz"`` (:class:`CombMNZ`).
    sources
        Name -> source.
    **params
        That rule's settings (``k``, ``depth``, ``normalizer``); others give a :class:`ConfigError`.
    """
    if method not in _RULES:
        raise ConfigError(f"method: unknown fusion rule {method!r}; choose one of {list(FUSION_METHODS)}")
    cls = _RULES[method]

    allowed = set(inspect.signature(cls.__init__).parameters) - {"self", "sources"}
    unknown = sorted(set(params) - allowed)
    if unknown:
        raise ConfigError(f"{method}: unknown setting(s) {unknown}; it takes {sorted(allowed)}")
    return cls(sources, **params)
