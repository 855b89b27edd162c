"""Collaborative sources: matrix factorization (ALS, BPR from ``implicit``) and item-kNN."""

from __future__ import annotations

from typing import Self

import numpy as np
import scipy.sparse as sp
from threadpoolctl import threadpool_limits
from tqdm.auto import tqdm

from xrec._validation import check_int, check_number
from xrec.errors import DataError, XrecError
from xrec.fold import Fold
from xrec.sources.base import LowRankSource, Source


def _check_positive(kind: str, **values: float) -> None:
    for name, value in values.items():
        check_number(value, f"{kind} setting {name!r}", low=0, low_open=True, expected="a positive number")


def _check_count(kind: str, **values: int) -> None:
    for name, value in values.items():
        check_int(value, f"{kind} setting {name!r}", low=1, expected="an integer >= 1")


def _check_non_negative(kind: str, **values: float) -> None:
    for name, value in values.items():
        check_number(value, f"{kind} setting {name!r}", low=0, expected=">= 0")


def _factors(model_factors: np.ndarray, user_items: sp.csr_matrix) -> np.ndarray:
    """User factors as float32, zero for users without training rows.

    Those rows were never fitted (BPR leaves its random start, ALS a near-zero
    solve), so a zero row gives such users a flat, seed-independent score.
    """
    out = np.array(model_factors, dtype=np.float32, order="C", copy=True)
    out[np.diff(user_items.indptr) == 0] = 0.0
    return out


_BLOCK_ENTRIES = 1 << 23  # dense similarity entries per block (~32 MB float32)


