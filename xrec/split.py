"""Split a dataset into test and validation folds without leakage.

Every fold made here shares one user index (all users of the dataset, ids sorted as strings)
and the catalog's item index, so score blocks computed on one fold line up with any other.
"""

from __future__ import annotations

import math
import numbers
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from xrec.data.dataset import Dataset
from xrec._validation import check_int, check_number
from xrec.errors import ConfigError
from xrec.fold import Fold

__all__ = ["COLD_USER_RULES", "SPLIT_RULES", "SplitResult", "natural_order", "split_dataset"]

#: Names accepted by :func:`split_dataset` as ``rule``.
SPLIT_RULES = ("leave_last", "time_cutoff", "random", "cold_items", "mixed_last", "mixed_cutoff")

#: Names accepted as ``cold_users`` (what a mixed split does with held-out users who have no training rows).
COLD_USER_RULES = ("keep", "drop")

_QUANTILE = re.compile(r"^\s*q\s*(\d*\.?\d+)\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class SplitResult:
    """The folds of one split.

    Attributes
    ----------
    test
        ``train`` = every row not held out for test (the validation fold's train and held-out
        rows together); ``heldout`` = the test rows.
    validation
        ``train`` = the inner training rows; ``heldout`` = the validation rows, carved from
        ``test.train`` by the same rule. ``None`` when asked for no validation fold.
    settings
        Everything needed to reproduce the split: rule, parameters, seed, resolved cutoffs,
        row counts (including rows dropped), dataset name and fingerprint. Plain str / int /
        float / bool values only, so it can be written to a TOML file.
    """

    test: Fold
    validation: Fold | None
    settings: dict

    @property
    def folds(self) -> dict[str, Fold]:
        """``{"validation": ..., "test": ...}``, without validation when there is none."""
        out = {"validation": self.validation} if self.validation is not None else {}
        out["test"] = self.test
        return out


@dataclass(frozen=True)
class _Rows:
    """Interactions as positional arrays, ordered by user, time, item id."""

    user: np.ndarray  # int64 user index
    item: np.ndarray  # int64 catalog row
    item_rank: np.ndarray  # int64 rank of the item id in natural order (tie-break)
    time: np.ndarray  # float64 seconds
    weight: np.ndarray  # float32

    def take(self, mask_or_index: np.ndarray) -> _Rows:
        return _Rows(*(a[mask_or_index] for a in (self.user, self.item, self.item_rank, self.time, self.weight)))

    def __len__(self) -> int:
        return len(self.user)

    def frame(self) -> pd.DataFrame:
        return pd.DataFrame(
            {
                "user_idx": self.user.astype(np.int64),
                "item_idx": self.item.astype(np.int64),
                "timestamp": self.time.astype(np.float64),
                "weight": self.weight.astype(np.float32),
            }
        )


def split_dataset(
    dataset: Dataset,
    rule: str = "leave_last",
    *,
    validation: bool = True,
    seed: int = 0,
    test_fraction: float = 0.2,
    cutoff: float | str | None = None,
    cold_fraction: float = 0.1,
    min_train: int = 1,
    new_share: float | None = None,
    cold_users: str = "keep",
) -> SplitResult:
    """Hold out interactions for testing (and validation) by one of six rules.

    Parameters
    ----------
    dataset
        The data to split.
    rule
        - ``"leave_last"``: each user's latest interaction is held out (among equal timestamps,
          the greatest item id in natural order counts as latest, see :func:`natural_order`).
          Users with at most
          ``min_train`` interactions stay wholly in training.
        - ``"time_cutoff"``: one global cutoff time; rows at or after it are held out. Held-out
          rows of users left with fewer than ``min_train`` training rows are dropped (they would
          be cold users) and counted in ``settings``.
        - ``"random"``: each row is held out with probability ``test_fraction`` (seeded); a user
          keeps at least ``min_train`` training rows (the rows with the smallest draws are the
          ones held out), users with at most ``min_train`` rows stay wholly in training.
        - ``"cold_items"``: a seeded ``cold_fraction`` of the items that have interactions is
          removed from training; all their rows are held out. Held-out rows of users left with
          fewer than ``min_train`` training rows are dropped and counted.
        - ``"mixed_cutoff"`` (mixed protocol, known and new items held out together): one global
          cutoff as for ``"time_cutoff"``; items first seen at or after it are *new*: they never
          appear in training. Held-out users without training rows are *cold users*, handled
          by ``cold_users`` (never dropped silently). The validation fold is carved at the
          same share of rows; where its rows after the cutoff hold fewer new-item rows than the
          test split's share, the most recently introduced of its held-out items are made new
          too (as for ``"mixed_last"``) until the shares match, so the weights learned on
          validation see new items in the proportion the test split holds
          (``validation_new_share_natural``, ``validation_new_items_added_to_match``). Where the
          natural share is already higher, it is kept (at least the test share, never fewer).
        - ``"mixed_last"`` (mixed protocol, leave-last variant): each user's latest interaction
          is held out as for ``"leave_last"``; then the most recently introduced items among
          the held-out ones (latest first interaction first; ties in seeded random order) are
          made new until at least ``new_share`` of the held-out rows are on new items. The
          other rows of a new item leave the fold (counted as ``new_item_rows_removed``, and
          within ``dropped_rows``), so
          new items never appear in training. Cold users as for ``"mixed_cutoff"``.
    validation
        Also carve a validation fold from the test fold's training rows, by the same rule
        (same fraction / quantile; the validation draws use a seed derived from ``seed``).
    seed
        Seed of the random rules (``"random"``, ``"cold_items"``); recorded for all rules.
    test_fraction
        ``"random"``: share of rows held out. ``"time_cutoff"`` with ``cutoff=None``: share of
        the rows (in time order) after the cutoff.
    cutoff
        ``"time_cutoff"`` only. A float in (0, 1) or a string ``"q0.8"``: the share of rows, in
        time order, that stay before the cutoff (the cutoff is the timestamp of the first row
        past that share; ties stay together on the held-out side). Any other number: a timestamp
        in epoch seconds. Any other string (or a ``pandas.Timestamp`` / ``datetime``): a date,
        read by ``pandas.Timestamp`` and taken as UTC when it has no time zone. ``None``: the
        ``1 - test_fraction`` share. For validation, the same share is applied to the test
        fold's training rows; an absolute cutoff is turned into the share of rows before it.
    cold_fraction
        ``"cold_items"``: share of the items with interactions to make cold (at least one item).
    min_train
        Fewest training rows a user keeps (see each rule); at least 1.
    new_share
        ``"mixed_last"`` only: the share of held-out rows (test, and validation alike) that
        must be on new items, strictly between 0 and 1; default 0.2.
    cold_users
        Mixed rules only. ``"keep"`` (default): held-out rows of users without training rows
        stay and are scored by each scorer's own rule for a user with no history (popularity
        ranks by training counts; factor and profile sources give such a user a zero vector,
        hence flat scores, so a z-scored blend ranks them by its popularity term alone);
        ``"drop"``: those rows leave the fold. Either way ``settings`` counts them
        (``*_cold_users``, ``*_cold_user_rows``) and ``Fold.cold_users`` names them.

    Returns
    -------
    SplitResult

    Raises
    ------
    ConfigError
        On an unknown rule, a parameter out of range, a ``cutoff`` with a rule other than
        ``"time_cutoff"``, or a split that holds out nothing (or leaves no training rows).
    """
    if not isinstance(dataset, Dataset):
        raise ConfigError(f"dataset must be an xrec Dataset, got {type(dataset).__name__}")
    if rule not in SPLIT_RULES:
        raise ConfigError(f"rule must be one of {SPLIT_RULES}, got {rule!r}")
    if not isinstance(validation, (bool, np.bool_)):
        raise ConfigError(f"validation must be True or False, got {validation!r}")
    seed = check_int(seed, "seed", low=0)
    min_train = check_int(min_train, "min_train", low=1, expected="an integer >= 1")
    test_fraction = _check_fraction("test_fraction", test_fraction)
    cold_fraction = _check_fraction("cold_fraction", cold_fraction)
    if cutoff is not None and rule not in ("time_cutoff", "mixed_cutoff"):
        raise ConfigError(f"cutoff applies only to rule='time_cutoff' or 'mixed_cutoff', not rule={rule!r}")
    if new_share is not None and rule != "mixed_last":
        raise ConfigError(f"new_share applies only to rule='mixed_last', not rule={rule!r}")
    new_share = _check_fraction("new_share", 0.2 if new_share is None else new_share)
    if cold_users not in COLD_USER_RULES:
        raise ConfigError(f"cold_users must be one of {COLD_USER_RULES}, got {cold_users!r}")
    if cold_users != "keep" and not rule.startswith("mixed"):
        raise ConfigError(f"cold_users applies only to the mixed rules, not rule={rule!r}")
    mixed = {"new_share": new_share, "cold_users": cold_users}

    rows, user_ids = _positional(dataset)
    settings: dict = {
        "rule": rule,
        "seed": seed,
        "min_train": min_train,
        "validation": bool(validation),
        "dataset": dataset.name,
        "dataset_fingerprint": dataset.fingerprint(),
        "n_users": len(user_ids),
        "n_items": dataset.catalog.n_items,
        "n_interactions": len(rows),
    }
    if rule == "random":
        settings["test_fraction"] = test_fraction
    elif rule == "cold_items":
        settings["cold_fraction"] = cold_fraction
    elif rule in ("time_cutoff", "mixed_cutoff"):
        settings.update(_describe_cutoff(cutoff, test_fraction))
    if rule == "mixed_last":
        settings["new_share"] = new_share
    if rule.startswith("mixed"):
        settings["cold_users"] = cold_users

    test_seed, val_seed = (int(s.generate_state(1)[0]) for s in np.random.SeedSequence(seed).spawn(2))
    train, held, info = _apply(rule, rows, len(user_ids), test_seed, test_fraction, cutoff, cold_fraction, min_train, "test", mixed)
    settings.update({f"test_{k}": v for k, v in info.items()})
    val_fold = None
    if validation:
        share = info.get("share_before_cutoff")
        if rule == "mixed_cutoff":  # validation holds new items in the test split's proportion
            mixed = {**mixed, "match_share": info["new_share_achieved"]}
        inner, val_held, vinfo = _apply(
            rule, train, len(user_ids), val_seed, test_fraction, share if rule in ("time_cutoff", "mixed_cutoff") else cutoff,
            cold_fraction, min_train, "validation", mixed,
        )  # fmt: skip
        settings.update({f"validation_{k}": v for k, v in vinfo.items()})
        val_fold = Fold(dataset.catalog, user_ids, inner.frame(), val_held.frame(), settings={**settings, "part": "validation"})
    test_fold = Fold(dataset.catalog, user_ids, train.frame(), held.frame(), settings={**settings, "part": "test"})
    return SplitResult(test=test_fold, validation=val_fold, settings=settings)


# --- parameter checks ---------------------------------------------------------------------------


def _check_fraction(name: str, value) -> float:
    return check_number(value, name, low=0.0, high=1.0, low_open=True, high_open=True, expected="a number strictly between 0 and 1")


def _parse_cutoff(cutoff, test_fraction: float) -> tuple[str, float]:
    """``("share", q)`` for a share of rows before the cutoff, ``("time", seconds)`` for a timestamp."""
    if cutoff is None:
        return "share", 1.0 - test_fraction
    if isinstance(cutoff, (bool, np.bool_)):
        raise ConfigError(f"cutoff must be a share, a 'q0.8' quantile, a timestamp or a date, got {cutoff!r}")
    if isinstance(cutoff, numbers.Real):
        value = float(cutoff)
        if not math.isfinite(value):
            raise ConfigError(f"cutoff must be finite, got {cutoff!r}")
        return ("share", value) if 0.0 < value < 1.0 else ("time", value)
    if isinstance(cutoff, str) and (m := _QUANTILE.match(cutoff)):
        q = float(m.group(1))
        if not 0.0 < q < 1.0:
            raise ConfigError(f"cutoff quantile must be strictly between 0 and 1, got {cutoff!r}")
        return "share", q
    try:
        stamp = pd.Timestamp(cutoff)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"cutoff {cutoff!r} is neither a share, a 'q0.8' quantile, a timestamp nor a date") from exc
    if stamp is pd.NaT:
        raise ConfigError(f"cutoff {cutoff!r} is not a date")
    if stamp.tzinfo is None:
        stamp = stamp.tz_localize("UTC")
    return "time", float((stamp - pd.Timestamp(0, tz="UTC")) / pd.Timedelta(1, "s"))


