"""Known-item and new-item results side by side, for studies on a mixed split.

On a mixed split (``split_dataset(..., "mixed_last" | "mixed_cutoff")``) the held-out rows
are on known items (with training interactions) and new items (none), and some held-out
users may have no training rows (cold users). This module labels each evaluated user by
what they hold out and restricts scorecards to a label, so every scorer's metric, and every
paired comparison, can be read per part. (General segment breakdowns with multiple-testing
correction live elsewhere; this is the one split a cold-start study needs.)
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from xrec.evaluate.scorecard import Scorecard
from xrec.fold import Fold

__all__ = ["KNOWN_NEW_PARTS", "known_new_labels", "known_new_table", "restrict"]

#: Labels of :func:`known_new_labels`, in display order.
KNOWN_NEW_PARTS = ("known items", "new items", "known and new", "cold users")


def known_new_labels(fold: Fold) -> pd.Series:
    """Each evaluated user's part: what their held-out items are.

    ``"cold users"`` (no training rows, whatever they hold out), else ``"known items"`` (every
    held-out item has training interactions), ``"new items"`` (none has), or ``"known and new"``.

    Returns
    -------
    pandas.Series
        Indexed by user index (``fold.eval_users``), values among :data:`KNOWN_NEW_PARTS`.
    """
    held = fold.heldout[["user_idx", "item_idx"]]
    is_new = fold.item_train_counts[held["item_idx"].to_numpy()] == 0
    share = pd.Series(is_new.astype(np.float64)).groupby(held["user_idx"].to_numpy()).mean()
    labels = np.where(share == 0, "known items", np.where(share == 1, "new items", "known and new")).astype(object)
    out = pd.Series(labels, index=share.index.rename("user"), name="part")
    out[out.index.isin(fold.cold_users)] = "cold users"
    return out


def restrict(card: Scorecard, users: Sequence[int] | np.ndarray, label: str | None = None) -> Scorecard:
    """The scorecard of a subset of its users (list-level metrics dropped: they need every user)."""
    keep = card.per_user["user"].isin(np.asarray(users))
    name = card.name if label is None else f"{card.name} [{label}]"
    return dataclasses.replace(card, name=name, per_user=card.per_user[keep].reset_index(drop=True), list_metrics={})


def known_new_table(cards: Mapping[str, Scorecard], labels: pd.Series, metrics: Sequence[str] = ("hit_rate@10", "ndcg@10"),
                    *, seed: int = 0) -> pd.DataFrame:
    """Every scorer's metric per part, with bootstrap 95% CIs (one row per scorer, part, metric).

    Columns ``scorer``, ``part``, ``metric``, ``mean``, ``ci_low``, ``ci_high``, ``n_users``.
    """
    rows = []
    for part in KNOWN_NEW_PARTS:
        users = labels.index[labels == part].to_numpy()
        if not len(users):
            continue
        for name, card in cards.items():
            s = restrict(card, users).summary(seed=seed)
            for m in metrics:
                rows.append({"scorer": name, "part": part, "metric": m, **{c: s.loc[m, c] for c in ("mean", "ci_low", "ci_high")},
                             "n_users": int(s.loc[m, "n_users"])})
    return pd.DataFrame(rows)


def among_new_items(scorer, fold: Fold):
    """A score function ranking the fold's new items only (every known item scores lowest).

    The cold-start protocol of the item-cold-start literature (e.g. Gantner et al., ICDM 2010):
    how well a scorer orders the new items among themselves, whatever its calibration against
    known items. Evaluate it on the users whose held-out items are new, e.g.
    ``evaluate(among_new_items(source, fold), fold, users=new_item_users)``.
    """
    from xrec.evaluate.evaluator import as_score_fn

    score_fn = as_score_fn(scorer, fold.n_users, fold.n_items)
    known = fold.item_train_counts > 0
    floor = np.float32(np.finfo(np.float32).min)

    def score(users: np.ndarray) -> np.ndarray:
        block = np.array(score_fn(users), dtype=np.float32, copy=True)
        block[:, known] = floor
        return block

    return score
