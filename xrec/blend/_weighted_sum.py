"""Weight checking and the weighted-sum kernels of :class:`~xrec.blend.BlendEngine`.

A weight vector is evaluated by summing ``w_s × block_s`` a few rows at a time (so the
running sum stays in cache) and counting, per user, the candidates scoring at least as high
as the held-out item with the evaluator's own counting core. :class:`WeightedSumKernels` is
that part of the engine; it reads the prepared engine's blocks, factors and truth layout.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from numbers import Real
from typing import Any

import numpy as np

from xrec.errors import ConfigError
from xrec.evaluate._ranking import UNRANKED, count_at_least, rank_heldout

__all__ = ["WeightedSumKernels"]


class WeightedSumKernels:
    """Engine methods that check weights and rank by weighted sums; mixed into :class:`~xrec.blend.BlendEngine`."""

    def _check_weights(self, weights: Mapping[str, Any] | Sequence[float] | np.ndarray) -> dict[str, float | np.ndarray]:
        """One non-negative weight (number or ``(n_items,)`` vector) per source, in source order."""
        item_weights = getattr(weights, "item_weights", None)
        if callable(item_weights):
            # A fitted Blend / GatedBlend over (some of) these sources: its own per-item weights.
            given = item_weights()
            weights = {n: given.get(n, 0.0) for n in self.names_} | {n: w for n, w in given.items() if n not in self.names_}
        if not isinstance(weights, Mapping):
            values = np.asarray(weights, dtype=np.float64)
            if values.shape != (len(self.names_),):
                raise ConfigError(f"weights: expected a mapping or {len(self.names_)} numbers (one per source {self.names_})")
            weights = dict(zip(self.names_, values.tolist(), strict=True))
        unknown = [n for n in weights if n not in self._sources]
        if unknown:
            raise ConfigError(f"weights: {unknown} are not sources of this engine; its sources are {self.names_}")
        missing = [n for n in self.names_ if n not in weights]
        if missing:
            raise ConfigError(f"weights: no weight for source(s) {missing} (give 0 to leave a source out)")
        out: dict[str, float | np.ndarray] = {}
        for name in self.names_:
            w = weights[name]
            if isinstance(w, np.ndarray) and w.ndim == 1:
                if w.shape != (self._n_items,):
                    raise ConfigError(f"weights.{name}: a per-item weight vector needs {self._n_items} entries, got {w.shape}")
                if not np.all(np.isfinite(w)) or np.any(w < 0):
                    raise ConfigError(f"weights.{name}: per-item weights must be finite and >= 0")
                out[name] = w.astype(np.float32)
                continue
            if isinstance(w, (bool, np.bool_)) or not isinstance(w, (Real, np.floating, np.integer)):
                raise ConfigError(f"weights.{name}: must be a number, got {w!r}")
            w = float(w)
            if not math.isfinite(w) or w < 0:
                raise ConfigError(f"weights.{name}: must be a finite number >= 0, got {w!r}")
            out[name] = w
        if not any(np.any(np.asarray(w) > 0) for w in out.values()):
            raise ConfigError(f"weights: all weights are zero; at least one source needs a positive weight ({out})")
        return out

    # ------------------------------------------------------------------ kernels
    def _source_rows(self, name: str, lo: int, hi: int) -> np.ndarray:
        block = self.blocks_.get(name)
        if block is not None:
            return block[lo:hi]
        uf, vt = self.factors_[name]
        return uf[lo:hi] @ vt

    def _mask_rows(self, out: np.ndarray, lo: int, hi: int) -> None:
        a, b = self._seen.indptr[lo], self._seen.indptr[hi]
        out[self._seen_rows[a:b] - lo, self._seen.indices[a:b]] = -np.inf

    def _widen(self, rows: np.ndarray, out: np.ndarray) -> np.ndarray:
        """float16 rows as float32 in ``out``, through a table of all 65,536 float16 values
        (exact, and several times faster than numpy's own float16 cast here)."""
        np.take(self._half_table, rows.view(np.uint16), out=out)
        return out

    def _terms(self, weights: dict[str, float | np.ndarray]) -> list[tuple[str, np.ndarray]]:
        """``(name, float32 weight)`` of the sources that take part (some weight > 0), in order."""
        return [(n, np.asarray(weights[n], dtype=np.float32)) for n in self.names_ if np.any(np.asarray(weights[n]) > 0)]

    def _weighted_sum(
        self, terms: list[tuple[str, np.ndarray]], lo: int, hi: int, out: np.ndarray, tmp: np.ndarray, conv: np.ndarray | None = None
    ) -> None:
        """``out = Σ_s w_s · block_s[lo:hi]`` in float32, in the same operation order as ``Blend.score``.

        Call under ``np.errstate(invalid="ignore")``: a zero per-item weight times a seen
        item's ``-inf`` is NaN, which is never counted either.
        """
        any_block = False
        for i, (name, w32) in enumerate(terms):
            rows = self._source_rows(name, lo, hi)
            if rows.dtype != np.float32:
                conv = np.empty(rows.shape, np.float32) if conv is None else conv[: hi - lo]
                rows = self._widen(rows, conv)
            any_block |= name in self.blocks_
            if i == 0:
                np.multiply(rows, w32, out=out)
            else:
                np.multiply(rows, w32, out=tmp)
                np.add(out, tmp, out=out)
        if not any_block:
            self._mask_rows(out, lo, hi)

    def _rank_rows(self, acc: np.ndarray, lo: int, hi: int, ranks: np.ndarray) -> None:
        """Ranks of the single-target rows ``lo:hi`` from their summed scores ``acc``."""
        single = self._single[lo:hi]
        if not single.any():
            return
        local = np.arange(hi - lo)
        targets = acc[local, self._target[lo:hi]]
        targets = np.where(single, targets, np.nan)
        # The target counts itself once: count = 1 + candidates placed above it.
        counts = count_at_least(acc, None, targets)
        idx = self._truth.indptr[lo:hi][single]
        ranks[idx] = np.where(np.isneginf(targets[single]), UNRANKED, counts[single])

    def _rank_multi(self, acc: np.ndarray, rows: np.ndarray, ranks: np.ndarray) -> None:
        """Ranks of rows with several held-out items, by the evaluator's general path."""
        if len(rows) == 0:
            return
        br = rank_heldout(acc, self._seen[rows], self._truth[rows])
        starts = self._truth.indptr[rows]
        pos = np.repeat(starts, np.diff(br.indptr)) + (np.arange(len(br.items)) - np.repeat(br.indptr[:-1], np.diff(br.indptr)))
        ranks[pos] = br.ranks

    def _run(self, weights: dict[str, float | np.ndarray], *, delta: tuple[str, float] | None = None, keep_sum: bool = False) -> np.ndarray:
        """Ranks of every held-out item (aligned with the truth CSR) for ``weights``.

        With ``delta=(name, dw)`` the kept running sum is updated in place by ``dw × block``
        instead of being recomputed; with ``keep_sum`` the full sum is stored for later deltas.
        """
        n_rows, n_items = len(self.users_), self._n_items
        ranks = np.full(len(self._truth.indices), UNRANKED, dtype=np.int64)
        step = self._step
        multi_set = np.zeros(n_rows, dtype=bool)
        multi_set[self._multi] = True
        if keep_sum and self._sum is None:
            self._sum = np.empty((n_rows, n_items), dtype=np.float32)
        terms = self._terms(weights)

        def work(lo_all: int, hi_all: int) -> None:
            tmp = np.empty((step, n_items), dtype=np.float32)
            own = np.empty((step, n_items), dtype=np.float32)
            conv = np.empty((step, n_items), dtype=np.float32) if self.dtype != "float32" else None
            multi_rows: list[int] = []
            multi_acc: list[np.ndarray] = []
            for lo in range(lo_all, hi_all, step):
                hi = min(lo + step, hi_all)
                m = hi - lo
                if delta is not None:
                    acc = self._sum[lo:hi]
                    name, dw = delta
                    rows = self._source_rows(name, lo, hi)
                    if conv is not None and rows.dtype != np.float32:
                        rows = self._widen(rows, conv[:m])
                    # -inf × dw and -inf + inf at seen items give NaN, which is never counted.
                    np.multiply(rows, np.float32(dw), out=tmp[:m])
                    np.add(acc, tmp[:m], out=acc)
                else:
                    acc = self._sum[lo:hi] if keep_sum else own[:m]
                    self._weighted_sum(terms, lo, hi, acc, tmp[:m], conv)
                self._rank_rows(acc, lo, hi, ranks)
                if multi_set[lo:hi].any():
                    local = np.flatnonzero(multi_set[lo:hi])
                    multi_rows.extend((local + lo).tolist())
                    multi_acc.append(acc[local].copy())
                    if sum(len(a) for a in multi_acc) >= 256:
                        self._rank_multi(np.concatenate(multi_acc), np.asarray(multi_rows), ranks)
                        multi_rows, multi_acc = [], []
            if multi_acc:
                self._rank_multi(np.concatenate(multi_acc), np.asarray(multi_rows), ranks)

        def guarded(lo_all: int, hi_all: int) -> None:
            with np.errstate(invalid="ignore"):
                work(lo_all, hi_all)

        # Limiting BLAS threads only matters for factor products; the limiter itself costs
        # milliseconds, so it is skipped when every source is stored.
        limit = self._blas.limit(limits=1 if self.threads > 1 else self.threads, user_api="blas") if self.factors_ else None
        try:
            if self.threads > 1 and n_rows >= 2 * step:
                from concurrent.futures import ThreadPoolExecutor

                bounds = np.linspace(0, n_rows, self.threads + 1).astype(int)
                with ThreadPoolExecutor(self.threads) as pool:
                    list(pool.map(lambda i: guarded(bounds[i], bounds[i + 1]), range(self.threads)))
            else:
                guarded(0, n_rows)
        finally:
            if limit is not None:
                limit.restore_original_limits()
        return ranks