def _cosine_item_similarity(user_items: sp.csr_matrix, k: int, *, chunk_size: int, progress: bool = False) -> sp.csr_matrix:
    """Items × items cosine of the columns of ``user_items``, top ``k`` per row, zero diagonal.

    Rows are computed a block at a time as dense arrays (at most ``chunk_size`` rows and about
    ``_BLOCK_ENTRIES`` entries), where a partial sort per row is far cheaper than sorting the
    sparse entries. Among equal similarities at the cut, which ones are kept is fixed for given
    input but otherwise unspecified.
    """
    n_items = user_items.shape[1]
    squares = np.asarray(user_items.multiply(user_items).sum(axis=0), dtype=np.float64).ravel()
    norms = np.sqrt(squares)
    inverse = np.divide(1.0, norms, out=np.zeros_like(norms), where=norms > 0)
    normalized = (user_items.astype(np.float64) @ sp.diags(inverse)).astype(np.float32).tocsc()
    normalized_t = normalized.T.tocsr()
    rows_per_block = max(1, min(chunk_size, _BLOCK_ENTRIES // max(n_items, 1)))
    keep = min(k, max(n_items - 1, 0))
    blocks = []
    starts = range(0, n_items, rows_per_block)
    for start in tqdm(starts, desc="item similarity", unit="block", disable=not progress):
        stop = min(start + rows_per_block, n_items)
        dense = (normalized_t[start:stop] @ normalized).toarray()
        local = np.arange(stop - start)
        dense[local, local + start] = 0.0  # an item is not its own neighbour
        if keep == 0:
            blocks.append(sp.csr_matrix((stop - start, n_items), dtype=np.float32))
            continue
        # selecting the smallest of the negated values is several times faster than the largest
        # of the originals when most entries are zero (introselect and many ties)
        top = np.argpartition(-dense, keep - 1, axis=1)[:, :keep]
        values = np.take_along_axis(dense, top, axis=1)
        block = sp.csr_matrix((values.ravel(), (np.repeat(local, top.shape[1]), top.ravel())), shape=dense.shape, dtype=np.float32)
        block.eliminate_zeros()
        blocks.append(block)
    if not blocks:
        return sp.csr_matrix((n_items, n_items), dtype=np.float32)
    out = sp.vstack(blocks, format="csr").astype(np.float32)
    out.sort_indices()
    return out


class _ImplicitSource(LowRankSource):
    """Shared fit of the ``implicit`` factorizations (no ``kind``, so never registered).

    Subclasses store ``factors``, ``regularization``, ``iterations``, ``random_state`` and
    ``progress``, check their own settings, then call :meth:`_fit_model`.
    """

    def _fit_model(self, fold: Fold, model_class: type, *, binarize: bool, **extra: object) -> Self:
        """Fit ``model_class`` on a copy of ``fold.train_matrix`` and store its factors.

        Raises :class:`DataError` naming the source kind when the training strengths
        (weights × ``alpha``) are too large for float32 arithmetic, and when ``implicit``
        fails or returns non-finite factors (with the library's message and the weights' range).
        """
        matrix = fold.train_matrix.copy()
        if binarize:
            matrix.data[:] = 1.0
        _check_strength_scale(self.kind, matrix.data, float(extra.get("alpha", 1.0)))
        # the constructor checks the BLAS thread count too, so it sits inside the limit
        try:
            with threadpool_limits(1, "blas"):
                model = model_class(
                    factors=int(self.factors),
                    regularization=float(self.regularization),
                    iterations=int(self.iterations),
                    random_state=int(self.random_state),
                    dtype=np.float32,
                    **extra,
                )
                model.fit(matrix, show_progress=bool(self.progress))
            user_factors, item_factors = model.user_factors, model.item_factors
        except XrecError:
            raise
        except Exception as exc:  # implicit's ModelFitError, numerical errors of its solvers
            raise DataError(f"{self.kind}: the factorization failed: {exc}{_strength_hint(matrix.data)}") from exc
        if not (np.isfinite(user_factors).all() and np.isfinite(item_factors).all()):
            raise DataError(f"{self.kind}: the factorization produced non-finite factors{_strength_hint(matrix.data)}")
        self.user_factors_ = _factors(user_factors, matrix)
        self.item_factors_ = np.ascontiguousarray(item_factors, dtype=np.float32)
        self.fitted_ = True
        return self


#: Largest training strength (weight × alpha) a factorization accepts: its square must be a
#: finite float32 (sqrt of float32's largest value, about 1.8e19).
MAX_STRENGTH = float(np.sqrt(np.finfo(np.float32).max))


def _check_strength_scale(kind: str, weights: np.ndarray, alpha: float) -> None:
    if weights.size == 0:
        return
    top = float(np.max(np.abs(weights.astype(np.float64)))) * alpha
    if not top <= MAX_STRENGTH:
        raise DataError(
            f"{kind}: training weights × alpha reach {top:.3g}, whose square overflows float32 (largest "
            f"usable strength {MAX_STRENGTH:.3g}); rescale the weights (e.g. log1p or divide by their maximum) or lower alpha"
        )


def _strength_hint(weights: np.ndarray) -> str:
    if weights.size == 0:
        return ""
    return (
        f" (training weights range from {float(weights.min()):.3g} to {float(weights.max()):.3g}; very large or "
        "very spread weights make the solves ill-conditioned: rescale them, e.g. log1p, or lower alpha)"
    )


class ALSSource(_ImplicitSource):
    """Implicit-feedback ALS (Hu, Koren & Volinsky, ICDM 2008) via ``implicit``.

    Parameters
    ----------
    factors
        Latent dimension ``d``.
    regularization
        L2 penalty on the factors.
    iterations
        Alternating sweeps.
    alpha
        Confidence scaling: each training weight is multiplied by ``alpha`` before fitting.
    use_weights
        Use the training weights (e.g. ratings) as strengths; ``False`` sets every
        training interaction to 1 before the ``alpha`` scaling.
    random_state
        Seed of the factor initialization. The fit is deterministic for a seed, whatever
        the thread count (each user / item row is solved independently).
    num_threads
        Threads for ``implicit``'s solver; 0 uses every core. On a busy machine 1 can be
        faster (idle-thread waits); the factors do not depend on it.
    progress
        Show ``implicit``'s progress bar.

    Attributes
    ----------
    user_factors_
        ``(n_users, factors)`` float32; users without training rows get a zero row.
    item_factors_
        ``(n_items, factors)`` float32.
    """

    kind = "als"

    def __init__(
        self,
        factors: int = 64,
        regularization: float = 0.01,
        iterations: int = 15,
        alpha: float = 1.0,
        use_weights: bool = True,
        random_state: int = 0,
        num_threads: int = 0,
        progress: bool = False,
    ) -> None:
        self.factors = factors
        self.regularization = regularization
        self.iterations = iterations
        self.alpha = alpha
        self.use_weights = use_weights
        self.random_state = random_state
        self.num_threads = num_threads
        self.progress = progress

    def fit(self, fold: Fold) -> Self:
        """Factorize ``fold.train_matrix``; returns ``self``."""
        from implicit.cpu.als import AlternatingLeastSquares

        _check_count("als", factors=self.factors, iterations=self.iterations)
        _check_positive("als", alpha=self.alpha)
        check_int(self.num_threads, "als setting 'num_threads'", low=0)
        _check_non_negative("als", regularization=self.regularization)
        return self._fit_model(
            fold,
            AlternatingLeastSquares,
            binarize=not self.use_weights,
            alpha=float(self.alpha),
            num_threads=int(self.num_threads),
        )


class BPRSource(_ImplicitSource):
    """Bayesian personalized ranking (Rendle et al., UAI 2009) via ``implicit``.

    Training interactions are positives (weights ignored); unobserved items are sampled
    as negatives. Runs on one thread so that a seed gives the same factors every time.

    Parameters
    ----------
    factors
        Latent dimension ``d``; ``implicit`` appends an item-bias column, so the factor
        matrices have ``factors + 1`` columns.
    learning_rate
        SGD step size.
    regularization
        L2 penalty on the factors.
    iterations
        Epochs over the training positives.
    random_state
        Seed of initialization and negative sampling.
    progress
        Show ``implicit``'s progress bar.

    Attributes
    ----------
    user_factors_
        ``(n_users, factors + 1)`` float32 (last column 1); zero rows for users without
        training rows.
    item_factors_
        ``(n_items, factors + 1)`` float32 (last column the item bias).
    """

    kind = "bpr"

    def __init__(
        self,
        factors: int = 64,
        learning_rate: float = 0.01,
        regularization: float = 0.01,
        iterations: int = 100,
        random_state: int = 0,
        progress: bool = False,
    ) -> None:
        self.factors = factors
        self.learning_rate = learning_rate
        self.regularization = regularization
        self.iterations = iterations
        self.random_state = random_state
        self.progress = progress

    def fit(self, fold: Fold) -> Self:
        """Fit on the binarized ``fold.train_matrix``; returns ``self``."""
        from implicit.cpu.bpr import BayesianPersonalizedRanking

        _check_count("bpr", factors=self.factors, iterations=self.iterations)
        _check_positive("bpr", learning_rate=self.learning_rate)
        _check_non_negative("bpr", regularization=self.regularization)
        return self._fit_model(
            fold,
            BayesianPersonalizedRanking,
            binarize=True,
            learning_rate=float(self.learning_rate),
            num_threads=1,  # multithreaded sampling races: not reproducible for a seed
        )


class ItemKNNSource(Source):
    """Item-based nearest neighbours with cosine similarity (Sarwar et al., WWW 2001).

    ``similarity_[i, j]`` is the cosine between the training columns of items ``i`` and
    ``j``, kept only for the ``neighbors`` most similar ``j`` of each ``i`` (self excluded).
    A user's score is their training row times ``similarity_``.

    Parameters
    ----------
    neighbors
        Neighbours kept per item.
    binarize
        Treat every training interaction as 1 (for similarity and for scoring).
    chunk_size
        Users per block while scoring, and at most this many items per block while
        computing similarities (blocks also stay near 8 million dense entries); bounds memory.
    progress
        Show a progress bar over similarity blocks.

    Attributes
    ----------
    similarity_
        Items × items CSR (float32), at most ``neighbors`` entries per row.
    user_items_
        The training matrix used for scoring (binarized when asked).
    """

    kind = "item_knn"

    def __init__(self, neighbors: int = 100, binarize: bool = False, chunk_size: int = 2048, progress: bool = False) -> None:
        self.neighbors = neighbors
        self.binarize = binarize
        self.chunk_size = chunk_size
        self.progress = progress

    def fit(self, fold: Fold) -> Self:
        """Compute the pruned item-item cosine similarity; returns ``self``."""
        _check_count("item_knn", neighbors=self.neighbors, chunk_size=self.chunk_size)
        matrix = fold.train_matrix.copy()
        if self.binarize:
            matrix.data[:] = 1.0
        self.user_items_ = matrix
        self.similarity_ = _cosine_item_similarity(
            matrix, int(self.neighbors), chunk_size=int(self.chunk_size), progress=bool(self.progress)
        )
        self.fitted_ = True
        return self

    def score(self, users: np.ndarray) -> np.ndarray:
        """Training rows of ``users`` times ``similarity_``: float32 ``(len(users), n_items)``."""
        self._check_fitted()
        users = np.asarray(users, dtype=np.int64)
        out = np.empty((len(users), self.similarity_.shape[1]), dtype=np.float32)
        step = int(self.chunk_size)
        for start in range(0, len(users), step):
            block = self.user_items_[users[start : start + step]] @ self.similarity_
            out[start : start + step] = block.toarray()
        return out

