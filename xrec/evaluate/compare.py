"""Paired comparison of scorecards evaluated on the same users."""

from __future__ import annotations

import html
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from xrec._validation import check_int
from xrec.errors import ConfigError, DataError
from xrec.evaluate._stats import bootstrap_means, holm, percentile_interval, sign_flip_pvalue
from xrec.evaluate.breakdown import MIN_SEGMENT_USERS, check_labels, label_list, segment_order
from xrec.evaluate.scorecard import Scorecard, plain

TABLE_COLUMNS = [
    "metric",
    "candidate",
    "baseline_mean",
    "candidate_mean",
    "difference",
    "ci_low",
    "ci_high",
    "relative_change",
    "p_value",
    "p_holm",
]
SEGMENT_TABLE_COLUMNS = ["by", "segment", "n_users", "small", *TABLE_COLUMNS, "p_holm_segments"]


@dataclass
class Comparison:
    """Result of :func:`compare`.

    Attributes
    ----------
    baseline
        Name of the baseline scorecard.
    candidates
        Names of the candidate scorecards, in the order given.
    table
        One row per (metric, candidate): means, ``difference`` (candidate − baseline),
        its paired-bootstrap percentile interval ``ci_low``/``ci_high``,
        ``relative_change`` (difference / baseline mean), the sign-flip test ``p_value``
        and ``p_holm`` (Holm-adjusted over the candidates of that metric).
    settings
        ``n_resamples``, ``confidence``, ``seed``, ``n_users`` (and ``min_users`` with segments).
    segments
        With ``compare(..., by=...)``: the same comparison within every segment, one row per
        (breakdown, segment, metric, candidate) with ``n_users``, ``small`` and
        ``p_holm_segments`` (Holm over the segments of that breakdown); else empty.
    top_lists
        Candidate name -> :class:`~xrec.evaluate.overlap.TopListChange` against the
        baseline, when the caller measured it (``xrec compare`` with an overlap cut-off).
    """

    baseline: str
    candidates: list[str]
    table: pd.DataFrame
    settings: dict = field(default_factory=dict)
    segments: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=SEGMENT_TABLE_COLUMNS))
    top_lists: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """Plain form (str/int/float/list/dict only) for JSON or TOML files."""
        return {
            "baseline": self.baseline,
            "candidates": list(self.candidates),
            "settings": plain(self.settings),
            "rows": [plain(r) for r in self.table.to_dict(orient="records")],
            # Small segments have no interval or test: their NaN fields are left out.
            **({"segments": [plain({k: v for k, v in r.items() if not (isinstance(v, float) and np.isnan(v))})
                             for r in self.segments.to_dict(orient="records")]} if len(self.segments) else {}),
            **({"top_lists": {name: change.to_dict() for name, change in self.top_lists.items()}} if self.top_lists else {}),
        }

    def title(self) -> str:
        """One line saying what was compared, on how many users, with which interval and test."""
        return (
            f"Comparison vs {self.baseline!r} on {self.settings.get('n_users')} users "
            f"({self.settings.get('confidence', 0.95):.0%} paired-bootstrap CI, sign-flip p)"
        )

    def __repr__(self) -> str:
        return self.title() + "\n" + self.table.to_string(index=False, float_format=lambda v: f"{v:.4g}")

    def _repr_html_(self) -> str:
        body = self.table.to_html(index=False, float_format=lambda v: f"{v:.4g}")
        return f"<div><b>{html.escape(self.title())}</b>{body}</div>"


def _unique_names(cards: Sequence[Scorecard]) -> list[str]:
    names: list[str] = []
    for card in cards:
        name, i = card.name, 2
        while name in names:
            name, i = f"{card.name}#{i}", i + 1
        names.append(name)
    return names


def _settings_difference(a: dict, b: dict) -> str:
    a, b = plain(a), plain(b)
    keys = [k for k in dict.fromkeys([*a, *b]) if a.get(k) != b.get(k)]
    return ", ".join(f"{k}: {a.get(k)!r} vs {b.get(k)!r}" for k in keys[:3])


