"""Scorecard: per-user metrics of one scorer on one fold, with summaries and a plain-dict form."""

from __future__ import annotations

import html
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from xrec._validation import parse_metric_column
from xrec.errors import ConfigError
from xrec.evaluate._stats import bootstrap_means, percentile_interval
from xrec.evaluate.breakdown import MIN_SEGMENT_USERS, label_list, segment_summary


def plain(value: Any) -> Any:
    """``value`` with only str/int/float/bool/list/dict inside; ``None`` entries are dropped."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items() if v is not None}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [plain(v) for v in value if v is not None]
    if isinstance(value, np.ndarray):
        return [plain(v) for v in value.tolist() if v is not None]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    if isinstance(value, str):
        return value
    return str(value)


@dataclass
class Scorecard:
    """Offline metrics of one scorer on one fold.

    Attributes
    ----------
    name
        Label of the scorer.
    per_user
        One row per evaluated user: column ``user`` (user index in the fold) and one
        float column per ``"metric@K"`` (hit_rate, ndcg, recall, mrr, popularity).
    list_metrics
        Metrics of the set of top-K lists: ``coverage@K`` (share of catalog items listed
        for at least one user) and ``popularity@K`` (mean of the per-user popularity).
    ks
        Cut-offs evaluated.
    protocol
        Candidate protocol, e.g. ``{"kind": "full_ranking"}``.
    fold_settings
        How the fold was made (copied from ``Fold.settings``).
    n_items
        Catalog size.
    """

    name: str
    per_user: pd.DataFrame
    list_metrics: dict[str, float] = field(default_factory=dict)
    ks: tuple[int, ...] = (10,)
    protocol: dict = field(default_factory=lambda: {"kind": "full_ranking"})
    fold_settings: dict = field(default_factory=dict)
    n_items: int = 0

    @property
    def n_users(self) -> int:
        """Number of evaluated users."""
        return len(self.per_user)

    @property
    def users(self) -> np.ndarray:
        """Evaluated user indices, in ``per_user`` order."""
        return self.per_user["user"].to_numpy()

    @property
    def metric_columns(self) -> list[str]:
        """Per-user metric column names, e.g. ``["hit_rate@10", "ndcg@10"]``."""
        return [c for c in self.per_user.columns if c != "user"]

    def means(self) -> dict[str, float]:
        """Mean of every per-user metric, plus the list-level metrics."""
        out = {c: float(self.per_user[c].mean()) for c in self.metric_columns}
        out.update({k: float(v) for k, v in self.list_metrics.items() if k not in out})
        return out

    def summary(self, confidence: float = 0.95, seed: int = 0, n_resamples: int = 2000) -> pd.DataFrame:
        """Mean and confidence interval of every metric.

        Intervals are bootstrap percentile intervals: users are resampled with
        replacement ``n_resamples`` times (seeded) and the ``(1±confidence)/2``
        percentiles of the resampled means are reported. List-level metrics
        (coverage) are one number for the whole user set and get no interval.

        Parameters
        ----------
        confidence
            Level of the intervals, in (0, 1).
        seed
            Seed of the user resamples.
        n_resamples
            Bootstrap resamples.

        Returns
        -------
        DataFrame
            Index ``metric`` ("metric@K"); columns ``mean``, ``ci_low``, ``ci_high``, ``n_users``.
        """
        if not 0 < confidence < 1:
            raise ConfigError(f"confidence must be in (0, 1), got {confidence!r}")
        cols = self.metric_columns
        values = self.per_user[cols].to_numpy(dtype=np.float64)
        stats: dict[str, tuple] = {}
        clean = ~np.isnan(values).any(axis=0)
        if clean.any() and len(values):
            # NaN-free metrics share one pass over the resamples.
            lo, hi = percentile_interval(bootstrap_means(values[:, clean], n_resamples, seed), confidence)
            for pos, j in enumerate(np.flatnonzero(clean)):
                stats[cols[j]] = (float(values[:, j].mean()), float(lo[pos]), float(hi[pos]), len(values))
        for j in np.flatnonzero(~clean):
            v = values[~np.isnan(values[:, j]), j]
            if len(v):
                lo1, hi1 = percentile_interval(bootstrap_means(v, n_resamples, seed), confidence)
                stats[cols[j]] = (float(v.mean()), lo1, hi1, len(v))
            else:
                stats[cols[j]] = (np.nan, np.nan, np.nan, 0)
        rows = [(col, *stats.get(col, (np.nan, np.nan, np.nan, 0))) for col in cols]
        for col, value in self.list_metrics.items():
            if col not in self.per_user.columns:
                rows.append((col, float(value), np.nan, np.nan, self.n_users))
        return pd.DataFrame(rows, columns=["metric", "mean", "ci_low", "ci_high", "n_users"]).set_index("metric")

    def by_segment(
        self,
        labels: pd.Series | str | Sequence[pd.Series | str],
        metrics: Sequence[str] | None = None,
        *,
        fold: Any = None,
        confidence: float = 0.95,
        seed: int = 0,
        n_resamples: int = 2000,
        min_users: int = MIN_SEGMENT_USERS,
    ) -> pd.DataFrame:
        """Mean and confidence interval of every metric within each segment.

        The means are group means of :attr:`per_user` grouped by the labels; intervals are
        bootstrap percentile intervals over each segment's own users. Segments with fewer than
        ``min_users`` users are flagged ``small`` and get no interval.

        Parameters
        ----------
        labels
            Segment label per user, a Series indexed by user index (named after the
            breakdown), e.g. ``segment_labels(fold, "item_segment")``; a breakdown name
            (``"item_segment"``, ``"user_segment"``, a catalog column) with ``fold``; or several.
        metrics
            Per-user metric columns; default all.
        fold
            The fold this scorecard was evaluated on, when breakdowns are given by name.
        confidence, seed, n_resamples
            As in :meth:`summary`.
        min_users
            Smallest segment that gets an interval (default :data:`~xrec.evaluate.breakdown.MIN_SEGMENT_USERS`).

        Returns
        -------
        DataFrame
            Columns ``by, segment, metric, n_users, mean, ci_low, ci_high, small``.
        """
        many = label_list(labels, fold)
        frames = [
            segment_summary(self.per_user, s, metrics=metrics, confidence=confidence, seed=seed,
                            n_resamples=n_resamples, min_users=min_users)
            for s in many
        ]
        return pd.concat(frames, ignore_index=True)

    def table(self) -> pd.DataFrame:
        """Means as a compact metric × K table."""
        means = {c: float(self.per_user[c].mean()) for c in self.metric_columns}
        for c, v in self.list_metrics.items():
            means.setdefault(c, v)
        rows: dict[str, dict[str, float]] = {}
        for col, v in means.items():
            metric, k = parse_metric_column(col)
            rows.setdefault(metric, {})[f"@{k}"] = v
        return pd.DataFrame(rows).T

    def title(self) -> str:
        """One line naming the scorer, the protocol and the fold."""
        kind = self.protocol.get("kind", "?")
        if kind == "sampled_negatives":
            kind = f"sampled negatives (n={self.protocol.get('n_negatives')}, seed={self.protocol.get('seed')})"
        else:
            kind = kind.replace("_", " ")
        return f"Scorecard {self.name!r}: {self.n_users} users, {self.n_items} items, {kind}"

    def __repr__(self) -> str:
        return self.title() + "\n" + self.table().to_string(float_format=lambda v: f"{v:.4f}")

    def _repr_html_(self) -> str:
        body = self.table().to_html(float_format=lambda v: f"{v:.4f}")
        return f"<div><b>{html.escape(self.title())}</b>{body}</div>"

    def to_dict(self) -> dict:
        """Plain form (str/int/float/list/dict only; no None) for JSON or TOML files.

        Per-user values are kept, so a scorecard read back can still be compared.
        """
        per_user = {"user": [int(u) for u in self.per_user["user"]]}
        for col in self.metric_columns:
            per_user[col] = [float(v) for v in self.per_user[col]]
        return {
            "name": str(self.name),
            "n_users": int(self.n_users),
            "n_items": int(self.n_items),
            "ks": [int(k) for k in self.ks],
            "protocol": plain(self.protocol),
            "fold_settings": plain(self.fold_settings),
            "list_metrics": {k: float(v) for k, v in self.list_metrics.items()},
            "per_user": per_user,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Scorecard:
        """Inverse of :meth:`to_dict`."""
        missing = [k for k in ("name", "per_user") if k not in d]
        if missing:
            raise ConfigError(f"scorecard dict lacks field(s) {missing}")
        per_user = d["per_user"]
        if "user" not in per_user:
            raise ConfigError("scorecard dict field per_user lacks 'user'")
        lengths = {k: len(v) for k, v in per_user.items()}
        if len(set(lengths.values())) > 1:
            raise ConfigError(f"scorecard per_user columns differ in length: {lengths}")
        frame = pd.DataFrame({"user": np.asarray(per_user["user"], dtype=np.int64)})
        for col, values in per_user.items():
            if col != "user":
                frame[col] = np.asarray(values, dtype=np.float64)
        return cls(
            name=str(d["name"]),
            per_user=frame,
            list_metrics={k: float(v) for k, v in d.get("list_metrics", {}).items()},
            ks=tuple(int(k) for k in d.get("ks", ())),
            protocol=dict(d.get("protocol", {"kind": "full_ranking"})),
            fold_settings=dict(d.get("fold_settings", {})),
            n_items=int(d.get("n_items", 0)),
        )
