"""Seeded synthetic problems for measuring evaluation and blending at scale.

A generated problem has the shape of a real catalog study without any files:
a hidden low-rank taste model (user and item vectors), training and held-out
interactions drawn from it, and four **already fitted** sources of different
quality that xrec's evaluator and blends accept as they are:

``"als"``
    A collaborative source: noisy copies of the hidden factors mapped into
    ``als_dim`` dimensions (what a fitted ALS model looks like from outside).
``"text"``, ``"image"``
    Content-like sources: item vectors (noisy linear images of the hidden item
    factors, L2-normalized) scored as user profile × item vectors, the profile
    being the L2-normalized sum of the user's training-item vectors — exactly what
    :func:`xrec.sources.content.user_profiles` computes (without recency weights).
``"popularity"``
    :class:`~xrec.sources.PopularitySource` with the state its ``fit`` would learn.

Interactions: each user draws a pool of items from a Zipf-like popularity law,
keeps the ``train_per_user + heldout_per_user`` unique pool items with the highest
affinity (hidden score plus Gumbel noise), and holds out ``heldout_per_user`` of them at
random. Rows are stored as CSR matrices (``train``, ``heldout``); a :class:`~xrec.fold.Fold`
is built from them only when asked (:attr:`ScaleProblem.fold`), because its row frame
costs memory that a scale measurement should not carry.

Everything is float32 and drawn from one ``numpy`` generator seeded by ``seed``, in
chunks of users, so memory stays bounded by the chunk and the output depends only on
the arguments. These are test and benchmark inputs, never references for checks.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Self

import numpy as np
import pandas as pd
import scipy.sparse as sp
from threadpoolctl import threadpool_limits

from xrec.errors import ConfigError
from xrec.fold import Fold
from xrec.sources.base import LowRankSource
from xrec.sources.popularity import PopularitySource

#: Named sizes: (users, items, training items per user).
SHAPES: dict[str, tuple[int, int, int]] = {
    "ml-1m": (6_040, 3_706, 165),  # MovieLens 1M: ~1.0M ratings
    "ml-20m": (138_493, 26_744, 144),  # MovieLens 20M: ~20.0M ratings
    "catalog-1m": (100_000, 1_000_000, 50),  # a 10^6-item catalog with 10^5 users
}

#: Blend weights used by the benchmarks unless told otherwise.
DEFAULT_WEIGHTS: dict[str, float] = {"als": 1.0, "text": 0.5, "image": 0.3, "popularity": 0.2}

# Users generated together (bounds the pool scratch: chunk × pool × rank floats).
_CHUNK = 512
# Slices of the inverse-CDF table of the popularity law (a draw is exact to 1 / _TABLE).
_TABLE = 1 << 22


class GeneratedFactors(LowRankSource):
    """A low-rank source whose factors were generated, not learned (already fitted).

    Scores are ``user_factors_[users] @ item_factors_.T`` like any low-rank source;
    :meth:`fit` keeps the factors (it only checks the fold's shape).

    Parameters
    ----------
    label
        What the factors stand for (``"als"``, ``"text"``, ...), shown in ``repr``.

    Attributes
    ----------
    user_factors_, item_factors_
        ``(n_users, d)`` and ``(n_items, d)`` float32.
    """

    def __init__(self, label: str = "factors") -> None:
        self.label = label

    @classmethod
    def from_factors(cls, label: str, user_factors: np.ndarray, item_factors: np.ndarray) -> GeneratedFactors:
        """A fitted source with the given factors (converted to C-contiguous float32)."""
        src = cls(label)
        src.user_factors_ = np.ascontiguousarray(user_factors, dtype=np.float32)
        src.item_factors_ = np.ascontiguousarray(item_factors, dtype=np.float32)
        src.fitted_ = True
        return src

    def fit(self, fold: Fold) -> Self:
        """Keep the generated factors; the fold must have their numbers of users and items."""
        self._check_fitted()
        if (fold.n_users, fold.n_items) != (len(self.user_factors_), len(self.item_factors_)):
            raise ConfigError(
                f"{self.label}: factors are for {len(self.user_factors_)} users × {len(self.item_factors_)} items, "
                f"the fold has {fold.n_users} × {fold.n_items}"
            )
        return self


@dataclass
class ScaleProblem:
    """A generated evaluation problem: interactions as CSR and four fitted sources.

    Attributes
    ----------
    train
        ``(n_users, n_items)`` CSR float32 of ones: the training interactions (seen mask).
    heldout
        ``(n_users, n_items)`` CSR float32 of ones: the held-out items (every user has some).
    sources
        ``{"als", "text", "image", "popularity"}`` → fitted low-rank source.
    weights
        A default non-negative weight per source (:data:`DEFAULT_WEIGHTS`).
    settings
        The generator's arguments (copied into the fold's settings).
    """

    train: sp.csr_matrix
    heldout: sp.csr_matrix
    sources: dict[str, LowRankSource]
    weights: dict[str, float]
    settings: dict[str, Any]
    _fold: Fold | None = field(default=None, repr=False)

    @property
    def n_users(self) -> int:
        """Number of users."""
        return self.train.shape[0]

    @property
    def n_items(self) -> int:
        """Number of items."""
        return self.train.shape[1]

    @property
    def fold(self) -> Fold:
        """A :class:`~xrec.fold.Fold` over the same rows (built once, on first use).

        Items are ``i0, i1, ...`` and users ``u0, u1, ...``; timestamps are 0 and weights 1.
        Its ``train_matrix`` and ``heldout_matrix`` equal :attr:`train` and :attr:`heldout`.
        """
        if self._fold is None:
            from xrec.data.catalog import Catalog

            catalog = Catalog.from_ids([f"i{j}" for j in range(self.n_items)])
            user_ids = np.array([f"u{u}" for u in range(self.n_users)])
            self._fold = Fold(catalog, user_ids, _rows_frame(self.train), _rows_frame(self.heldout), dict(self.settings))
        return self._fold


def _rows_frame(m: sp.csr_matrix) -> pd.DataFrame:
    users = np.repeat(np.arange(m.shape[0], dtype=np.int32), np.diff(m.indptr))
    return pd.DataFrame(
        {"user_idx": users, "item_idx": m.indices.astype(np.int32), "timestamp": np.float32(0.0), "weight": np.float32(1.0)}
    )


def _l2_rows(x: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return np.divide(x, norms, out=np.zeros_like(x), where=norms > 0).astype(np.float32)


def _draw_rows(
    rng: np.random.Generator, P: np.ndarray, Q: np.ndarray, cdf: np.ndarray, n_pick: int, pool: int, noise: float
) -> np.ndarray:
    """For a chunk of users (``cdf``: the inverse-CDF table): ``(b, n_pick)`` chosen items (``-1`` when a pool ran short), in random order."""
    b = len(P)
    cand = cdf[(rng.random((b, pool), dtype=np.float32) * len(cdf)).astype(np.int64)]
    cand.sort(axis=1)
    dup = np.zeros(cand.shape, dtype=bool)
    dup[:, 1:] = cand[:, 1:] == cand[:, :-1]
    affinity = np.einsum("bd,bpd->bp", P, Q[cand])
    affinity += noise * rng.gumbel(size=affinity.shape).astype(np.float32)
    affinity[dup] = -np.inf
    top = np.argpartition(-affinity, n_pick - 1, axis=1)[:, :n_pick]
    items = np.take_along_axis(cand, top, axis=1)
    items[np.take_along_axis(dup, top, axis=1)] = -1
    # Shuffle within rows so that which picks are held out is random.
    shuffle = np.argsort(rng.random(items.shape), axis=1)
    return np.take_along_axis(items, shuffle, axis=1)


def _csr(rows: np.ndarray, cols: np.ndarray, shape: tuple[int, int]) -> sp.csr_matrix:
    m = sp.csr_matrix((np.ones(len(rows), dtype=np.float32), (rows, cols)), shape=shape, dtype=np.float32)
    m.sum_duplicates()
    m.sort_indices()
    return m


def make_scale_problem(
    n_users: int,
    n_items: int,
    train_per_user: int = 50,
    *,
    heldout_per_user: int = 1,
    rank: int = 16,
    als_dim: int = 32,
    vector_dims: tuple[int, int] = (64, 32),
    seed: int = 0,
) -> ScaleProblem:
    """Generate a seeded problem of ``n_users × n_items`` with four fitted sources.

    Parameters
    ----------
    n_users, n_items
        Size of the user and item index.
    train_per_user
        Training items per user (a few users get fewer when their pool of popular items
        runs short of unique items, as happens on small catalogs).
    heldout_per_user
        Held-out items per user (at least 1).
    rank
        Dimension of the hidden taste model.
    als_dim
        Dimension of the ``"als"`` source's factors (>= ``rank``).
    vector_dims
        Dimensions of the ``"text"`` and ``"image"`` item vectors.
    seed
        Seed of every random draw.

    Returns
    -------
    ScaleProblem
    """
    for name, value, low in (
        ("n_users", n_users, 1),
        ("n_items", n_items, 2),
        ("train_per_user", train_per_user, 1),
        ("heldout_per_user", heldout_per_user, 1),
        ("rank", rank, 1),
        ("als_dim", als_dim, rank),
    ):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise ConfigError(f"{name} must be an int >= {low}, got {value!r}")
    n_pick = train_per_user + heldout_per_user
    if n_pick > n_items // 2:
        raise ConfigError(f"train_per_user + heldout_per_user = {n_pick} must be at most half of n_items ({n_items})")
    # One BLAS thread: the products here are small, and BLAS threads that wait for each
    # other on a busy machine make them far slower.
    with threadpool_limits(1):
        return _generate(n_users, n_items, train_per_user, heldout_per_user, rank, als_dim, vector_dims, seed)


def _generate(
    n_users: int, n_items: int, train_per_user: int, heldout_per_user: int, rank: int, als_dim: int, vector_dims, seed: int
) -> ScaleProblem:
    n_pick = train_per_user + heldout_per_user
    rng = np.random.default_rng(seed)
    scale = np.float32(1.0 / np.sqrt(rank))
    P = (rng.standard_normal((n_users, rank), dtype=np.float32) * scale).astype(np.float32)
    Q = rng.standard_normal((n_items, rank), dtype=np.float32)
    # Zipf-like popularity over a random order of the items.
    weight = np.empty(n_items)
    weight[rng.permutation(n_items)] = 1.0 / (np.arange(n_items) + 10.0) ** 0.8
    cdf = np.cumsum(weight)
    cdf /= cdf[-1]
    # Inverse-CDF table: item drawn for each of _TABLE equal slices of [0, 1).
    cdf = np.minimum(np.searchsorted(cdf, (np.arange(_TABLE) + 0.5) / _TABLE), n_items - 1).astype(np.int64)

    pool = max(8 * n_pick, 64)
    train_rows, train_cols, held_rows, held_cols = [], [], [], []
    for lo in range(0, n_users, _CHUNK):
        items = _draw_rows(rng, P[lo : lo + _CHUNK], Q, cdf, n_pick, pool, noise=0.1)
        b = len(items)
        users = np.repeat(np.arange(lo, lo + b, dtype=np.int64)[:, None], n_pick, axis=1)
        ok = items >= 0
        # The first valid picks of each row are held out, the rest trained on.
        held = ok & (np.cumsum(ok, axis=1) <= heldout_per_user)
        trained = ok & ~held
        held_rows.append(users[held])
        held_cols.append(items[held])
        train_rows.append(users[trained])
        train_cols.append(items[trained])
    shape = (n_users, n_items)
    train = _csr(np.concatenate(train_rows), np.concatenate(train_cols), shape)
    heldout = _csr(np.concatenate(held_rows), np.concatenate(held_cols), shape)

    # "als": the hidden factors rotated into als_dim dimensions, plus noise.
    basis = np.linalg.qr(rng.standard_normal((als_dim, rank)))[0].T.astype(np.float32)  # orthonormal rows
    als = GeneratedFactors.from_factors(
        "als",
        P @ basis + 0.3 * scale * rng.standard_normal((n_users, als_dim), dtype=np.float32),
        Q @ basis + 0.3 * rng.standard_normal((n_items, als_dim), dtype=np.float32),
    )
    sources: dict[str, LowRankSource] = {"als": als}
    for label, dim, noise in (("text", vector_dims[0], 1.0), ("image", vector_dims[1], 2.0)):
        mix = rng.standard_normal((rank, dim), dtype=np.float32) / np.float32(np.sqrt(rank))
        vectors = _l2_rows(Q @ mix + noise * rng.standard_normal((n_items, dim), dtype=np.float32))
        profiles = _l2_rows(np.asarray(train @ vectors, dtype=np.float32))
        sources[label] = GeneratedFactors.from_factors(label, profiles, vectors)
    popularity = PopularitySource()
    popularity.popularity_ = np.bincount(train.indices, minlength=n_items).astype(np.float32)
    popularity.user_factors_ = np.ones((n_users, 1), dtype=np.float32)
    popularity.item_factors_ = popularity.popularity_[:, None].copy()
    popularity.fitted_ = True
    sources["popularity"] = popularity

    settings = {
        "generator": "xrec synthetic scale problem",
        "n_users": n_users,
        "n_items": n_items,
        "train_per_user": train_per_user,
        "heldout_per_user": heldout_per_user,
        "rank": rank,
        "als_dim": als_dim,
        "vector_dims": list(vector_dims),
        "seed": seed,
    }
    return ScaleProblem(train, heldout, sources, dict(DEFAULT_WEIGHTS), settings)


def scale_problem(shape: str, *, n_users: int | None = None, seed: int = 0, **kwargs: Any) -> ScaleProblem:
    """A problem of one of the named :data:`SHAPES`, optionally with fewer (or more) users.

    Parameters
    ----------
    shape
        ``"ml-1m"``, ``"ml-20m"`` or ``"catalog-1m"``.
    n_users
        Override the shape's number of users (e.g. a sample for a quick run).
    seed, **kwargs
        Passed to :func:`make_scale_problem`.
    """
    if shape not in SHAPES:
        raise ConfigError(f"shape: unknown {shape!r}; known: {sorted(SHAPES)}")
    users, items, per_user = SHAPES[shape]
    return make_scale_problem(users if n_users is None else n_users, items, per_user, seed=seed, **kwargs)
