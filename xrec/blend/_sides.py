"""The two-sided objective of a gated weight search: do well on known items and on new items at once.

On a mixed validation split most held-out rows are on known items (items with training
interactions), so maximizing the overall metric lets the known side decide the weights and
starves the new-item band. The ``"sides"`` objective judges a weight vector by its weaker side
instead. The validation users are split by what they hold out:

* the *new side*: users with at least one held-out item that has no training interaction;
* the *known side*: every other user.

Each side has a reference, the best single source's mean metric on that side's users (a
"corner" of the simplex, evaluated once), and the objective of weights ``w`` is

    J(w) = min_s m_s(w) / r_s  +  TIE_BREAK · mean_s m_s(w) / r_s

where ``m_s`` is the mean metric of the blend on side ``s`` (ranking over the whole catalog,
known and new items together, as in production) and ``r_s`` the side's reference. The first
term is the maximin relative gain: the blend is only as good as its worse side measured against
what one source alone already does there, so ``J > 1`` means the blend beats the best single
source on both sides at once (on validation). The small second term breaks the ties of the
minimum (a move that helps only the better side is otherwise invisible) without ever trading
the worse side for the better one by more than ``TIE_BREAK``'s share.

All sides rank the same full catalog, so the relative scale of the new-item band against the
known bands (the band's share of the weight simplex) is learned by the same search.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from xrec._validation import parse_metric_column
from xrec.errors import ConfigError

__all__ = ["OBJECTIVES", "SIDES", "TIE_BREAK", "SideObjective", "new_side_rows"]

#: Objectives of the gated search: the old overall mean, or the two-sided maximin.
OBJECTIVES = ("overall", "sides")
#: Side names, in the order of :attr:`SideObjective.masks`.
SIDES = ("known", "new")
#: Weight of the mean relative gain beside the minimum (a tie-breaker; common practice, no source).
TIE_BREAK = 0.01


def new_side_rows(engine: Any) -> np.ndarray:
    """Per engine row (``engine.users_``): whether the user holds out at least one new item."""
    counts = engine.fold.item_train_counts
    truth = engine.truth_
    is_new = counts[truth.indices] == 0
    per_row = np.add.reduceat(is_new.astype(np.int64), truth.indptr[:-1]) if len(truth.indices) else np.zeros(0, np.int64)
    # reduceat reads one element for an empty row; engines hold only users with held-out items, so none is empty
    return per_row > 0


class SideObjective:
    """``J(w)`` of the module docstring, on a prepared validation engine.

    Parameters
    ----------
    engine
        Prepared :class:`~xrec.blend.engine.BlendEngine` of a mixed validation fold.
    min_users
        Fewest users a side needs; with fewer, the objective cannot be formed and
        :meth:`build` returns ``None`` with the reason.

    Attributes
    ----------
    new_row
        ``(n_rows,)`` bool: engine rows on the new side.
    references
        Side -> ``(source, mean)``: the best single source on that side.
    """

    def __init__(self, engine: Any, new_row: np.ndarray, references: Mapping[str, tuple[str, float]]) -> None:
        self.engine = engine
        self.new_row = np.asarray(new_row, dtype=bool)
        self.references = dict(references)
        self._ref = np.array([self.references[s][1] for s in SIDES], dtype=np.float64)

    @classmethod
    def build(cls, engine: Any, min_users: int, baselines: Mapping[str, Any] | None = None) -> tuple[SideObjective | None, dict]:
        """The objective, or ``None`` when a side has fewer than ``min_users`` users or a zero reference.

        ``baselines`` limits the sources a side's reference is chosen among, e.g.
        ``{"new": ["attributes", "text"]}`` to measure the new side against content-only
        sources (the ones a blend for new items has to beat); a side not named uses every source.

        Returns ``(objective or None, details)``; details hold the side sizes, the references
        and, when ``None``, the ``reason``.
        """
        names = list(engine.names_)
        allowed = {s: list(names) for s in SIDES}
        for side, listed in dict(baselines or {}).items():
            if side not in SIDES:
                raise ConfigError(f"side_baselines: unknown side {side!r}; sides are {list(SIDES)}")
            listed = [listed] if isinstance(listed, str) else list(listed)
            unknown = [n for n in listed if n not in names]
            if unknown or not listed:
                raise ConfigError(f"side_baselines.{side}: give source names among {names}, got {listed!r}")
            allowed[side] = listed
        new_row = new_side_rows(engine)
        sizes = {"known": int((~new_row).sum()), "new": int(new_row.sum())}
        details: dict = {"side_users": sizes}
        small = {s: n for s, n in sizes.items() if n < min_users}
        if small:
            details["reason"] = f"too few validation users on side(s) {small} (fewer than {min_users})"
            return None, details
        col = _column(engine)
        best = {s: ("", -np.inf) for s in SIDES}
        for j, name in enumerate(names):
            values = engine.per_user(dict(zip(names, np.eye(len(names))[j].tolist(), strict=True)))[col].to_numpy()
            for s, mask in zip(SIDES, (~new_row, new_row), strict=True):
                if name not in allowed[s]:
                    continue
                m = float(values[mask].mean())
                if m > best[s][1]:
                    best[s] = (name, m)
        refs = dict(best)
        details["side_reference"] = {s: {"source": refs[s][0], "value": refs[s][1]} for s in SIDES}
        zero = [s for s in SIDES if refs[s][1] <= 0]
        if zero:
            details["reason"] = f"no single source scores above 0 on side(s) {zero}"
            return None, details
        return cls(engine, new_row, refs), details

    def side_means(self, values: np.ndarray, rows: np.ndarray | None = None, row_weights: np.ndarray | None = None) -> np.ndarray:
        """``(..., 2)`` mean per side of per-user ``values`` (last axis over ``rows`` of the engine)."""
        values = np.asarray(values, dtype=np.float64)
        new = self.new_row if rows is None else self.new_row[rows]
        w = np.full(len(new), 1.0) if row_weights is None else np.asarray(row_weights, dtype=np.float64)
        out = []
        for mask in (~new, new):
            wm = w * mask
            total = wm.sum()
            out.append(values @ wm / total if total > 0 else np.full(values.shape[:-1], np.nan))
        return np.stack(out, axis=-1)

    def combine(self, side_means: np.ndarray) -> np.ndarray:
        """``J`` from side means (``(..., 2)``); a side missing from a user sample counts as its reference."""
        ratio = np.asarray(side_means, dtype=np.float64) / self._ref
        ratio = np.where(np.isnan(ratio), 1.0, ratio)
        return ratio.min(axis=-1) + TIE_BREAK * ratio.mean(axis=-1)

    def of_values(self, ev: Any, values: np.ndarray) -> np.ndarray:
        """``J`` of per-user values of a :class:`~xrec.blend._line.LineEvaluator` (its rows and weights)."""
        return self.combine(self.side_means(values, ev.rows, ev.row_weights))

    def per_side(self, weights: Mapping[str, Any]) -> dict[str, float]:
        """Mean metric per side of ``weights`` on every engine user."""
        values = self.engine.per_user(weights)[_column(self.engine)].to_numpy()
        return dict(zip(SIDES, self.side_means(values).tolist(), strict=True))

    def __call__(self, weights: Mapping[str, Any]) -> float:
        """``J`` of ``weights`` on every engine user."""
        return float(self.combine(np.array(list(self.per_side(weights).values()))))


def _column(engine: Any) -> str:
    name, k = parse_metric_column(engine.metric)
    return f"{name}@{k}"


def check_objective(objective: str) -> str:
    """``objective`` if it is one of :data:`OBJECTIVES`, else a ``ConfigError`` naming the field."""
    if objective not in OBJECTIVES:
        raise ConfigError(f"objective: unknown {objective!r}; choose one of {list(OBJECTIVES)}")
    return objective
