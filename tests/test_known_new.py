"""Known-item / new-item parts of a mixed split, checked against plain pandas and a hand-worked ranking."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from xrec.data.catalog import Catalog
from xrec.evaluate import evaluate
from xrec.evaluate.known_new import among_new_items, known_new_labels, known_new_table, restrict
from xrec.fold import Fold

COLS = ["user_idx", "item_idx", "timestamp", "weight"]


def _fold() -> Fold:
    # items 0-3 known (in training), 4-5 new; user 3 has no training rows (cold)
    train = [(0, 0), (0, 1), (1, 2), (1, 3), (2, 0), (2, 3)]
    held = [(0, 2), (1, 4), (2, 1), (2, 5), (3, 0)]
    frame = lambda rows: pd.DataFrame([(u, i, 1.0, 1.0) for u, i in rows], columns=COLS).astype({"user_idx": "int64", "item_idx": "int64"})  # noqa: E731
    return Fold(Catalog.from_ids([f"i{j}" for j in range(6)]), np.array(["a", "b", "c", "d"]), frame(train), frame(held))


def test_labels_follow_what_each_user_holds_out():
    fold = _fold()
    labels = known_new_labels(fold)
    # pandas reference: share of each user's held-out rows on items without training rows
    held = fold.heldout.assign(new=~fold.heldout["item_idx"].isin(fold.train["item_idx"]))
    share = held.groupby("user_idx")["new"].mean()
    expected = {0: "known items", 1: "new items", 2: "known and new", 3: "cold users"}
    assert labels.to_dict() == expected
    assert share[0] == 0 and share[1] == 1 and 0 < share[2] < 1
    assert fold.new_items.tolist() == [4, 5] and fold.cold_users.tolist() == [3]


def test_restrict_and_table_agree_with_a_groupby_of_the_per_user_table():
    fold = _fold()
    rng = np.random.default_rng(0)
    card = evaluate(rng.random((4, 6)).astype(np.float32), fold, ks=(2,), metrics=("hit_rate",), name="random")
    labels = known_new_labels(fold)
    table = known_new_table({"random": card}, labels, ("hit_rate@2",))
    by_pandas = card.per_user.assign(part=card.per_user["user"].map(labels)).groupby("part")["hit_rate@2"].mean()
    for _, row in table.iterrows():
        assert row["mean"] == pytest.approx(by_pandas[row["part"]])
    sub = restrict(card, [0, 2], "x")
    assert sub.per_user["user"].tolist() == [0, 2] and sub.name == "random [x]" and sub.list_metrics == {}


def test_among_new_items_ranks_only_the_new_items():
    fold = _fold()
    scores = np.zeros((4, 6), dtype=np.float32)
    scores[1] = [9, 9, 9, 9, 1, 2]  # known items score higher, but only new items compete
    card = evaluate(among_new_items(scores, fold), fold, users=np.array([1]), ks=(1, 2), metrics=("hit_rate",))
    # hand-worked: user 1 holds out item 4; among new items {4: 1, 5: 2} it ranks second
    assert card.per_user["hit_rate@1"].tolist() == [0.0] and card.per_user["hit_rate@2"].tolist() == [1.0]
    plain = evaluate(scores, fold, users=np.array([1]), ks=(2,), metrics=("hit_rate",))
    assert plain.per_user["hit_rate@2"].tolist() == [0.0]


def test_closing_note_names_the_side_not_won_and_why():
    from xrec._demo_cold import EXPORTED, closing_note

    def row(side, diff, lo, hi):
        return {"side": side, "candidate": EXPORTED, "baseline": "b", "metric": "hit_rate@10", "candidate_mean": 0.1 + diff,
                "baseline_mean": 0.1, "difference": diff, "ci_low": lo, "ci_high": hi, "n_users": 50}

    won = closing_note([row("known", 0.02, 0.01, 0.03), row("new", 0.05, 0.02, 0.08)])
    assert "both sides won" in won[0] and "not both" not in won[0]
    lost = closing_note([row("known", -0.03, -0.05, -0.01), row("new", 0.05, 0.02, 0.08)])
    assert "not both sides won" in lost[0] and "known side: NOT won, lost" in lost[1] and "new side: won" in lost[2]
    tie = closing_note([row("known", 0.01, -0.01, 0.03), row("new", 0.05, 0.02, 0.08)])
    assert "the CI includes 0" in tie[1]