def _describe_cutoff(cutoff, test_fraction: float) -> dict:
    kind, value = _parse_cutoff(cutoff, test_fraction)
    out: dict = {"cutoff_kind": kind, "cutoff_value": value}
    if cutoff is None:
        out["test_fraction"] = test_fraction
    else:
        # Recorded so that split_dataset(dataset, cutoff=<this>) gives the same split again.
        if isinstance(cutoff, str):
            out["cutoff"] = cutoff
        elif isinstance(cutoff, numbers.Real):
            out["cutoff"] = float(cutoff)
        else:
            out["cutoff"] = pd.Timestamp(cutoff).isoformat()
    return out


def natural_order(ids: np.ndarray) -> np.ndarray:
    """Positions that sort item ids in natural order (used to break timestamp ties).

    An id made only of the ASCII digits 0-9 compares as the whole number it spells
    (``"9" < "10"``); such numeric ids come before every other id, and the other ids
    compare as strings (by code point: ``"a10" < "a9"``). Numeric ids that spell the same
    number (``"7"``, ``"007"``) compare as strings. The sort is stable.
    """
    ids = np.asarray(ids).astype(str)

    def key(i: int) -> tuple:
        s = ids[i]
        if s.isascii() and s.isdigit():
            digits = s.lstrip("0")
            return (0, len(digits), digits, s)  # shorter numbers are smaller; no int() of huge ids
        return (1, 0, "", s)

    return np.array(sorted(range(len(ids)), key=key), dtype=np.int64)


