"""Per-user score normalizers, computed over each user's candidate items.

A source's raw scores live on its own scale (ALS dot products, cosine
similarities, counts), so a blend first puts every source on a comparable
per-user scale. The statistics of each row (min, max, mean, std, ranks) are
taken over the user's **candidates** only — the items not seen in training —
because seen items are never recommended and would otherwise distort the
scale (an item-kNN source, for instance, scores seen items highest).

Methods
-------
``"none"``
    Raw scores.
``"minmax"``
    ``(x - min) / (max - min)`` over the candidates: the best candidate gets 1, the worst 0.
``"zscore"``
    ``(x - mean) / std`` over the candidates, population std (``ddof=0``).
``"rank"``
    ``(r - 1) / (c - 1)`` where ``r`` is the candidate's ascending rank among the
    user's ``c`` candidates (1 = lowest score) and tied candidates share the mean of
    the ranks they span; a unique best candidate gets 1, a unique worst 0.

Conventions
-----------
- A row whose candidates all score the same (``max == min``), or which has a
  single candidate, carries no preference: every candidate maps to 0 (never NaN).
- Seen items get the row's smallest normalized candidate value (0 for
  ``minmax``, ``rank`` and constant rows; the lowest z for ``zscore``; the lowest
  raw candidate score for ``none``). Their values are irrelevant because they
  are never recommended, but this way a non-negative blend of normalized
  sources never puts a seen item above a candidate.
- A user with no candidate at all gets a row of zeros.
- Input scores must be finite. Output is float32; statistics are computed in float64.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from xrec.blend._rank import Candidates, average_ranks
from xrec.errors import ConfigError, DataError

NORMALIZERS: tuple[str, ...] = ("none", "minmax", "zscore", "rank")


def check_normalizer(name: object, field: str = "normalizer") -> str:
    """Return ``name`` if it is a known normalizer, else raise :class:`ConfigError` naming ``field``."""
    if not isinstance(name, str) or name not in NORMALIZERS:
        raise ConfigError(f"{field}: unknown normalizer {name!r}; choose one of {list(NORMALIZERS)}")
    return name


def _check_finite(scores: np.ndarray) -> None:
    finite = np.isfinite(scores)
    if not finite.all():
        row, col = (int(v[0]) for v in np.nonzero(~finite))
        raise DataError(
            f"scores hold {int((~finite).sum())} non-finite values (NaN or inf), first at row {row}, "
            f"item {col}; normalizers need finite scores (seen items included: give them any finite value)"
        )


def normalize(
    scores: np.ndarray,
    method: str = "zscore",
    seen: sp.spmatrix | None = None,
    *,
    candidates: Candidates | None = None,
) -> np.ndarray:
    """Normalize each row (user) of a score block over that user's candidate items.

    Parameters
    ----------
    scores
        ``(n_users, n_items)`` raw scores of a block of users, finite.
    method
        One of :data:`NORMALIZERS`.
    seen
        ``(n_users, n_items)`` CSR rows of the training matrix for the same users: its
        stored entries are the seen (non-candidate) items. ``None`` makes every item a candidate.
    candidates
        Alternatively, the block's precomputed candidates (takes precedence over ``seen``);
        lets a caller normalizing several sources of one block build them once.

    Returns
    -------
    numpy.ndarray
        float32 array of the same shape (see the module docstring for the conventions).

    Raises
    ------
    DataError
        When any score is NaN or infinite.
    """
    check_normalizer(method, "method")
    scores = np.asarray(scores)
    if scores.ndim != 2:
        raise ValueError(f"scores must be 2-D (users × items), got shape {scores.shape}")
    cand = candidates if candidates is not None else Candidates.from_seen(seen, *scores.shape)
    if cand.shape != scores.shape:
        raise ValueError(f"candidates have shape {cand.shape}, scores have shape {scores.shape}")
    _check_finite(scores)
    n_cand = cand.n_cand
    has_cand = n_cand > 0
    if scores.size == 0:
        return np.zeros(scores.shape, dtype=np.float32)
    # Row extremes over candidates only: non-candidates are pushed out of reach.
    lo = cand.keyed(scores, np.inf).min(axis=1)
    hi = cand.keyed(scores, -np.inf).max(axis=1)
    constant = ~has_cand | (hi <= lo)
    lo = np.where(has_cand, lo, 0.0).astype(np.float32)

    if method == "none":
        out = np.array(scores, dtype=np.float32, copy=True)
        fill = lo
    elif method == "minmax":
        scale = np.where(constant, 0.0, 1.0 / np.where(constant, 1.0, hi.astype(np.float64) - lo)).astype(np.float32)
        out = np.asarray(scores, dtype=np.float32) - lo[:, None]
        out *= scale[:, None]
        fill = np.zeros(len(out), dtype=np.float32)
    elif method == "zscore":
        x = np.asarray(scores, dtype=np.float32)
        seen_x = x[cand.seen_rows, cand.seen_cols].astype(np.float64)
        count = np.maximum(n_cand, 1).astype(np.float64)
        total = x.sum(axis=1, dtype=np.float64) - np.bincount(cand.seen_rows, weights=seen_x, minlength=len(x))
        mean = total / count
        out = x - mean.astype(np.float32)[:, None]
        seen_dev = seen_x - mean[cand.seen_rows]
        sumsq = np.einsum("ij,ij->i", out, out, dtype=np.float64) - np.bincount(
            cand.seen_rows, weights=seen_dev * seen_dev, minlength=len(x)
        )
        std = np.sqrt(np.maximum(sumsq, 0.0) / count)
        constant |= std == 0
        inv = np.where(constant, 0.0, 1.0 / np.where(constant, 1.0, std))
        out *= inv.astype(np.float32)[:, None]
        # Taken from the output itself so that rounding cannot lift a seen item above a candidate.
        fill = cand.keyed(out, np.inf).min(axis=1)
    else:  # rank
        ranks = average_ranks(scores, cand)
        inv = np.where(constant, 0.0, 1.0 / np.maximum(n_cand - 1, 1))
        out = ((ranks - 1.0) * inv[:, None]).astype(np.float32)
        fill = np.zeros(len(out), dtype=np.float32)
    out[constant] = 0.0
    fill = np.where(constant, 0.0, fill).astype(np.float32)
    out[cand.seen_rows, cand.seen_cols] = fill[cand.seen_rows]
    return out