def compare(
    baseline: Scorecard,
    *candidates: Scorecard,
    metrics: Sequence[str] | None = None,
    n_resamples: int = 10_000,
    confidence: float = 0.95,
    seed: int = 0,
    by: pd.Series | str | Sequence[pd.Series | str] | None = None,
    min_users: int = MIN_SEGMENT_USERS,
    fold: Any = None,
) -> Comparison:
    """Paired comparison of one or more candidates against a baseline, metric by metric.

    For every metric and candidate, with ``d_u = candidate_u − baseline_u`` per user:

    * ``difference`` = mean of ``d``; ``relative_change`` = difference / baseline mean;
    * ``ci_low, ci_high``: paired bootstrap percentile interval of the mean of ``d``
      (users resampled with replacement, ``n_resamples`` times, seeded);
    * ``p_value``: two-sided paired randomization test (random sign flips of ``d``),
      ``(1 + #{|flipped mean| >= |observed mean|}) / (n_resamples + 1)``;
    * ``p_holm``: Holm (1979) step-down adjustment over the candidates of that metric
      (equal to ``p_value`` for one candidate).

    Every (metric, candidate) uses the same seed, so all share the same user resamples.

    Parameters
    ----------
    baseline, *candidates
        Scorecards of the same users (order may differ).
    metrics
        Per-user metric columns to compare, e.g. ``["ndcg@10"]``; default: all columns
        the scorecards share.
    n_resamples
        Bootstrap resamples and sign-flip draws.
    confidence
        Level of the intervals.
    seed
        Seed of the resampling.
    by
        Segment labels per user (a Series indexed by user index and named after the
        breakdown, e.g. ``segment_labels(fold, "item_segment")``), or several: the comparison
        is repeated within every segment of each (:attr:`Comparison.segments`), each with its
        own paired interval and test, and ``p_holm_segments`` adjusts the p-values by Holm
        (1979) over the segments of the breakdown (per metric and candidate; the family is
        every segment with a test). Segments under ``min_users`` users are flagged ``small``:
        means only, no interval and no test.
        A breakdown may also be given by name (``"item_segment"``, ``"user_segment"``, a
        catalog column) together with ``fold``.
    min_users
        Smallest segment that gets an interval and a test.
    fold
        The fold the scorecards were evaluated on, when ``by`` names breakdowns.

    Raises
    ------
    ConfigError
        No candidates, bad settings, or metrics missing from a scorecard.
    DataError
        Scorecards cover different users, or record different fold settings.
    """
    if not candidates:
        raise ConfigError("compare needs at least one candidate scorecard besides the baseline")
    cards = (baseline, *candidates)
    if not all(isinstance(c, Scorecard) for c in cards):
        raise ConfigError("compare takes Scorecard objects")
    if not 0 < confidence < 1:
        raise ConfigError(f"confidence must be in (0, 1), got {confidence!r}")
    check_int(n_resamples, "n_resamples", low=1, expected="a positive int")
    if baseline.protocol != candidates[0].protocol or any(c.protocol != baseline.protocol for c in candidates):
        raise ConfigError(f"scorecards were evaluated under different protocols: {[c.protocol for c in cards]}")

    for name, card in zip(_unique_names(cards)[1:], candidates):
        # Same users are not enough: a validation and a test scorecard share most users.
        if baseline.fold_settings and card.fold_settings and plain(card.fold_settings) != plain(baseline.fold_settings):
            raise DataError(
                f"scorecard {name!r} was evaluated on another fold than baseline {baseline.name!r} "
                f"(fold settings differ: {_settings_difference(baseline.fold_settings, card.fold_settings)})"
            )

    base_users = np.sort(baseline.users)
    for name, card in zip(_unique_names(cards)[1:], candidates):
        users = np.sort(card.users)
        if len(users) != len(base_users) or not np.array_equal(users, base_users):
            only_base = np.setdiff1d(base_users, users)
            only_card = np.setdiff1d(users, base_users)
            raise DataError(
                f"scorecard {name!r} covers different users than baseline {baseline.name!r}: "
                f"{len(only_base)} only in the baseline (first {only_base[:5].tolist()}), "
                f"{len(only_card)} only in the candidate (first {only_card[:5].tolist()})"
            )

    shared = [c for c in baseline.metric_columns if all(c in card.metric_columns for card in candidates)]
    if metrics is None:
        metrics = shared
    else:
        metrics = [metrics] if isinstance(metrics, str) else list(metrics)
        missing = [m for m in metrics if m not in shared]
        if missing:
            raise ConfigError(f"metric(s) {missing} are not in every scorecard; shared: {shared}")
    if not metrics:
        raise ConfigError("the scorecards share no per-user metric")

    aligned = [card.per_user.set_index("user").loc[base_users, metrics].to_numpy(dtype=np.float64) for card in cards]
    names = _unique_names(cards)
    base = aligned[0]
    results: dict[tuple[int, int], dict] = {}
    for ci, (name, cand) in enumerate(zip(names[1:], aligned[1:])):
        diff = cand - base
        clean = ~np.isnan(diff).any(axis=0)
        # NaN-free metrics share one pass over the resamples; others drop their NaN users.
        groups = [(np.flatnonzero(clean), None)] + [(np.array([j]), ~np.isnan(diff[:, j])) for j in np.flatnonzero(~clean)]
        for cols, ok in groups:
            if len(cols) == 0:
                continue
            d = diff[:, cols] if ok is None else diff[ok][:, cols]
            b_vals = base[:, cols] if ok is None else base[ok][:, cols]
            c_vals = cand[:, cols] if ok is None else cand[ok][:, cols]
            if len(d) == 0:
                continue
            lo, hi = percentile_interval(bootstrap_means(d, n_resamples, seed), confidence)
            pvals = sign_flip_pvalue(d, n_resamples, seed)
            for pos, j in enumerate(cols):
                base_mean, cand_mean = float(b_vals[:, pos].mean()), float(c_vals[:, pos].mean())
                results[(int(j), ci)] = {
                    "metric": metrics[j],
                    "candidate": name,
                    "baseline_mean": base_mean,
                    "candidate_mean": cand_mean,
                    "difference": float(d[:, pos].mean()),
                    "ci_low": float(lo[pos]),
                    "ci_high": float(hi[pos]),
                    "relative_change": (cand_mean - base_mean) / base_mean if base_mean != 0 else float("nan"),
                    "p_value": float(pvals[pos]),
                }
    rows = []
    for j in range(len(metrics)):
        metric_rows = [results[(j, ci)] for ci in range(len(candidates)) if (j, ci) in results]
        adjusted = holm(np.array([r["p_value"] for r in metric_rows]))
        for r, p in zip(metric_rows, adjusted):
            r["p_holm"] = float(p)
        rows.extend(metric_rows)
    table = pd.DataFrame(rows, columns=TABLE_COLUMNS)
    settings = {"n_resamples": int(n_resamples), "confidence": float(confidence), "seed": int(seed), "n_users": len(base_users)}
    result = Comparison(baseline=names[0], candidates=names[1:], table=table, settings=settings)
    if by is not None:
        check_int(min_users, "min_users", low=1)
        result.settings["min_users"] = int(min_users)
        many = label_list(by, fold)
        options = {"metrics": metrics, "n_resamples": n_resamples, "confidence": confidence, "seed": seed}
        result.segments = pd.DataFrame(
            [row for labels in many for row in _segment_rows(cards, names, labels, base_users, min_users, options)],
            columns=SEGMENT_TABLE_COLUMNS,
        )
    return result


