"""Which user the gallery shows: by id, at random, a hit, a miss, a segment; and the report's rule."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from xrec.bundle import top_k
from xrec.errors import ConfigError, DataError
from xrec.fold import Fold
from xrec.notebook._gallery_rank import RowCache, user_heldout

__all__ = ["PICKS", "REPORT_RULE", "choose_report_users", "find_user", "pick_by_outcome", "segment_groups"]

#: Picker entries that are not segments.
PICKS = ("random", "a hit", "a miss")
#: The rule :func:`choose_report_users` applies, as the report states it.
REPORT_RULE = (
    "the {wins} users with the largest per-user gain in {metric} of the blend over the baseline, the {losses} with "
    "the largest loss, and the {new} users whose held-out items are all new items (never in training) with the "
    "largest gain among those not already shown; ties are broken by user id (ascending)"
)
_BATCH = 32


def find_user(fold: Fold, user_id: Any) -> int:
    """The index of the external ``user_id`` (also matched as text, so a typed ``"17"`` finds user 17)."""
    ids = pd.Index(fold.user_ids)
    try:
        pos = int(ids.get_indexer([user_id])[0])
    except (TypeError, ValueError):
        pos = -1
    if pos < 0:
        text = str(user_id).strip()
        matches = np.flatnonzero(np.asarray([str(u) for u in fold.user_ids], dtype=object) == text)
        pos = int(matches[0]) if matches.size else -1
    if pos < 0:
        raise DataError(f"user {user_id!r} is not in the fold (it has {len(ids)} users, e.g. {[str(u) for u in ids[:3]]})")
    return pos


def segment_groups(fold: Fold) -> dict[str, np.ndarray]:
    """Picker label -> evaluated users, for the held-out item's segment and the history length.

    Labels come from :func:`xrec.evaluate.segments.segment_labels` (``item_segment``: new / tail /
    head; ``user_segment``: training-history buckets), e.g. ``"held-out item: new"``, ``"history: 1-4"``.
    """
    from xrec.evaluate.segments import segment_labels, segment_order

    out: dict[str, np.ndarray] = {}
    if len(fold.eval_users) == 0:
        return out
    for by, prefix in (("item_segment", "held-out item"), ("user_segment", "history")):
        labels = segment_labels(fold, by)
        for label in segment_order(labels.to_numpy()):
            out[f"{prefix}: {label}"] = labels.index[labels.to_numpy() == label].to_numpy(dtype=np.int64)
    return out


def pick_by_outcome(
    cache: RowCache, weights: Mapping[str, float], normalizer: str, k: int, *, hit: bool, rng: np.random.Generator
) -> int | None:
    """A random evaluated user whose blend top-``k`` does (``hit``) or does not hold a held-out item.

    Users are tried in a seeded random order, a batch at a time; ``None`` when no user qualifies.
    """
    users = rng.permutation(cache.fold.eval_users)
    step = min(_BATCH, cache.users_within_budget)
    for lo in range(0, len(users), step):
        batch = users[lo : lo + step]
        _, total, mask = cache.weighted(batch, weights, normalizer)
        for row, u in enumerate(batch):
            found = np.isin(top_k(total[row], mask[row], k), user_heldout(cache.fold, int(u))).any()
            if bool(found) == hit:
                return int(u)
    return None


def choose_report_users(
    fold: Fold,
    blend_card: Any,
    baseline_card: Any,
    *,
    metric: str = "ndcg@10",
    wins: int = 2,
    losses: int = 2,
    new: int = 2,
) -> pd.DataFrame:
    """The users a report gallery shows, by the stated rule :data:`REPORT_RULE`.

    Parameters
    ----------
    fold
        The fold both scorecards were evaluated on.
    blend_card, baseline_card
        :class:`~xrec.evaluate.Scorecard` of the blend and of the baseline; users evaluated by both count.
    metric
        Per-user column compared (``"metric@K"``).
    wins, losses, new
        How many users of each kind. Fewer are shown when fewer qualify: a win needs a positive
        difference, a loss a negative one; the new-item users may have any difference.

    Returns
    -------
    pandas.DataFrame
        One row per chosen user, in the order wins, losses, new-item users: ``user`` (index),
        ``user_id``, ``reason``, ``blend``, ``baseline``, ``difference``.
    """
    from xrec.evaluate.known_new import known_new_labels

    for name, card in (("blend_card", blend_card), ("baseline_card", baseline_card)):
        if metric not in getattr(card, "per_user", pd.DataFrame()).columns:
            raise ConfigError(f"{name}: no per-user column {metric!r}; evaluate it with that metric and cut-off")
    for n, what in ((wins, "wins"), (losses, "losses"), (new, "new")):
        if not isinstance(n, (int, np.integer)) or isinstance(n, bool) or n < 0:
            raise ConfigError(f"{what} must be a non-negative integer, got {n!r}")
    frame = pd.merge(
        blend_card.per_user[["user", metric]].rename(columns={metric: "blend"}),
        baseline_card.per_user[["user", metric]].rename(columns={metric: "baseline"}),
        on="user",
    )
    if frame.empty:
        raise DataError("the two scorecards share no user; evaluate them on the same fold")
    frame["user_id"] = fold.user_ids[frame["user"].to_numpy()]
    frame["difference"] = frame["blend"] - frame["baseline"]
    parts = known_new_labels(fold)
    frame["new_items"] = frame["user"].map(parts).eq("new items").to_numpy()

    def best(rows: pd.DataFrame, n: int, ascending: bool) -> pd.DataFrame:
        ordered = rows.sort_values(["difference", "user_id"], ascending=[ascending, True], kind="mergesort")
        return ordered.head(n)

    chosen = [
        best(frame[frame["difference"] > 0], wins, False).assign(reason="biggest win"),
        best(frame[frame["difference"] < 0], losses, True).assign(reason="biggest loss"),
    ]
    taken = set(pd.concat(chosen)["user"].tolist())
    rest = frame[frame["new_items"] & ~frame["user"].isin(taken)]
    chosen.append(best(rest, new, False).assign(reason="new-item case"))
    out = pd.concat(chosen, ignore_index=True)
    return out[["user", "user_id", "reason", "blend", "baseline", "difference"]]
