"""What the gallery draws for one user: history, held-out items, two top-K lists and why.

The per-source normalized rows of a user do not depend on the weights, so they are kept
(per user and normalizer, a bounded cache) and a weight change costs one weighted sum over
``n_sources × n_items`` values and one top-K selection. Scores are computed exactly as
:meth:`xrec.blend.Blend.score` computes them (the same :func:`~xrec.blend.normalize.normalize`
over the same candidates, ``normalized *= weight`` then ``+=`` in the sources' order, float32),
so each item's contributions add up to its blend score.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from xrec.bundle import top_k
from xrec.errors import ConfigError
from xrec.fold import Fold

#: Float32 values the row cache and one scoring batch may hold (128 MiB).
CELL_BUDGET = 1 << 25

__all__ = ["CELL_BUDGET", "Histories", "Ranked", "RowCache", "UserView", "user_heldout", "user_view"]


class RowCache:
    """Normalized score rows per (user, normalizer) and source, plus each user's candidate mask.

    Parameters
    ----------
    sources
        Name -> fitted source.
    fold
        The fold the sources were fitted on (its training rows mark seen items).
    max_users
        Rows kept (a user under one normalizer) before the oldest is dropped; fewer on a large
        catalog, so that the rows kept hold at most :data:`CELL_BUDGET` values.
    """

    def __init__(self, sources: Mapping[str, Any], fold: Fold, max_users: int = 256) -> None:
        from xrec.blend import Blend

        self.sources = dict(sources)
        self.fold = fold
        self.max_users = max(1, min(int(max_users), self.users_within_budget))
        # A fitted blend gives the candidates exactly as Blend.score builds them.
        self._masker = Blend(self.sources, {n: 1.0 for n in self.sources}).fit(fold)
        self.histories = Histories(fold)
        self._rows: OrderedDict[tuple[int, str], tuple[dict[str, np.ndarray], np.ndarray]] = OrderedDict()

    @property
    def users_within_budget(self) -> int:
        """Users whose rows of every source fit in :data:`CELL_BUDGET` values (at least 1)."""
        return max(1, CELL_BUDGET // max(1, len(self.sources) * self.fold.n_items))

    def rows(self, users: np.ndarray, normalizer: str) -> tuple[dict[str, np.ndarray], np.ndarray]:
        """``({name: (len(users), n_items) float32}, candidate mask)`` for a block of users."""
        from xrec.blend.normalize import normalize

        users = np.asarray(users, dtype=np.int64)
        found = {u: self._rows[(u, normalizer)] for u in users.tolist() if (u, normalizer) in self._rows}
        missing = [u for u in dict.fromkeys(users.tolist()) if u not in found]
        if missing:
            block = np.asarray(missing, dtype=np.int64)
            cand = self._masker.candidates(block)
            normalized = {
                name: normalize(np.asarray(src.score(block)), normalizer, candidates=cand) for name, src in self.sources.items()
            }
            for i, u in enumerate(missing):
                found[u] = ({n: v[i] for n, v in normalized.items()}, cand.mask[i])
        for u in users.tolist():
            self._rows[(u, normalizer)] = found[u]
            self._rows.move_to_end((u, normalizer))
        while len(self._rows) > self.max_users:
            self._rows.popitem(last=False)
        entries = [found[u] for u in users.tolist()]
        if not entries:
            empty = np.zeros((0, self.fold.n_items), np.float32)
            return {n: empty for n in self.sources}, np.zeros((0, self.fold.n_items), bool)
        return {n: np.stack([e[0][n] for e in entries]) for n in self.sources}, np.stack([e[1] for e in entries])

    def weighted(self, users: np.ndarray, weights: Mapping[str, float], normalizer: str) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]:
        """Per-source contributions (weight × normalized row), their sum and the candidate mask.

        Sources with weight 0 are left out, as :meth:`Blend.score` leaves them out.
        """
        rows, mask = self.rows(users, normalizer)
        total = np.zeros(mask.shape, dtype=np.float32)
        parts: dict[str, np.ndarray] = {}
        for name, weight in weights.items():
            if weight <= 0:
                continue
            part = rows[name] * np.float32(weight)
            parts[name] = part
            total += part
        return parts, total, mask


@dataclass(frozen=True)
class Ranked:
    """One top-K list: item positions (best first), their scores and per-source contributions."""

    items: np.ndarray
    scores: np.ndarray
    contributions: dict[str, np.ndarray] = field(default_factory=dict)


@dataclass(frozen=True)
class UserView:
    """Everything the gallery shows for one user (item positions into the catalog)."""

    user: int
    user_id: Any
    history: np.ndarray  # training items, most recent first (each once)
    history_total: int  # distinct training items
    heldout: np.ndarray
    baseline: Ranked
    blend: Ranked
    k: int

    @property
    def added(self) -> np.ndarray:
        """Items in the blend's top-K and not in the baseline's, in the blend's order."""
        return self.blend.items[~np.isin(self.blend.items, self.baseline.items)]

    @property
    def dropped(self) -> np.ndarray:
        """Items in the baseline's top-K and not in the blend's, in the baseline's order."""
        return self.baseline.items[~np.isin(self.baseline.items, self.blend.items)]

    @property
    def blend_hits(self) -> np.ndarray:
        return self.blend.items[np.isin(self.blend.items, self.heldout)]

    @property
    def baseline_hits(self) -> np.ndarray:
        return self.baseline.items[np.isin(self.baseline.items, self.heldout)]


