"""Stratified samples of a fold's evaluation users, with their confidence intervals.

A sample drawn by :func:`sample_users` is balanced over training activity (light to heavy
users behave differently), so its stratified mean is a tighter estimate than a simple
random sample's. :class:`~xrec.blend.BlendEngine` and the notebook mixer evaluate on such
samples for interactive use.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from xrec._validation import check_int
from xrec.errors import DataError
from xrec.evaluate._stats import stratified_interval
from xrec.fold import Fold

__all__ = ["UserSample", "sample_users"]


@dataclass(frozen=True)
class UserSample:
    """A stratified sample of a fold's evaluation users.

    Attributes
    ----------
    users
        Sampled user indices, ascending.
    stratum
        Stratum of each sampled user (``0 .. n_strata-1``, by training activity).
    population
        Number of evaluation users in each stratum.
    edges
        Training-interaction counts separating the strata (``n_strata - 1`` values; a user
        with ``edges[h-1] <= count < edges[h]`` is in stratum ``h``).
    seed
        Seed of the draw.
    """

    users: np.ndarray
    stratum: np.ndarray
    population: np.ndarray
    edges: np.ndarray
    seed: int

    @property
    def n_strata(self) -> int:
        """Number of strata the users were drawn from."""
        return len(self.population)

    def estimate(self, values: np.ndarray, level: float = 0.95) -> tuple[float, float, float]:
        """Stratified mean of per-user ``values`` (aligned with ``users``) and its interval.

        ``mean = Σ_h W_h ȳ_h`` and ``var = Σ_h W_h² (1 - n_h/N_h) s_h² / n_h`` with
        ``W_h = N_h / N`` (Cochran, *Sampling Techniques*, 3rd ed. 1977, eqs. 5.1 and 5.6;
        from memory); the interval is ``mean ± z·sqrt(var)`` (normal approximation).

        Returns
        -------
        (mean, low, high)
        """
        values = np.asarray(values, dtype=np.float64)
        if values.shape != self.users.shape:
            raise DataError(f"values has shape {values.shape}, the sample has {self.users.shape} users")
        return stratified_interval(values, self.stratum, self.population, level)


def sample_users(fold: Fold, n: int = 1000, *, n_strata: int = 4, seed: int = 0) -> UserSample:
    """Draw ``n`` evaluation users, stratified by their number of training interactions.

    Strata are activity quantiles of the evaluation users (light to heavy users behave
    differently, so a sample balanced over activity gives a tighter estimate); each stratum
    gets a share of ``n`` proportional to its size (at least 2 users when it has them).

    Parameters
    ----------
    fold
        Fold whose ``eval_users`` are sampled.
    n
        Sample size; all evaluation users when ``n`` is at least their number.
    n_strata
        Number of activity strata (>= 1).
    seed
        Seed of the draw.
    """
    check_int(n, "n", low=1)
    check_int(n_strata, "n_strata", low=1)
    users = fold.eval_users
    if len(users) == 0:
        raise DataError("the fold has no evaluation users (no held-out interactions)")
    activity = np.diff(fold.train_matrix.indptr)[users]
    edges = np.unique(np.quantile(activity, np.linspace(0, 1, n_strata + 1)[1:-1], method="higher"))
    stratum = np.searchsorted(edges, activity, side="right")
    n_h = np.bincount(stratum, minlength=len(edges) + 1)
    keep = n_h > 0
    # Renumber strata so that empty ones disappear; a stratum's lower edge goes with it.
    remap = np.cumsum(keep) - 1
    stratum = remap[stratum]
    lower = np.concatenate([[-1], edges.astype(np.int64)])[keep]  # -1: the first stratum has no lower edge
    edges = lower[1:]
    population = n_h[keep]
    rng = np.random.default_rng(seed)
    if n >= len(users):
        chosen = np.arange(len(users))
    else:
        share = population / population.sum() * n
        alloc = np.minimum(population, np.maximum(np.floor(share).astype(np.int64), np.minimum(2, population)))
        # Hand out what rounding left over to the largest remainders.
        for h in np.argsort(-(share - np.floor(share)), kind="stable"):
            if alloc.sum() >= n:
                break
            if alloc[h] < population[h]:
                alloc[h] += 1
        parts = [rng.choice(np.flatnonzero(stratum == h), size=int(alloc[h]), replace=False) for h in range(len(population))]
        chosen = np.sort(np.concatenate(parts))
    return UserSample(
        users=users[chosen].astype(np.int64),
        stratum=stratum[chosen].astype(np.int64),
        population=population.astype(np.int64),
        edges=edges.astype(np.int64),
        seed=int(seed),
    )
