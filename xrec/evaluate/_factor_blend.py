"""A normalized, weighted blend of low-rank sources written as one low-rank product.

For a low-rank source ``s`` the raw score is ``u_s · v_sj``. The normalizers ``"none"``
and ``"zscore"`` are affine per user, ``a_us · raw + c_us`` with ``a_us >= 0``, so a
non-negative weighted sum of them is

``Σ_s w_s (a_us u_s · v_sj + c_us) = [w_1 a_u1 u_1, …] · [v_1j, …] + Σ_s w_s c_us``.

The last term is the same for every item of a user: it changes no rank and is dropped.
What is left is one matrix product per block of users, ``U' @ V'.T``, with the item side
``V'`` (all sources' item factors side by side) built once. Both the chunked full-ranking
evaluator and the candidate mode score through :meth:`FactorBlend.user_side` and
:func:`blend_product`, so they produce bit-identical blended scores for the same items.

Z-score statistics are exact and need no score block: over a user's candidates (items not
seen in training) ``C_u``,

``Σ_{j∈C_u} s_uj = u · Σ_j v_j − Σ_{seen} s_uj`` and
``Σ_{j∈C_u} s_uj² = u G uᵀ − Σ_{seen} s_uj²`` with ``G = Σ_j v_jᵀ v_j``,

in float64, from the item factors' sum and Gram matrix (computed once) and the few seen
items. Population variance (``ddof=0``), as :func:`xrec.blend.normalize.normalize`. A row
whose variance is at most ``1e-12`` of its mean square is constant and maps to 0 (the
normalizer's convention), so rounding noise is never blown up into a ranking.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import scipy.sparse as sp

from xrec.blend.blend import check_normalizers, check_weights
from xrec.errors import ConfigError

#: Normalizers that are affine per user with a non-negative slope.
LINEAR_NORMALIZERS = ("none", "zscore")
# Item rows per step when accumulating the item factors' sum and Gram matrix.
_ITEM_STEP = 1 << 16
# Scratch budget of the seen-score gather.
_SEEN_BYTES = 16 << 20
# Relative variance below which a user's row is read as constant.
_CONSTANT_RTOL = 1e-12


def _factors(name: str, src: Any) -> tuple[np.ndarray, np.ndarray]:
    if not getattr(src, "is_low_rank", False):
        raise ConfigError(f"sources.{name}: needs a low-rank source (user_factors_ @ item_factors_.T), got {type(src).__name__}")
    if not getattr(src, "fitted_", False):
        raise ConfigError(f"sources.{name}: {type(src).__name__} is not fitted; fit it on the training rows first")
    return np.asarray(src.user_factors_), np.asarray(src.item_factors_)


def item_moments(item_factors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum ``Σ_j v_j`` and Gram matrix ``Σ_j v_jᵀ v_j`` of the item factors, float64, in item steps."""
    n, d = item_factors.shape
    total = np.zeros(d)
    gram = np.zeros((d, d))
    for lo in range(0, n, _ITEM_STEP):
        part = np.asarray(item_factors[lo : lo + _ITEM_STEP], dtype=np.float64)
        total += part.sum(axis=0)
        gram += part.T @ part
    return total, gram