def _ranked(parts: Mapping[str, np.ndarray], total: np.ndarray, mask: np.ndarray, k: int) -> Ranked:
    items = top_k(total, mask, k)
    return Ranked(items, total[items], {n: p[items] for n, p in parts.items()})


def _scorer_ranked(scorer: Any, user: int, k: int, fold: Fold) -> Ranked:
    """Top-K of any fitted scorer; a blend (``item_weights`` and ``normalizers``) also gives contributions."""
    from xrec.blend.normalize import normalize

    users = np.array([user], dtype=np.int64)
    if hasattr(scorer, "item_weights") and hasattr(scorer, "normalizers") and hasattr(scorer, "candidates"):
        cand = scorer.candidates(users)
        parts: dict[str, np.ndarray] = {}
        total = np.zeros(cand.mask.shape, dtype=np.float32)
        for name, weight in scorer.item_weights().items():
            part = normalize(np.asarray(scorer.sources[name].score(users)), scorer.normalizers[name], candidates=cand)
            part *= np.asarray(weight, dtype=np.float32)
            parts[name] = part[0]
            total += part
        return _ranked(parts, total[0], cand.mask[0], k)
    scores = np.asarray(scorer.score(users), dtype=np.float32)[0]
    seen = fold.train_matrix[user].indices
    mask = np.ones(fold.n_items, dtype=bool)
    mask[seen] = False
    items = top_k(scores, mask, k)
    return Ranked(items, scores[items], {})


class Histories:
    """Each user's distinct training items, most recent first (the training rows sorted once)."""

    def __init__(self, fold: Fold) -> None:
        users = fold.train["user_idx"].to_numpy()
        times = fold.train["timestamp"].to_numpy(dtype=np.float64)
        order = np.lexsort((-times, users))
        self._items = fold.train["item_idx"].to_numpy()[order].astype(np.int64)
        self._starts = np.searchsorted(users[order], np.arange(fold.n_users + 1))

    def __call__(self, user: int) -> np.ndarray:
        items = self._items[self._starts[user] : self._starts[user + 1]]
        return np.asarray(list(dict.fromkeys(items.tolist())), dtype=np.int64)


def user_heldout(fold: Fold, user: int) -> np.ndarray:
    truth = fold.heldout_matrix
    return np.asarray(truth.indices[truth.indptr[user] : truth.indptr[user + 1]], dtype=np.int64)


def user_view(
    cache: RowCache,
    user: int,
    weights: Mapping[str, float],
    normalizer: str,
    k: int,
    baseline: Mapping[str, float] | Any,
    baseline_normalizer: str | None = None,
) -> UserView:
    """The view of one user: ``baseline`` is a weight mapping over the cache's sources or a fitted scorer."""
    fold = cache.fold
    if not 0 <= user < fold.n_users:
        raise ConfigError(f"user index {user} is outside the fold's {fold.n_users} users")
    users = np.array([user], dtype=np.int64)
    parts, total, mask = cache.weighted(users, weights, normalizer)
    blend = _ranked({n: p[0] for n, p in parts.items()}, total[0], mask[0], k)
    if isinstance(baseline, Mapping):
        bparts, btotal, bmask = cache.weighted(users, baseline, baseline_normalizer or normalizer)
        base = _ranked({n: p[0] for n, p in bparts.items()}, btotal[0], bmask[0], k)
    else:
        base = _scorer_ranked(baseline, user, k, fold)
    history = cache.histories(user)
    return UserView(
        user=user, user_id=fold.user_ids[user], history=history, history_total=len(history),
        heldout=user_heldout(fold, user), baseline=base, blend=blend, k=int(k),
    )  # fmt: skip
