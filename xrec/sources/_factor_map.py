"""Maps from item content vectors to collaborative item factors (ridge and k-NN), and their choice.

Following Gantner, Drumond, Freudenthaler, Rendle & Schmidt-Thieme, "Learning Attribute-to-Feature
Mappings for Cold-Start Recommendations" (ICDM 2010): a map learned on the items that have factors
(known items) places items without interactions (new items) in the same factor space, so one user
factor scores both.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["FactorMap", "choose_map", "fit_knn_map", "fit_ridge_map", "score_error"]


@dataclass(frozen=True)
class FactorMap:
    """A fitted map: ``"ridge"`` (``content @ coef + intercept``) or ``"knn"`` (neighbour average).

    Attributes
    ----------
    method
        ``"ridge"`` or ``"knn"``.
    setting
        The ridge penalty ``alpha`` or the neighbour count ``k``.
    coef, intercept
        Ridge: ``(n_features, n_factors)`` and ``(n_factors,)`` float64.
    keys, values
        k-NN: the known items' L2-normalized content rows and their factors.
    """

    method: str
    setting: float
    coef: np.ndarray | None = None
    intercept: np.ndarray | None = None
    keys: np.ndarray | None = None
    values: np.ndarray | None = None

    def predict(self, content: np.ndarray) -> np.ndarray:
        """Factors of the items with these content rows, float32 ``(n, n_factors)``."""
        x = np.asarray(content, dtype=np.float64)
        if self.method == "ridge":
            return (x @ self.coef + self.intercept).astype(np.float32)
        return _knn_predict(x, self.keys, self.values, int(self.setting)).astype(np.float32)


def fit_ridge_map(content: np.ndarray, factors: np.ndarray, alpha: float) -> FactorMap:
    """Ridge regression of every factor on the content, with an unpenalized intercept.

    Minimizes ``||Y - X W - 1 b||² + alpha ||W||²`` (the objective of scikit-learn's ``Ridge``
    with ``fit_intercept=True``): ``W`` solves the centred normal equations, in the primal form
    ``(XcᵀXc + αI)⁻¹ XcᵀYc`` when there are fewer features than items, else in the equal dual
    form ``Xcᵀ (XcXcᵀ + αI)⁻¹ Yc``; ``b = ȳ − x̄ W``.
    """
    x = np.asarray(content, dtype=np.float64)
    y = np.asarray(factors, dtype=np.float64)
    x_mean, y_mean = x.mean(axis=0), y.mean(axis=0)
    xc, yc = x - x_mean, y - y_mean
    n, d = xc.shape
    if d <= n:
        coef = np.linalg.solve(xc.T @ xc + alpha * np.eye(d), xc.T @ yc)
    else:
        coef = xc.T @ np.linalg.solve(xc @ xc.T + alpha * np.eye(n), yc)
    return FactorMap("ridge", float(alpha), coef=coef, intercept=y_mean - x_mean @ coef)


def _unit(rows: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(rows, axis=1, keepdims=True)
    return np.divide(rows, norms, out=np.zeros_like(rows), where=norms > 0)


def fit_knn_map(content: np.ndarray, factors: np.ndarray, k: int) -> FactorMap:
    """Similarity-weighted mean of the factors of the ``k`` most content-similar known items (cosine)."""
    return FactorMap("knn", float(k), keys=_unit(np.asarray(content, dtype=np.float64)), values=np.asarray(factors, dtype=np.float64))


def _knn_predict(x: np.ndarray, keys: np.ndarray, values: np.ndarray, k: int, chunk: int = 2048) -> np.ndarray:
    k = min(k, len(keys))
    out = np.empty((len(x), values.shape[1]))
    for start in range(0, len(x), chunk):
        sims = _unit(x[start:start + chunk]) @ keys.T
        top = np.argpartition(-sims, k - 1, axis=1)[:, :k]
        w = np.clip(np.take_along_axis(sims, top, axis=1), 0.0, None)
        flat = w.sum(axis=1) <= 0  # no similar neighbour: a plain mean of the k nearest
        w[flat] = 1.0
        out[start:start + chunk] = np.einsum("nk,nkf->nf", w, values[top]) / w.sum(axis=1, keepdims=True)
    return out


def score_error(predicted: np.ndarray, actual: np.ndarray, user_factors: np.ndarray) -> float:
    """Mean squared error of the scores users would give: mean over items of ``eᵀ G e``.

    ``e`` is an item's factor error and ``G = UᵀU / n_users`` (users with a factor row), so
    directions users care about count more than plain factor error would count them.
    """
    u = np.asarray(user_factors, dtype=np.float64)
    u = u[np.abs(u).sum(axis=1) > 0]
    gram = u.T @ u / max(len(u), 1)
    e = np.asarray(predicted, dtype=np.float64) - np.asarray(actual, dtype=np.float64)
    return float(np.einsum("nf,fg,ng->n", e, gram, e).mean())


def choose_map(
    content: np.ndarray,
    factors: np.ndarray,
    user_factors: np.ndarray,
    *,
    methods: Sequence[str],
    alphas: Sequence[float],
    neighbors: Sequence[int],
    validation_share: float,
    seed: int,
) -> tuple[FactorMap, list[dict]]:
    """Choose method and setting on a seeded share of the known items, then refit on all of them.

    Returns the map refitted on every known item and one row per candidate
    (``method``, ``setting``, ``validation_error`` by :func:`score_error`).
    """
    n = len(content)
    rng = np.random.default_rng(seed)
    n_valid = min(max(1, int(round(validation_share * n))), n - 1)
    order = rng.permutation(n)
    valid, train = order[:n_valid], order[n_valid:]
    rows = []
    for method in methods:
        for setting in (alphas if method == "ridge" else neighbors):
            fit = fit_ridge_map if method == "ridge" else fit_knn_map
            m = fit(content[train], factors[train], setting)
            err = score_error(m.predict(content[valid]), factors[valid], user_factors)
            rows.append({"method": method, "setting": float(setting), "validation_error": err})
    best = min(rows, key=lambda r: r["validation_error"])
    fit = fit_ridge_map if best["method"] == "ridge" else fit_knn_map
    setting = best["setting"] if best["method"] == "ridge" else int(best["setting"])
    return fit(content, factors, setting), rows