# --- the rules ----------------------------------------------------------------------------------


def _positional(dataset: Dataset) -> tuple[_Rows, np.ndarray]:
    frame = dataset.interactions.frame
    user_ids, user = np.unique(frame["user"].to_numpy(dtype=str), return_inverse=True)
    ids = dataset.catalog.item_ids.astype(str)
    item = pd.Index(ids).get_indexer(frame["item"].to_numpy(dtype=str)).astype(np.int64)
    rank_of = np.empty(len(ids), dtype=np.int64)
    rank_of[natural_order(ids)] = np.arange(len(ids))
    rows = _Rows(
        user.astype(np.int64),
        item,
        rank_of[item],
        frame["timestamp"].to_numpy(dtype=np.float64),
        frame["weight"].to_numpy(dtype=np.float32),
    )
    order = np.lexsort((rows.item_rank, rows.time, rows.user))
    return rows.take(order), user_ids.astype(object)


def _apply(rule, rows: _Rows, n_users, seed, fraction, cutoff, cold_fraction, min_train, part, mixed) -> tuple[_Rows, _Rows, dict]:
    """Split ``rows`` (ordered by user, time, item id) into (train, held-out, counts)."""
    if len(rows) == 0:
        raise ConfigError(f"no training rows are left to carve the {part} split from; pass validation=False")
    if rule.startswith("mixed"):
        return _apply_mixed(rule, rows, n_users, seed, fraction, cutoff, min_train, part, **mixed)
    info: dict = {}
    if rule == "leave_last":
        held = _leave_last_mask(rows, n_users, min_train)
        dropped = np.zeros(len(rows), dtype=bool)
    elif rule == "random":
        draws = np.random.default_rng(seed).random(len(rows))
        counts = np.bincount(rows.user, minlength=n_users)
        # Rank of each draw within its user: lowest draws are held out first, so capping a user
        # at (count - min_train) held-out rows keeps exactly the draws that fell below `fraction`.
        by_draw = np.lexsort((draws, rows.user))
        starts = np.r_[0, np.cumsum(counts)[:-1]]
        rank = np.empty(len(rows), dtype=np.int64)
        rank[by_draw] = np.arange(len(rows)) - starts[rows.user[by_draw]]
        held = (draws < fraction) & (rank < counts[rows.user] - min_train)
        dropped = np.zeros(len(rows), dtype=bool)
    elif rule == "time_cutoff":
        held = _cutoff_mask(rows, cutoff, fraction, info)
        dropped = held & (np.bincount(rows.user[~held], minlength=n_users)[rows.user] < min_train)
    else:  # cold_items
        seen = np.unique(rows.item)
        n_cold = max(1, int(round(cold_fraction * len(seen))))
        if n_cold >= len(seen):
            raise ConfigError(f"cold_fraction={cold_fraction} would make all {len(seen)} items with interactions cold in the {part} split")
        cold = np.sort(np.random.default_rng(seed).choice(seen, size=n_cold, replace=False))
        held = np.isin(rows.item, cold)
        info["cold_items"] = int(n_cold)
        dropped = held & (np.bincount(rows.user[~held], minlength=n_users)[rows.user] < min_train)
    train = rows.take(~held)
    kept = rows.take(held & ~dropped)
    info.update({"train_rows": len(train), "heldout_rows": len(kept), "dropped_rows": int(dropped.sum())})
    info["heldout_users"] = int(len(np.unique(kept.user)))
    if len(train) == 0:
        raise ConfigError(f"the {part} split leaves no training rows ({_params(rule, fraction, cutoff, cold_fraction, min_train)})")
    if len(kept) == 0:
        hint = "; pass validation=False" if part == "validation" else ""
        raise ConfigError(f"the {part} split holds out no rows ({_params(rule, fraction, cutoff, cold_fraction, min_train)}){hint}")
    return train, kept, info