def zscore_moments(
    user_rows: np.ndarray,
    item_factors: np.ndarray,
    total: np.ndarray,
    gram: np.ndarray,
    seen: sp.csr_matrix,
    seen_scores: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Exact mean and population std of each user's raw scores over their candidates.

    Parameters
    ----------
    user_rows
        ``(b, d)`` user factors of the block.
    item_factors
        ``(n, d)`` item factors.
    total, gram
        From :func:`item_moments`.
    seen
        ``(b, n)`` canonical CSR: the block's training items (not candidates).
    seen_scores
        The raw scores at ``seen``'s stored entries, in its order, when already known.

    Returns
    -------
    mean, std
        float64 arrays of length ``b``; ``std`` is 0 for constant rows and rows without candidates.
    """
    b, n = seen.shape
    rows = np.repeat(np.arange(b), np.diff(seen.indptr))
    user_rows = np.asarray(user_rows, dtype=np.float32)
    if seen_scores is None:
        # Seen scores in float32 (as the product computes them), summed in float64.
        seen_scores = np.einsum("kd,kd->k", user_rows[rows], np.asarray(item_factors[seen.indices], dtype=np.float32))
    s_seen = np.asarray(seen_scores, dtype=np.float64)
    u = user_rows.astype(np.float64)
    n_cand = n - np.diff(seen.indptr)
    count = np.maximum(n_cand, 1).astype(np.float64)
    s1 = u @ total - np.bincount(rows, weights=s_seen, minlength=b)
    s2 = np.einsum("bi,ij,bj->b", u, gram, u) - np.bincount(rows, weights=s_seen * s_seen, minlength=b)
    mean = s1 / count
    mean_sq = np.maximum(s2 / count, 0.0)
    var = mean_sq - mean * mean
    constant = (n_cand < 2) | (var <= _CONSTANT_RTOL * mean_sq)
    return mean, np.where(constant, 0.0, np.sqrt(np.maximum(var, 0.0)))


def blend_product(user_side: np.ndarray, item_side: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """``user_side @ item_side.T`` in float32 (the one place blended scores are multiplied out)."""
    return np.matmul(user_side, item_side.T, out=out)


class FactorBlend:
    """Sources, weights and normalizers of a blend, checked and prepared for chunked scoring.

    Parameters
    ----------
    sources
        Name -> fitted source. Low-rank sources with a linear normalizer (``"none"``,
        ``"zscore"``) go into the one product; the others (``"minmax"``, ``"rank"``, or a
        source that is not low-rank) are scored as blocks when ``allow_blocks``.
    weights
        Name -> weight >= 0 (zero-weight sources are never scored).
    normalizers
        One name for every source or a mapping per source.
    allow_blocks
        Accept sources that need a whole score block per chunk; ``False`` raises
        :class:`ConfigError` naming them (the candidate mode scores only candidates).

    Attributes
    ----------
    linear
        Names in the product, in the blend's order.
    blocks
        Names scored as normalized blocks.
    item_side
        ``(n_items, D)`` float32: the linear sources' item factors side by side.
    """

    def __init__(
        self,
        sources: Mapping[str, Any],
        weights: Mapping[str, float],
        normalizers: str | Mapping[str, str] = "zscore",
        *,
        allow_blocks: bool = True,
    ) -> None:
        from xrec.blend._base import check_sources

        self.sources = check_sources(sources)
        self.weights = check_weights(weights, self.sources)
        self.normalizers = check_normalizers(normalizers, self.sources)
        active = [n for n in self.sources if self.weights[n] > 0]
        self.linear = [
            n for n in active if getattr(self.sources[n], "is_low_rank", False) and self.normalizers[n] in LINEAR_NORMALIZERS
        ]
        self.blocks = [n for n in active if n not in self.linear]
        if self.blocks and not allow_blocks:
            detail = ", ".join(f"{n} ({self.normalizers[n]}, {type(self.sources[n]).__name__})" for n in self.blocks)
            raise ConfigError(
                f"normalizers: the candidate mode needs low-rank sources normalized with one of {list(LINEAR_NORMALIZERS)} "
                f"(exact statistics from the factors); not possible for: {detail}. Min-max and rank statistics need "
                "every item's score, so use the full-ranking evaluator for them"
            )
        self._factors = {n: _factors(n, self.sources[n]) for n in self.linear}
        sizes = {len(v) for _, v in self._factors.values()}
        if len(sizes) > 1:
            raise ConfigError(f"sources: item factors have different numbers of items {sorted(sizes)}")
        widths = np.cumsum([0] + [v.shape[1] for _, v in self._factors.values()])
        self._columns = {n: (int(widths[i]), int(widths[i + 1])) for i, n in enumerate(self.linear)}
        self._moments = {n: item_moments(v) for n, (_, v) in self._factors.items() if self.normalizers[n] == "zscore"}
        self.item_side = (
            np.ascontiguousarray(np.hstack([v for _, v in self._factors.values()]), dtype=np.float32)
            if self.linear
            else None
        )

    def factors(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        """User and item factors of a linear source."""
        return self._factors[name]

    def seen_scores(self, users: np.ndarray, seen: sp.csr_matrix) -> dict[str, np.ndarray]:
        """Raw float32 scores of every z-score source at ``seen``'s stored entries.

        One gather of the side-by-side item factors per step of users (a few MiB of
        scratch) serves every source.
        """
        names = [n for n in self.linear if self.normalizers[n] == "zscore"]
        if not names:
            return {}
        cols = {n: self._columns[n] for n in names}
        users_side = np.hstack([self._factors[n][0][users] for n in names]).astype(np.float32, copy=False)
        item_cols = np.concatenate([np.arange(*cols[n]) for n in names])
        offsets = np.r_[0, np.cumsum([cols[n][1] - cols[n][0] for n in names])]
        selector = np.zeros((len(item_cols), len(names)), dtype=np.float32)
        for j in range(len(names)):
            selector[offsets[j] : offsets[j + 1], j] = 1.0
        out = {n: np.empty(seen.nnz, dtype=np.float32) for n in names}
        counts = np.diff(seen.indptr)
        step = max(1, _SEEN_BYTES // (4 * len(item_cols) * max(1, int(counts.max(initial=1)))))
        for lo in range(0, len(users), step):
            hi = min(len(users), lo + step)
            a, z = seen.indptr[lo], seen.indptr[hi]
            items = self.item_side[seen.indices[a:z]]
            if len(item_cols) != self.item_side.shape[1]:
                items = items[:, item_cols]
            prod = items * np.repeat(users_side[lo:hi], counts[lo:hi], axis=0)
            sums = prod @ selector  # per-source sums of the products, one BLAS call
            for j, n in enumerate(names):
                out[n][a:z] = sums[:, j]
        return out

    def slopes(self, users: np.ndarray, seen: sp.csr_matrix) -> dict[str, np.ndarray]:
        """Per linear source, ``w_s · a_us`` (float64, >= 0) for the block's users."""
        out = {}
        seen_scores = self.seen_scores(users, seen)
        for name in self.linear:
            w = self.weights[name]
            if self.normalizers[name] == "none":
                out[name] = np.full(len(users), w)
                continue
            u, v = self._factors[name]
            _, std = zscore_moments(u[users], v, *self._moments[name], seen, seen_scores[name])
            out[name] = np.divide(w, std, out=np.zeros(len(users)), where=std > 0)
        return out

    def user_side(self, users: np.ndarray, slopes: Mapping[str, np.ndarray]) -> np.ndarray:
        """``(b, D)`` float32 user side of the product for the block's users."""
        parts = [self._factors[n][0][users] * slopes[n].astype(np.float32)[:, None] for n in self.linear]
        return np.ascontiguousarray(np.hstack(parts), dtype=np.float32)

    def user_norms(self, users: np.ndarray) -> dict[str, np.ndarray]:
        """Euclidean norm of each linear source's user factors (float64), for rounding bounds."""
        return {n: np.linalg.norm(np.asarray(self._factors[n][0][users], dtype=np.float64), axis=1) for n in self.linear}
