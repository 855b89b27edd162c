"""Tidy frames behind the charts and the mixer (no altair): summaries, differences, intervals."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from xrec.errors import ConfigError, DataError
from xrec.evaluate._stats import normal_interval

__all__ = ["DIFFERENCE_COLUMNS", "SUMMARY_COLUMNS", "comparison_frame", "interval_frame", "metric_label", "summary_frame", "verdicts"]

SUMMARY_COLUMNS = ["scorer", "metric", "mean", "ci_low", "ci_high", "n_users"]
DIFFERENCE_COLUMNS = ["candidate", "metric", "difference", "ci_low", "ci_high", "verdict"]

# How each metric reads in titles, tables and tooltips (trade names; field names stay in the data).
_METRIC_WORDS = {"hit_rate": "hit rate", "ndcg": "NDCG", "recall": "recall", "mrr": "MRR", "coverage": "coverage", "popularity": "popularity"}


def metric_label(column: str) -> str:
    """A ``"metric@K"`` column as people write it: ``"hit_rate@10"`` -> ``"hit rate@10"``, ``"ndcg@20"`` -> ``"NDCG@20"``.

    Names it does not know come back unchanged.
    """
    name, at, k = str(column).partition("@")
    return f"{_METRIC_WORDS.get(name, name)}{at}{k}"


def _summary_rows(name: str, summary: pd.DataFrame) -> pd.DataFrame:
    frame = summary.reset_index()
    if "metric" not in frame.columns:
        frame = frame.rename(columns={frame.columns[0]: "metric"})
    missing = [c for c in ("mean", "ci_low", "ci_high") if c not in frame.columns]
    if missing:
        raise DataError(f"summary of {name!r} lacks column(s) {missing}; expected Scorecard.summary() output")
    frame["scorer"] = name
    if "n_users" not in frame.columns:
        frame["n_users"] = np.nan
    return frame[SUMMARY_COLUMNS]


def summary_frame(
    scorecards_or_summary: Any,
    *,
    confidence: float = 0.95,
    seed: int = 0,
    n_resamples: int = 2000,
) -> pd.DataFrame:
    """One row per (scorer, metric): mean and confidence interval.

    Parameters
    ----------
    scorecards_or_summary
        A :class:`~xrec.evaluate.Scorecard`, a sequence of them, a mapping name ->
        Scorecard or name -> ``Scorecard.summary()`` frame, or an already tidy frame with
        columns ``scorer, metric, mean, ci_low, ci_high``.
    confidence, seed, n_resamples
        Passed to ``Scorecard.summary`` (bootstrap percentile intervals).

    Returns
    -------
    DataFrame
        Columns ``scorer, metric, mean, ci_low, ci_high, n_users``, scorers in the order given.
    """
    from xrec.evaluate.scorecard import Scorecard

    obj = scorecards_or_summary
    if isinstance(obj, pd.DataFrame):
        missing = [c for c in ("scorer", "metric", "mean", "ci_low", "ci_high") if c not in obj.columns]
        if missing:
            raise DataError(f"summary frame lacks column(s) {missing}; it has {list(obj.columns)}")
        out = obj.copy()
        if "n_users" not in out.columns:
            out["n_users"] = np.nan
        return out[SUMMARY_COLUMNS].reset_index(drop=True)
    if isinstance(obj, Scorecard):
        obj = [obj]
    if isinstance(obj, Mapping):
        items = list(obj.items())
    elif isinstance(obj, Sequence) and not isinstance(obj, str):
        items = [(getattr(card, "name", str(i)), card) for i, card in enumerate(obj)]
    else:
        raise ConfigError(
            f"expected Scorecard(s), a mapping of name -> Scorecard / summary, or a tidy frame; got {type(obj).__name__}"
        )
    if not items:
        raise ConfigError("no scorecards given")
    names = [str(n) for n, _ in items]
    if len(set(names)) != len(names):
        raise ConfigError(f"scorer names repeat: {names}; pass a mapping with unique names")
    parts = []
    for name, value in items:
        if isinstance(value, Scorecard):
            value = value.summary(confidence=confidence, seed=seed, n_resamples=n_resamples)
        if not isinstance(value, pd.DataFrame):
            raise ConfigError(f"{name!r}: expected a Scorecard or a summary frame, got {type(value).__name__}")
        parts.append(_summary_rows(str(name), value))
    return pd.concat(parts, ignore_index=True)


def comparison_frame(comparison: Any, *, alpha: float = 0.05) -> pd.DataFrame:
    """Differences against the baseline as a tidy frame (one row per candidate and metric).

    ``verdict`` is ``"higher"`` / ``"lower"`` when the interval excludes 0 and the
    Holm-adjusted p-value is below ``alpha``, else ``"unclear"``.
    """
    table = getattr(comparison, "table", comparison)
    if not isinstance(table, pd.DataFrame):
        raise ConfigError(f"expected a Comparison or its table, got {type(comparison).__name__}")
    missing = [c for c in ("candidate", "metric", "difference", "ci_low", "ci_high") if c not in table.columns]
    if missing:
        raise DataError(f"comparison table lacks column(s) {missing}")
    out = table.copy()
    p = out["p_holm"] if "p_holm" in out.columns else out.get("p_value", pd.Series(0.0, index=out.index))
    out["verdict"] = verdicts(out["ci_low"].to_numpy(), out["ci_high"].to_numpy(), p.to_numpy(dtype=float) < alpha)
    return out[DIFFERENCE_COLUMNS + [c for c in ("p_value", "p_holm") if c in out.columns]].reset_index(drop=True)


def verdicts(lo: np.ndarray, hi: np.ndarray, significant: np.ndarray | None = None) -> list[str]:
    sig = np.ones(len(lo), dtype=bool) if significant is None else np.asarray(significant, dtype=bool)
    out = []
    for a, b, s in zip(lo, hi, sig):
        if s and a > 0:
            out.append("higher")
        elif s and b < 0:
            out.append("lower")
        else:
            out.append("unclear")
    return out


def interval_frame(per_user: Mapping[str, pd.DataFrame], columns: Sequence[str], confidence: float = 0.95) -> pd.DataFrame:
    """Tidy ``scorer, metric, mean, ci_low, ci_high, n_users`` rows from per-user metric frames.

    Intervals are normal approximations over users (``mean ± z·s/√n``), cheap enough to
    recompute on every slider move.
    """
    rows = []
    for name, frame in per_user.items():
        for col in columns:
            mean, lo, hi = normal_interval(frame[col].to_numpy(), confidence)
            rows.append((name, col, mean, lo, hi, int(frame[col].notna().sum())))
    return pd.DataFrame(rows, columns=["scorer", "metric", "mean", "ci_low", "ci_high", "n_users"])
