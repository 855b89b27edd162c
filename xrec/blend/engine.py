"""A blend evaluator for interactive weight search: normalize each source once, then re-rank fast.

:func:`xrec.evaluate.evaluate` on a :class:`~xrec.blend.Blend` scores, normalizes and ranks
every user from scratch. When only the weights change (a slider, a weight search) most of
that work is repeated. :class:`BlendEngine` does it once for a fixed set of users:

* each source's normalized scores are kept as one ``(n_users, n_items)`` block (float32,
  or float16 to halve memory and bandwidth at some accuracy cost), with the items each
  user saw in training set to ``-inf`` once, so they can never be counted above a target;
* a low-rank source with normalizer ``"none"`` may instead stay factorized
  (``user_factors_ @ item_factors_.T`` is recomputed chunk by chunk), for catalogs whose
  full block would not fit in memory;
* a weight vector is evaluated by summing ``w_s × block_s`` a few rows at a time (so the
  running sum stays in cache) and counting, per user, the candidates scoring at least as
  high as the held-out item with the evaluator's own counting core
  (:func:`xrec.evaluate.count_at_least`, :func:`xrec.evaluate.rank_heldout`), so the
  numbers are exactly those of ``evaluate(Blend(...), fold)`` with float32 blocks;
* :meth:`BlendEngine.set_weight` changes one weight by adding ``Δw × block`` to a kept
  sum, which costs one block read instead of one per source;
* when every user has one held-out item, a dominance shortcut (exact; the ``prune``
  setting of :class:`BlendEngine`) counts once, at prepare, the candidates that beat the
  held-out item in every source (they do so under any non-negative weights) and drops those
  that lose to it in every source; each weight vector then sums only the undecided
  candidates, and users with at least ``max(ks)`` always-above candidates not at all. On
  ml-latest-small with ALS, BPR, item-kNN and popularity this leaves about 2 % of the
  user × item cells (see ``benchmarks/bench_blend.py``).

Users can be all of a fold's evaluation users (final numbers) or a stratified sample
(:func:`sample_users`, strata by training activity) whose metric comes with a confidence
interval, for interactive use.

Layout: this module holds preparation and the public methods; the weight checks and summing
kernels are :class:`~xrec.blend._weighted_sum.WeightedSumKernels` and the dominance shortcut
:class:`~xrec.blend._dominance.DominancePruning`, both mixed into :class:`BlendEngine`;
user samples live in :mod:`xrec.evaluate._sampling`.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any, Self

import numpy as np
import pandas as pd
from threadpoolctl import ThreadpoolController, threadpool_limits
from tqdm.auto import tqdm

from xrec._validation import check_choice, check_fitted, check_int, parse_metric_column
from xrec.blend._dominance import DominancePruning
from xrec.blend._rank import Candidates
from xrec.blend._weighted_sum import WeightedSumKernels
from xrec.blend.blend import check_normalizers
from xrec.blend.normalize import normalize
from xrec.errors import ConfigError, DataError, NotFittedError
from xrec.evaluate._metrics import RANK_METRICS, check_cutoffs, check_metrics, metrics_from_ranks
from xrec.evaluate._ranking import BlockRanks, seen_flags
from xrec.evaluate._sampling import UserSample, sample_users
from xrec.evaluate._stats import normal_interval
from xrec.fold import Fold

__all__ = ["BlendEngine", "UserSample", "sample_users"]

_DTYPES = {"float32": np.float32, "float16": np.float16}
# Running-sum rows per step: about 256 KiB of float32, so the sum and its scratch stay in L2.
_SUM_BYTES = 1 << 18
# Users normalized together while preparing (bounds the raw-score scratch).
_PREPARE_ROWS = 1024


class BlendEngine(DominancePruning, WeightedSumKernels):
    """Evaluate many weight vectors of one blend on a fixed set of users, fast.

    Parameters
    ----------
    sources
        Name -> fitted source (fitted on ``fold.train``); the order is the summation order,
        as in :class:`~xrec.blend.Blend`.
    fold
        The fold to evaluate on (its training rows are the seen mask, its held-out rows
        the truth).
    normalizers
        One normalizer name for every source or a mapping per source (see
        :mod:`xrec.blend.normalize`); default ``"zscore"`` as in ``Blend``.
    users
        User indices to evaluate, a :class:`UserSample`, or ``None`` for every user with
        a held-out item.
    ks
        Cut-offs of the metrics.
    metrics
        Rank metrics to compute, among ``hit_rate, ndcg, recall, mrr``.
    metric
        The main metric, ``"<name>@<k>"``: what :meth:`score` returns and what weight
        searches maximize.
    dtype
        ``"float32"`` (exact: the numbers equal ``evaluate(Blend(...))``) or ``"float16"``
        (half the memory and bandwidth; ranks can differ where sums nearly tie).
    factorized
        Low-rank sources with normalizer ``"none"`` to keep as factors instead of a block:
        ``False`` (none), ``True`` (all that qualify), an iterable of names, or ``"auto"``
        (those whose block would exceed ``max_block_bytes``).
    max_block_bytes
        Budget per stored block for ``factorized="auto"``.
    threads
        BLAS threads for factor products and worker threads for the weighted sums
        (``numpy`` releases the GIL, so 2 threads split the users in two halves).
    chunk_rows
        Users per running-sum step; default fits the sum in about 256 KiB.
    prune
        Use the dominance shortcut for scalar weights (see :meth:`prepare`): ``"auto"``
        (when it applies and saves work), ``True`` (whenever it applies) or ``False``.

    Attributes
    ----------
    names_
        Source names, in summation order.
    users_
        Evaluated user indices, ascending.
    weights_
        Current weights (after :meth:`evaluate` or :meth:`set_weight`).
    blocks_
        Name -> ``(n_users, n_items)`` normalized block (``-inf`` at seen items), for stored sources.
    factors_
        Name -> ``(user_factors, item_factors)`` for factorized sources.
    pruned_
        Whether the dominance shortcut is in use (one held-out item per user, all sources
        stored, and with ``prune="auto"`` at most 15 % of the cells left undecided).

    Examples
    --------
    >>> engine = BlendEngine({"als": als, "pop": pop}, fold).prepare()       # doctest: +SKIP
    >>> engine.evaluate({"als": 0.7, "pop": 0.3})["ndcg@10"]              # doctest: +SKIP
    >>> engine.set_weight("pop", 0.5)                                        # doctest: +SKIP
    """

    def __init__(
        self,
        sources: Mapping[str, Any],
        fold: Fold,
        normalizers: str | Mapping[str, str] = "zscore",
        *,
        users: np.ndarray | UserSample | None = None,
        ks: Sequence[int] | int = (10,),
        metrics: Sequence[str] = RANK_METRICS,
        metric: str = "ndcg@10",
        dtype: str = "float32",
        factorized: bool | str | Iterable[str] = "auto",
        max_block_bytes: int = 2 << 30,
        threads: int = 1,
        chunk_rows: int | None = None,
        prune: bool | str = "auto",
    ) -> None:
        self.sources = sources
        self.fold = fold
        self.normalizers = normalizers
        self.users = users
        self.ks = ks
        self.metrics = metrics
        self.metric = metric
        self.dtype = dtype
        self.factorized = factorized
        self.max_block_bytes = max_block_bytes
        self.threads = threads
        self.chunk_rows = chunk_rows
        self.prune = prune

    # ------------------------------------------------------------------ preparation
    def _check_settings(self) -> None:
        from xrec.blend._base import check_sources

        if not isinstance(self.fold, Fold):
            raise ConfigError(f"fold must be an xrec Fold, got {type(self.fold).__name__}")
        self._sources = check_sources(self.sources)
        self._normalizers = check_normalizers(self.normalizers, self._sources)
        self._ks = check_cutoffs(self.ks, self.fold.n_items)  # K beyond the catalog: refused, not clamped
        metrics = check_metrics(self.metrics)
        bad = [m for m in metrics if m not in RANK_METRICS]
        if bad:
            raise ConfigError(f"metrics: the engine computes rank metrics {list(RANK_METRICS)} only, got {bad}")
        self._metrics = metrics
        self._main = parse_metric_column(self.metric, names=RANK_METRICS, ks=self._ks)
        if self._main[0] not in metrics:
            raise ConfigError(f"metric {self.metric!r} is not among the computed metrics {list(metrics)}")
        check_choice(self.dtype, "dtype", _DTYPES)
        check_int(self.threads, "threads", low=1)
        check_int(self.chunk_rows, "chunk_rows", low=1, allow_none=True)

    def _factorized_names(self, n_rows: int, n_items: int) -> set[str]:
        eligible = {
            n for n, s in self._sources.items() if getattr(s, "is_low_rank", False) and self._normalizers[n] == "none"
        }
        f = self.factorized
        if f is False:
            return set()
        if f is True:
            return eligible
        if isinstance(f, str):
            if f != "auto":
                raise ConfigError(f"factorized must be True, False, 'auto' or source names, got {f!r}")
            size = n_rows * n_items * np.dtype(_DTYPES[self.dtype]).itemsize
            return eligible if size > self.max_block_bytes else set()
        names = set(f)
        unknown = names - set(self._sources)
        if unknown:
            raise ConfigError(f"factorized: {sorted(unknown)} are not sources; sources are {list(self._sources)}")
        bad = names - eligible
        if bad:
            raise ConfigError(
                f"factorized: {sorted(bad)} cannot stay factorized (needs a low-rank source with normalizer 'none': "
                "only raw scores are linear in the factors)"
            )
        return names

    def prepare(self, progress: bool = False) -> Self:
        """Score and normalize every source once for the engine's users; returns ``self``.

        Parameters
        ----------
        progress
            Show a progress bar over user chunks.
        """
        self._check_settings()
        fold = self.fold
        if isinstance(self.users, UserSample):
            users = self.users.users
        elif self.users is None:
            users = fold.eval_users
        else:
            users = np.asarray(self.users)
            if users.ndim != 1 or (users.size and users.dtype.kind not in "iu"):
                raise DataError(f"users must be a 1-D array of user indices, got dtype {users.dtype} shape {users.shape}")
        users = np.asarray(users, dtype=np.int64)
        if users.size == 0:
            raise DataError("no users to evaluate (none has a held-out item)")
        if np.any(np.diff(users) <= 0):
            users = np.unique(users)
        if users[0] < 0 or users[-1] >= fold.n_users:
            raise DataError(f"user indices out of range [0, {fold.n_users})")
        n_rel_all = np.diff(fold.heldout_matrix.indptr)
        empty = users[n_rel_all[users] == 0]
        if empty.size:
            raise DataError(f"{empty.size} users have no held-out items, first: {empty[:5].tolist()}")
        n_rows, n_items = len(users), fold.n_items
        seen = fold.train_matrix[users]
        truth = fold.heldout_matrix[users]
        seen.sort_indices()
        truth.sort_indices()
        factorized = self._factorized_names(n_rows, n_items)
        dtype = _DTYPES[self.dtype]

        blocks: dict[str, np.ndarray] = {n: np.empty((n_rows, n_items), dtype=dtype) for n in self._sources if n not in factorized}
        factors: dict[str, tuple[np.ndarray, np.ndarray]] = {}
        for name in factorized:
            src = self._sources[name]
            factors[name] = (
                np.ascontiguousarray(np.asarray(src.user_factors_)[users], dtype=np.float32),
                np.ascontiguousarray(np.asarray(src.item_factors_, dtype=np.float32).T),
            )
        starts = range(0, n_rows, _PREPARE_ROWS)
        with threadpool_limits(self.threads, "blas"):
            for lo in tqdm(starts, desc="preparing blend blocks", unit="chunk", disable=not progress):
                hi = min(lo + _PREPARE_ROWS, n_rows)
                cand = Candidates.from_seen(seen[lo:hi], hi - lo, n_items)
                for name, block in blocks.items():
                    raw = np.asarray(self._sources[name].score(users[lo:hi]))
                    if raw.shape != (hi - lo, n_items):
                        raise DataError(f"source {name!r} returned scores of shape {raw.shape}, expected {(hi - lo, n_items)}")
                    out = normalize(raw, self._normalizers[name], candidates=cand)
                    out[cand.seen_rows, cand.seen_cols] = -np.inf
                    block[lo:hi] = out

        n_rel = np.diff(truth.indptr)
        single = n_rel == 1
        target = np.full(n_rows, -1, dtype=np.int64)
        target[single] = truth.indices[truth.indptr[:-1][single]]
        # A held-out item the user already saw is never a candidate: it is a miss.
        seen_flag = np.zeros(n_rows, dtype=bool)
        rows_single = np.flatnonzero(single)
        if len(rows_single):
            seen_flag[rows_single] = seen_flags(seen, rows_single, target[rows_single], n_items)
        self.names_ = list(self._sources)
        self.users_ = users
        self.blocks_ = blocks
        self.factors_ = factors
        self._seen = seen
        self._truth = truth
        self._n_items = n_items
        self._single = single & ~seen_flag
        self._single_unreachable = single & seen_flag
        self._target = np.where(self._single, target, 0)
        self._multi = np.flatnonzero(~single)
        self._n_cand = (n_items - np.diff(seen.indptr)).astype(np.int64)
        self._seen_rows = np.repeat(np.arange(n_rows, dtype=np.int64), np.diff(seen.indptr))
        self._step = int(self.chunk_rows or max(1, _SUM_BYTES // (4 * max(n_items, 1))))
        self._blas = ThreadpoolController() if factors else None
        self._half_table = np.arange(1 << 16, dtype=np.uint16).view(np.float16).astype(np.float32) if dtype == np.float16 else None
        self._sum: np.ndarray | None = None
        self._sum_weights: dict[str, float] | None = None
        self.weights_: dict[str, float | np.ndarray] | None = None
        self._last: dict[str, np.ndarray] | None = None
        self._build_pruning(progress)
        self.prepared_ = True
        return self


    # ------------------------------------------------------------------ weights
    def _check_prepared(self) -> None:
        check_fitted(self, attribute="prepared_", message="BlendEngine is not prepared: call prepare() first")


    def _per_user(self, ranks: np.ndarray) -> dict[str, np.ndarray]:
        br = BlockRanks(self._truth.indptr.astype(np.int64), self._truth.indices.astype(np.int64), ranks, self._n_cand)
        return metrics_from_ranks(br, self._ks, self._metrics)

    def _means(self, per_user: dict[str, np.ndarray]) -> dict[str, float]:
        if isinstance(self.users, UserSample):
            return {col: self.users.estimate(v)[0] for col, v in per_user.items()}
        return {col: float(np.mean(v)) for col, v in per_user.items()}

    # ------------------------------------------------------------------ public
    @property
    def seen_(self) -> Any:
        """Training rows of the engine's users (CSR; row ``r`` is user ``users_[r]``): what each has seen."""
        return self._seen

    @property
    def truth_(self) -> Any:
        """Held-out rows of the engine's users (CSR with sorted indices, aligned with ``users_``)."""
        return self._truth

    def evaluate(self, weights: Mapping[str, Any] | Sequence[float]) -> dict[str, float]:
        """Mean of every metric over the engine's users for ``weights`` (full recomputation).

        Parameters
        ----------
        weights
            Name -> weight >= 0 (a number, or an ``(n_items,)`` vector for per-item weights),
            a sequence in source order, or a fitted ``Blend`` / ``GatedBlend`` (its
            ``item_weights()``; sources it lacks get 0). Weights are used as given (not
            rescaled), like ``Blend``.

        Returns
        -------
        dict
            ``"metric@K"`` -> mean (the stratified estimate when ``users`` is a
            :class:`UserSample`).
        """
        self._check_prepared()
        w = self._check_weights(weights)
        ranks = self._run_pruned(w)
        self._last = self._per_user(self._run(w) if ranks is None else ranks)
        self.weights_ = w
        return self._means(self._last)

    def score(self, weights: Mapping[str, Any] | Sequence[float]) -> float:
        """The main metric (``metric``) for ``weights``."""
        return self.evaluate(weights)[f"{self._main[0]}@{self._main[1]}"]

    def per_user(self, weights: Mapping[str, Any] | Sequence[float] | None = None) -> pd.DataFrame:
        """Per-user metrics for ``weights`` (default: the last weights evaluated).

        Returns
        -------
        pandas.DataFrame
            Column ``user`` then one column per ``"metric@K"``, as ``Scorecard.per_user``.
        """
        self._check_prepared()
        if weights is not None:
            self.evaluate(weights)
        if self._last is None:
            raise NotFittedError("no weights evaluated yet: pass weights")
        order = [f"{m}@{k}" for m in self._metrics for k in self._ks]
        return pd.DataFrame({"user": self.users_, **{c: self._last[c] for c in order}})

    def scorecard(self, weights: Mapping[str, Any] | Sequence[float], name: str = "blend") -> Any:
        """A :class:`~xrec.evaluate.Scorecard` of ``weights`` (rank metrics only), for ``compare``."""
        from xrec.evaluate.scorecard import Scorecard

        return Scorecard(
            name=name,
            per_user=self.per_user(weights),
            ks=self._ks,
            protocol={"kind": "full_ranking"},
            fold_settings=dict(self.fold.settings),
            n_items=self._n_items,
        )

    def interval(self, weights: Mapping[str, Any] | Sequence[float] | None = None, metric: str | None = None, level: float = 0.95) -> tuple[float, float, float]:
        """``(mean, low, high)`` of a metric: stratified when sampling users, else a normal interval over users."""
        frame = self.per_user(weights)
        col = metric or f"{self._main[0]}@{self._main[1]}"
        if col not in frame:
            raise ConfigError(f"metric {col!r} is not computed; computed: {list(frame.columns[1:])}")
        values = frame[col].to_numpy()
        if isinstance(self.users, UserSample):
            return self.users.estimate(values, level)
        return normal_interval(values, level)

    def set_weight(self, name: str, weight: float) -> dict[str, float]:
        """Change one source's weight and re-rank by adding ``Δw × block`` to the kept sum.

        The first call computes and keeps the full sum for the current weights (one extra
        ``(n_users, n_items)`` float32 array). Results equal a full :meth:`evaluate` up to
        float rounding of the running sum (exactly equal rankings are not guaranteed where
        two sums differ by a rounding error). When the dominance shortcut applies (see
        ``prune``), re-ranking the undecided candidates is cheaper and exact, and is used
        instead (no sum is kept).

        Returns
        -------
        dict
            Metric means for the new weights.
        """
        self._check_prepared()
        if name not in self._sources:
            raise ConfigError(f"set_weight: {name!r} is not a source; sources are {self.names_}")
        if self.weights_ is None:
            raise NotFittedError("set_weight needs starting weights: call evaluate(weights) first")
        if any(isinstance(w, np.ndarray) for w in self.weights_.values()):
            raise ConfigError("set_weight works on scalar weights; evaluate per-item weight vectors with evaluate()")
        new = dict(self.weights_)
        new[name] = weight
        new = self._check_weights(new)
        pruned = self._run_pruned(new)
        if pruned is not None:
            # Re-ranking only the undecided candidates is cheaper than any dense update.
            self.weights_ = new
            self._last = self._per_user(pruned)
            return self._means(self._last)
        if self._sum is None or self._sum_weights != self.weights_:
            self._run(self.weights_, keep_sum=True)
            self._sum_weights = dict(self.weights_)
        dw = float(new[name]) - float(self.weights_[name])
        if dw == 0.0 and self._last is not None:
            return self._means(self._last)
        ranks = self._run(new, delta=(name, dw))
        self._sum_weights = dict(new)
        self.weights_ = new
        self._last = self._per_user(ranks)
        return self._means(self._last)

    def heldout_ranks(self, weights: Mapping[str, Any] | Sequence[float]) -> pd.DataFrame:
        """Rank of every held-out item for ``weights``: columns ``user``, ``item``, ``rank``.

        ``rank`` is 1-based with the evaluator's tie rule; a held-out item the user saw in
        training has rank :data:`xrec.evaluate.UNRANKED`.
        """
        self._check_prepared()
        ranks = self._run(self._check_weights(weights))
        users = np.repeat(self.users_, np.diff(self._truth.indptr))
        return pd.DataFrame({"user": users, "item": self._truth.indices.astype(np.int64), "rank": ranks})

    def current_sum(self) -> np.ndarray | None:
        """The kept running sum (``(n_users, n_items)``, ``-inf``/NaN at seen items), or ``None``."""
        return self._sum

    def blended(self, weights: Mapping[str, Any] | Sequence[float], rows: np.ndarray | None = None) -> np.ndarray:
        """Blended scores of some engine rows (positions in ``users_``) by full recomputation."""
        self._check_prepared()
        w = self._check_weights(weights)
        rows = np.arange(len(self.users_)) if rows is None else np.asarray(rows)
        out = np.empty((len(rows), self._n_items), dtype=np.float32)
        tmp = np.empty_like(out[:1])
        with np.errstate(invalid="ignore"):
            for i, r in enumerate(rows):
                self._weighted_sum(self._terms(w), int(r), int(r) + 1, out[i : i + 1], tmp)
        return out

    def pair_values(self, rows: np.ndarray, items: np.ndarray) -> np.ndarray:
        """Normalized score of each source at ``(rows[k], items[k])``: ``(len(rows), n_sources)`` float32.

        Seen items read ``-inf`` in stored sources.
        """
        self._check_prepared()
        rows = np.asarray(rows, dtype=np.int64)
        items = np.asarray(items, dtype=np.int64)
        out = np.empty((len(rows), len(self.names_)), dtype=np.float32)
        for j, name in enumerate(self.names_):
            block = self.blocks_.get(name)
            if block is not None:
                out[:, j] = block[rows, items]
            else:
                uf, vt = self.factors_[name]
                out[:, j] = np.einsum("ij,ji->i", uf[rows], vt[:, items])
        return out

    @property
    def nbytes(self) -> int:
        """Memory held by blocks, factors and the running sum."""
        total = sum(b.nbytes for b in self.blocks_.values()) + sum(u.nbytes + v.nbytes for u, v in self.factors_.values())
        return total + (self._sum.nbytes if self._sum is not None else 0)