def _cutoff_mask(rows: _Rows, cutoff, fraction: float, info: dict) -> np.ndarray:
    """Rows at or after the global cutoff; records ``cutoff_time`` and ``share_before_cutoff`` in ``info``."""
    kind, value = _parse_cutoff(cutoff, fraction)
    if kind == "share":
        ordered = np.sort(rows.time, kind="stable")
        # Rounded first: 0.29 * 100 is 28.999999999999996 in floating point, not 29.
        position = min(int(math.floor(round(value * len(rows), 6))), len(rows) - 1)
        at = float(ordered[position])
    else:
        at = value
    held = rows.time >= at
    info["cutoff_time"] = at
    # What the validation carve reuses: the asked-for share, or for a fixed time the share
    # of rows that fell before it.
    info["share_before_cutoff"] = value if kind == "share" else float(1.0 - held.mean())
    return held


def _leave_last_mask(rows: _Rows, n_users: int, min_train: int) -> np.ndarray:
    counts = np.bincount(rows.user, minlength=n_users)
    last = np.r_[rows.user[1:] != rows.user[:-1], True]
    return last & (counts[rows.user] > min_train)


def _newest_until(rows: _Rows, held: np.ndarray, eligible: np.ndarray, share: float, seed: int, part: str, what: str) -> np.ndarray:
    """Item mask: the most recently introduced held-out items among ``eligible`` ones (latest first
    interaction first; ties in seeded random order), taken until their held-out rows, together with
    those already on new items (``held & ~eligible[item]``), are at least ``share`` of ``held``."""
    first_seen = np.full(len(eligible), np.inf)
    np.minimum.at(first_seen, rows.item, rows.time)
    already = int((held & ~eligible[rows.item]).sum())
    need = share * held.sum() - already
    new = np.zeros(len(eligible), dtype=bool)
    if need <= 0:
        return new
    candidates = np.unique(rows.item[held & eligible[rows.item]])
    per_item = np.bincount(rows.item[held], minlength=len(first_seen))[candidates]
    # newest first; equal first-seen times in seeded random order
    order = np.lexsort((np.random.default_rng(seed).random(len(candidates)), -first_seen[candidates]))
    reached = np.cumsum(per_item[order]) >= need
    n_new = int(np.argmax(reached)) + 1 if reached.any() else len(candidates)
    if n_new >= len(candidates):
        raise ConfigError(f"{what} would make every held-out item of the {part} split new")
    new[candidates[order[:n_new]]] = True
    return new


