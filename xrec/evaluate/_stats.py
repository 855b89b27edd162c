"""Statistics over per-user values: bootstrap means, sign-flip test, Holm, and every confidence interval.

The intervals xrec reports are all computed here: bootstrap percentile intervals
(scorecards, comparisons), normal-approximation intervals over users (the notebook mixer,
:meth:`~xrec.blend.BlendEngine.interval`), stratified-sample intervals
(:class:`~xrec.evaluate._sampling.UserSample`) and Wilson score intervals of hit rates
(segments, the demo).

Functions take one column of per-user values or several side by side (``n_users × m``);
every column sees the same resamples, so results for a column do not depend on which
other columns are passed with it.
"""

from __future__ import annotations

import math

import numpy as np

# Resampled values held at once (resamples × users), to bound memory on large user sets.
_CELLS = 1 << 22


def _z(confidence: float) -> float:
    """Two-sided standard normal quantile for ``confidence`` (1.96 for 0.95)."""
    from scipy.stats import norm

    return float(norm.ppf(0.5 + confidence / 2.0))


def _batch(n: int) -> int:
    return max(1, min(256, _CELLS // max(n, 1)))


def bootstrap_means(values: np.ndarray, n_resamples: int, seed: int) -> np.ndarray:
    """Means of ``n_resamples`` resamples (users drawn with replacement) of ``values``.

    Returns shape ``(n_resamples,)`` for 1-D ``values``, ``(n_resamples, m)`` for 2-D.
    """
    values = np.asarray(values, dtype=np.float64)
    flat = values.ndim == 1
    v = values[:, None] if flat else values
    n = len(v)
    rng = np.random.default_rng(seed)
    out = np.empty((n_resamples, v.shape[1]))
    step = _batch(n)
    for s in range(0, n_resamples, step):
        e = min(n_resamples, s + step)
        idx = rng.integers(0, n, size=(e - s, n))
        out[s:e] = v[idx].mean(axis=1)
    return out[:, 0] if flat else out


def percentile_interval(stats: np.ndarray, confidence: float) -> tuple:
    """Percentile interval of bootstrap statistics (per column when 2-D)."""
    alpha = (1.0 - confidence) / 2.0
    lo, hi = np.percentile(stats, [100 * alpha, 100 * (1 - alpha)], axis=0)
    if np.ndim(lo) == 0:
        return float(lo), float(hi)
    return lo, hi


def sign_flip_pvalue(diff: np.ndarray, n_resamples: int, seed: int):
    """Two-sided paired randomization test of mean(diff) = 0 by random sign flips.

    p = (1 + #{resamples with |mean| >= |observed mean|}) / (n_resamples + 1); the +1
    counts the observed assignment, so p is never 0. A relative tolerance of 1e-12 keeps
    floating-point noise from splitting exact ties with the observed value. ``diff`` may
    be 2-D (users × m): one p-value per column, same flips for every column.
    """
    d = np.asarray(diff, dtype=np.float64)
    flat = d.ndim == 1
    d = d[:, None] if flat else d
    n = len(d)
    observed = np.abs(d.mean(axis=0))
    cut = observed - 1e-12 * np.maximum(observed, np.abs(d).mean(axis=0))
    rng = np.random.default_rng(seed)
    extreme = np.zeros(d.shape[1], dtype=np.int64)
    step = _batch(n)
    for s in range(0, n_resamples, step):
        e = min(n_resamples, s + step)
        signs = rng.integers(0, 2, size=(e - s, n), dtype=np.int8).astype(np.float64) * 2.0 - 1.0
        extreme += (np.abs(signs @ d) / n >= cut).sum(axis=0)
    p = (extreme + 1) / (n_resamples + 1)
    return float(p[0]) if flat else p


def holm(pvalues: np.ndarray) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values.

    Sorted ascending ``p_(1) <= ... <= p_(m)``: adjusted ``p_(j) = max_{l <= j} min(1, (m-l+1) p_(l))``.
    """
    p = np.asarray(pvalues, dtype=np.float64)
    m = len(p)
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    scaled = np.minimum(1.0, (m - np.arange(m)) * p[order])
    adjusted = np.empty(m)
    adjusted[order] = np.maximum.accumulate(scaled)
    return adjusted


def wilson_interval(hits: np.ndarray, n: np.ndarray, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of a binomial proportion (Wilson, JASA 22, 1927), vectorized.

    ``n == 0`` gives NaN bounds.

    Parameters
    ----------
    hits, n
        Successes and trials (arrays of the same shape).
    confidence
        Two-sided level of the interval.

    Returns
    -------
    (np.ndarray, np.ndarray)
        Lower and upper bounds.
    """
    hits = np.asarray(hits, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    z = _z(confidence)
    with np.errstate(invalid="ignore", divide="ignore"):
        p = hits / n
        denom = 1.0 + z**2 / n
        centre = (p + z**2 / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / denom
    return centre - half, centre + half


def normal_interval(values: np.ndarray, confidence: float = 0.95) -> tuple[float, float, float]:
    """Mean and normal-approximation interval ``mean ± z·s/√n`` of per-user values (NaN ignored)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[~np.isnan(v)]
    if len(v) == 0:
        return math.nan, math.nan, math.nan
    mean = float(v.mean())
    if len(v) < 2:
        return mean, mean, mean
    half = _z(confidence) * float(v.std(ddof=1)) / math.sqrt(len(v))
    return mean, mean - half, mean + half


def stratified_interval(values: np.ndarray, stratum: np.ndarray, population: np.ndarray, confidence: float = 0.95) -> tuple[float, float, float]:
    """Stratified mean of sampled per-user ``values`` and its normal-approximation interval.

    ``mean = Σ_h W_h ȳ_h`` and ``var = Σ_h W_h² (1 - n_h/N_h) s_h² / n_h`` with
    ``W_h = N_h / N`` (Cochran, *Sampling Techniques*, 3rd ed. 1977, eqs. 5.1 and 5.6;
    from memory); the interval is ``mean ± z·sqrt(var)``.

    Parameters
    ----------
    values
        One value per sampled user.
    stratum
        Stratum index (``0 .. len(population)-1``) of each sampled user.
    population
        Number of users in each stratum (``N_h``).
    confidence
        Two-sided level of the interval.

    Returns
    -------
    (mean, low, high)
    """
    values = np.asarray(values, dtype=np.float64)
    total = float(np.sum(population))
    mean = 0.0
    var = 0.0
    for h in range(len(population)):
        y = values[stratum == h]
        n_h, big_n = len(y), float(population[h])
        if n_h == 0:
            continue
        w_h = big_n / total
        mean += w_h * float(y.mean())
        if n_h > 1:
            var += w_h**2 * (1.0 - n_h / big_n) * float(y.var(ddof=1)) / n_h
    half = _z(confidence) * math.sqrt(max(var, 0.0))
    return mean, mean - half, mean + half