def _subset(card: Scorecard, name: str, users: np.ndarray) -> Scorecard:
    per_user = card.per_user[card.per_user["user"].isin(users)].reset_index(drop=True)
    return Scorecard(name, per_user, ks=card.ks, protocol=card.protocol, fold_settings=card.fold_settings, n_items=card.n_items)


def _segment_rows(cards, names, labels, users, min_users, options) -> list[dict]:
    """The comparison within each segment of one breakdown, then Holm over its segments."""
    aligned = check_labels(labels, users).to_numpy()
    by = str(labels.name)
    rows: list[dict] = []
    for segment in segment_order(aligned):
        members = users[aligned == segment]
        small = len(members) < min_users
        sub = [_subset(card, name, members) for card, name in zip(cards, names)]
        if small:
            # Too few users to say anything: means only, no interval, no test.
            for cand in sub[1:]:
                for metric in options["metrics"]:
                    b, c = float(sub[0].per_user[metric].mean()), float(cand.per_user[metric].mean())
                    rows.append({"by": by, "segment": segment, "n_users": len(members), "small": True, "metric": metric,
                                 "candidate": cand.name, "baseline_mean": b, "candidate_mean": c, "difference": c - b})
            continue
        part = compare(sub[0], *sub[1:], **options).table
        for r in part.to_dict(orient="records"):
            rows.append({"by": by, "segment": segment, "n_users": len(members), "small": False, **r})
    for metric in options["metrics"]:
        for cand in names[1:]:
            family = [r for r in rows if r["metric"] == metric and r["candidate"] == cand and not r["small"]]
            for r, p in zip(family, holm(np.array([r["p_value"] for r in family]))):
                r["p_holm_segments"] = float(p)
    return rows