def _apply_mixed(rule, rows: _Rows, n_users, seed, fraction, cutoff, min_train, part, *, new_share, cold_users, match_share=None):
    """The mixed protocol: held-out rows on known and new items together (see :func:`split_dataset`).

    ``match_share`` (``"mixed_cutoff"`` validation): when the rows after the cutoff hold a
    smaller share on new items than this (the test split's), the most recently introduced
    known held-out items are made new too, until the share is matched.
    """
    info: dict = {}
    n_slots = int(rows.item.max()) + 1
    removed = np.zeros(len(rows), dtype=bool)  # rows of new items that are not held out
    if rule == "mixed_cutoff":
        held = _cutoff_mask(rows, cutoff, fraction, info)
        if match_share is not None and held.any():
            natural = np.zeros(n_slots, dtype=bool)  # items with no row before the cutoff
            natural[np.unique(rows.item[held])] = True
            natural[rows.item[~held]] = False
            info["new_share_natural"] = float(natural[rows.item[held]].mean())
            extra = _newest_until(rows, held, ~natural, match_share, seed, part, f"matching the test split's new share {match_share:.3f}")
            removed = extra[rows.item] & ~held
            info["new_items_added_to_match"] = int(extra.sum())
    else:
        held = _leave_last_mask(rows, n_users, min_train)
        if not held.any():
            raise ConfigError(f"the {part} split holds out no rows (rule='mixed_last', min_train={min_train})")
        new = _newest_until(rows, held, np.ones(n_slots, dtype=bool), new_share, seed, part, f"new_share={new_share}")
        removed = new[rows.item] & ~held
    in_train = ~held & ~removed
    has_train = np.bincount(rows.user[in_train], minlength=n_users) > 0
    cold = held & ~has_train[rows.user]
    train = rows.take(in_train)
    keep = held & ~cold if cold_users == "drop" else held
    kept = rows.take(keep)
    seen = np.zeros(max(n_slots, 1), dtype=bool)
    seen[train.item] = True
    is_new = ~seen[kept.item]
    info.update({
        "train_rows": len(train), "heldout_rows": len(kept), "dropped_rows": int(removed.sum()) + (int(cold.sum()) if cold_users == "drop" else 0),
        "heldout_users": int(len(np.unique(kept.user))), "new_items": int(len(np.unique(kept.item[is_new]))),
        "new_item_heldout_rows": int(is_new.sum()), "new_share_achieved": float(is_new.mean()) if len(kept) else 0.0,
        "new_item_rows_removed": int(removed.sum()), "cold_users": int(len(np.unique(rows.user[cold]))),
        "cold_user_rows": int(cold.sum()),
    })  # fmt: skip
    if len(train) == 0 or len(kept) == 0:
        what = "no training rows" if len(train) == 0 else "no held-out rows"
        raise ConfigError(f"the {part} split leaves {what} (rule={rule!r}, new_share={new_share}, cutoff={cutoff!r})")
    return train, kept, info


def _params(rule, fraction, cutoff, cold_fraction, min_train) -> str:
    if rule == "random":
        return f"rule='random', test_fraction={fraction}, min_train={min_train}"
    if rule == "time_cutoff":
        return f"rule='time_cutoff', cutoff={cutoff!r}, min_train={min_train}"
    if rule == "cold_items":
        return f"rule='cold_items', cold_fraction={cold_fraction}, min_train={min_train}"
    return f"rule='leave_last', min_train={min_train}"
