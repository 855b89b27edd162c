"""The item gallery (xrec.notebook.gallery): what it ranks, marks and draws, and its report section.

Data: the demo shop (its catalog has one PNG per item), split leave-last-out; sources are
popularity, a small ALS and attributes (no encoder needed, so the module stays fast).
"""

from __future__ import annotations

import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from xrec.blend import Blend
from xrec.bundle import top_k
from xrec.data.demo import load_demo_shop
from xrec.errors import ConfigError, DataError
from xrec.evaluate import evaluate
from xrec.evaluate.scorecard import Scorecard
from xrec.notebook.gallery import Gallery, choose_report_users, report_gallery
from xrec.sources import ALSSource, AttributeSource, PopularitySource
from xrec.split import split_dataset

from _synthetic import FixedScores, interaction_frame, synthetic_fold

WEIGHTS = {"pop": 0.2, "als": 0.7, "attributes": 0.4}


@pytest.fixture(scope="module")
def shop():
    dataset = load_demo_shop()
    fold = split_dataset(dataset, "leave_last", validation=False, seed=0).test
    sources = {
        "pop": PopularitySource().fit(fold),
        "als": ALSSource(factors=16, iterations=4, num_threads=1, random_state=0).fit(fold),
        "attributes": AttributeSource().fit(fold),
    }
    return dataset, fold, sources


@pytest.fixture()
def gallery(shop):
    dataset, fold, sources = shop
    return Gallery(sources, fold, dataset=dataset, baseline="als", weights=WEIGHTS, k=10, seed=1)


class _Tiles(HTMLParser):
    """Standard-library HTML parser (html.parser docs): tiles per strip, with their marks."""

    def __init__(self):
        super().__init__()
        self.part = None
        self.tiles: dict[str, list[tuple[str, set[str]]]] = {}
        self.roots: list[dict] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        cls = (a.get("class") or "").split()
        if "xrec-gallery" in cls:
            self.roots.append(a)
        for part in ("xrec-gallery-baseline", "xrec-gallery-blend"):
            if part in cls:
                self.part = part
        if "xrec-tile" in cls:
            self.tiles.setdefault(self.part or "above the lists", []).append((a["data-item"], a["data-marks"]))


def _parse(text: str) -> _Tiles:
    parser = _Tiles()
    parser.feed(text)
    return parser


@pytest.mark.parametrize("normalizer", ["zscore", "minmax", "rank", "none"])
def test_contributions_add_up_to_the_blend_score(shop, gallery, normalizer):
    dataset, fold, sources = shop
    gallery.show(normalizer=normalizer)
    view = gallery.view_
    reference = Blend(sources, WEIGHTS, normalizer).fit(fold).score(np.array([gallery.user_]))[0]
    items = view.blend.items
    summed = np.sum([view.blend.contributions[n] for n in WEIGHTS], axis=0)
    np.testing.assert_allclose(summed, reference[items], rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(view.blend.scores, reference[items], rtol=1e-6, atol=1e-6)
    # The top-K is the reference ranking over unseen items: numpy's stable argsort keeps tied
    # items in index order (numpy.argsort docs, kind="stable").
    seen = fold.train_matrix[gallery.user_].indices
    keyed = reference.astype(np.float64)
    keyed[seen] = -np.inf
    np.testing.assert_array_equal(items, np.argsort(-keyed, kind="stable")[:10])


def test_top_k_selection_matches_a_stable_sort_with_ties():
    rng = np.random.default_rng(0)
    for _ in range(50):
        scores = rng.integers(0, 4, size=40).astype(np.float32)  # many ties
        mask = rng.random(40) > 0.3
        k = int(rng.integers(1, 45))
        keyed = np.where(mask, scores.astype(np.float64), -np.inf)
        expected = np.argsort(-keyed, kind="stable")[: min(k, int(mask.sum()))]  # numpy.argsort docs
        np.testing.assert_array_equal(top_k(scores, mask, k), expected)


def test_hits_added_and_dropped_follow_the_fold_and_set_arithmetic(shop, gallery):
    _, fold, _ = shop
    for how in ("a hit", "a miss", "random"):
        gallery.pick(how)
        view = gallery.view_
        u = gallery.user_
        held = set(fold.heldout.loc[fold.heldout["user_idx"] == u, "item_idx"])  # pandas: the fold's held-out rows
        blend, base = list(view.blend.items), list(view.baseline.items)
        assert set(view.blend_hits) == held & set(blend)
        assert (len(view.blend_hits) > 0) == (how == "a hit") or how == "random"
        assert set(view.added) == set(blend) - set(base)
        assert set(view.dropped) == set(base) - set(blend)
        ids = fold.catalog.item_ids
        tiles = {part: [(item, set(marks.split())) for item, marks in found] for part, found in _parse(gallery.html()).tiles.items()}
        assert [t[0] for t in tiles["xrec-gallery-blend"]] == [ids[j] for j in blend]
        assert [t[0] for t in tiles["xrec-gallery-baseline"]] == [ids[j] for j in base]
        for part, own, other, moved in (("xrec-gallery-blend", blend, base, "added"), ("xrec-gallery-baseline", base, blend, "dropped")):
            for (item, marks), j in zip(tiles[part], own, strict=True):
                assert ("hit" in marks) == (j in held)
                assert (moved in marks) == (j not in other)
                assert ("new" in marks) == (fold.item_train_counts[j] == 0)
        # Held-out items (after the history) carry their place in each list: "blend #3", "als #7".
        held_tiles = _parse(gallery.html()).tiles["above the lists"][-len(held):]
        for (item, marks), j in zip(held_tiles, sorted(held, key=lambda j: list(view.heldout).index(j)), strict=True):
            assert item == ids[j]
            for name, own in (("blend", blend), ("als", base)):
                placed = [m for m in marks.split() if m.startswith(f"{name}_#")]
                assert placed == ([f"{name}_#{own.index(j) + 1}"] if j in own else [])


def test_history_is_the_training_rows_most_recent_first(shop, gallery):
    _, fold, _ = shop
    u = gallery.user_
    rows = fold.train[fold.train["user_idx"] == u].sort_values("timestamp", ascending=False, kind="mergesort")
    expected = rows.drop_duplicates("item_idx")["item_idx"].to_numpy()  # pandas reference
    np.testing.assert_array_equal(gallery.view_.history, expected)
    shown = min(len(expected), gallery.style.history_max)
    assert f"{shown} of {len(expected)} items" in gallery.html()


def test_source_name_baseline_ranks_like_the_source_alone(shop, gallery):
    _, fold, sources = shop
    raw = sources["als"].score(np.array([gallery.user_]))[0].astype(np.float64)
    raw[fold.train_matrix[gallery.user_].indices] = -np.inf
    np.testing.assert_array_equal(gallery.view_.baseline.items, np.argsort(-raw, kind="stable")[:10])
    assert list(gallery.view_.baseline.contributions) == ["als"]


def test_a_fitted_blend_as_baseline_shows_its_contributions(shop):
    dataset, fold, sources = shop
    other = Blend(sources, {"pop": 1.0, "als": 0.0, "attributes": 1.0}, "minmax").fit(fold)
    g = Gallery(sources, fold, dataset=dataset, baseline=other, weights=WEIGHTS, seed=2)
    ref = other.score(np.array([g.user_]))[0]
    base = g.view_.baseline
    np.testing.assert_allclose(np.sum(list(base.contributions.values()), axis=0), ref[base.items], rtol=1e-5, atol=1e-5)
    assert set(base.contributions) == {"pop", "attributes"}  # weight 0 is not scored, as in Blend.score


def test_revision_grows_with_every_redraw_and_user_ids_are_found(shop, gallery):
    _, fold, _ = shop
    first = int(_parse(gallery.html()).roots[0]["data-revision"])
    gallery.show(weights={"als": 0.1})
    gallery.show(fold.user_ids[5])
    root = _parse(gallery.html()).roots[0]
    assert int(root["data-revision"]) == first + 2 == gallery.revision_
    assert root["data-user"] == str(fold.user_ids[5]) and gallery.user_ == 5
    assert gallery.weights["als"] == 0.1 and gallery.weights["pop"] == WEIGHTS["pop"]


def test_segment_picks_come_from_the_segment(shop, gallery):
    from xrec.evaluate.segments import segment_labels

    _, fold, _ = shop
    labels = segment_labels(fold, "item_segment")
    assert "held-out item: head" in gallery.segments
    for _ in range(3):
        gallery.pick("held-out item: head")
        assert labels[gallery.user_] == "head"


def test_bad_input_is_refused_with_xrec_errors(shop, gallery):
    dataset, fold, sources = shop
    with pytest.raises(DataError, match="not in the fold"):
        gallery.show("nobody")
    with pytest.raises(ConfigError, match="baseline"):
        Gallery(sources, fold, baseline="image")
    with pytest.raises(ConfigError, match="k"):
        gallery.show(k=0)
    with pytest.raises(ConfigError, match="weights"):
        gallery.show(weights={"pop": 0, "als": 0, "attributes": 0})
    with pytest.raises(ConfigError, match="pick"):
        gallery.pick("someone")
    with pytest.raises(ConfigError, match="not fitted"):
        Gallery({"pop": PopularitySource()}, fold)
    with pytest.raises(ConfigError, match="baseline is not fitted"):
        Gallery(sources, fold, baseline=Blend(sources, WEIGHTS))
    assert gallery.weights == WEIGHTS  # a refused show changes nothing


def _card(name, values):
    return Scorecard(name=name, per_user=pd.DataFrame({"user": np.arange(len(values)), "ndcg@10": values}))


def test_report_rule_picks_wins_losses_and_new_item_users_ties_by_user_id():
    # Users u0..u7; i0 and i2 are trained, i1 never is (a new item): u5, u6, u7 hold out i1.
    train = interaction_frame([*range(8), 7], [0] * 8 + [2])
    fold = synthetic_fold(8, 3, train, interaction_frame(np.arange(8), [2, 2, 2, 2, 2, 1, 1, 1]))
    blend = _card("blend", [1.0, 0.5, 1.0, 0.0, 0.2, 0.3, 0.0, 0.1])
    base = _card("base", [0.0, 0.0, 0.0, 0.5, 0.2, 0.3, 0.4, 0.1])
    chosen = choose_report_users(fold, blend, base, metric="ndcg@10")
    # Worked by hand: differences +1, +.5, +1, -.5, 0, 0, -.4, 0; wins u0, u2 (tie at +1: lower id first),
    # losses u3 (-.5) then u6 (-.4); new-item users left: u5, u7 (both 0: by id).
    assert chosen["user_id"].tolist() == ["u0", "u2", "u3", "u6", "u5", "u7"]
    assert chosen["reason"].tolist() == ["biggest win"] * 2 + ["biggest loss"] * 2 + ["new-item case"] * 2
    np.testing.assert_allclose(chosen["difference"], [1.0, 1.0, -0.5, -0.4, 0.0, 0.0])
    with pytest.raises(ConfigError, match="recall@5"):
        choose_report_users(fold, blend, base, metric="recall@5")


def test_report_section_is_self_contained_with_thumbnails(shop):
    dataset, fold, sources = shop
    g = Gallery(sources, fold, dataset=dataset, baseline="als", weights=WEIGHTS)
    blend_card = evaluate(Blend(sources, WEIGHTS, "zscore").fit(fold), fold, ks=(10,), name="blend")
    base_card = evaluate(sources["als"], fold, ks=(10,), name="als")
    text = report_gallery(g, blend_card, base_card)
    chosen = choose_report_users(fold, blend_card, base_card)
    parsed = _parse(text)
    assert [r["data-user"] for r in parsed.roots] == [str(u) for u in chosen["user_id"]]
    from xrec.evaluate.known_new import known_new_labels

    n_new = int((known_new_labels(fold) == "new items").sum())  # this split holds few new-item users
    assert chosen["reason"].value_counts().to_dict() == {"biggest win": 2, "biggest loss": 2, "new-item case": min(2, n_new)}
    assert "data-revision" not in text  # static panels
    assert re.search(r'<img src="data:image/(webp|png);base64,', text)
    assert not re.search(r"https?://", text), "the report section must not load anything"
    assert "<script" not in text
    srcs = re.findall(r'src="([^"]*)"', text)
    assert srcs and all(s.startswith("data:image/") for s in srcs)
    assert "ties are broken by user id" in text
    # Evaluated here when no scorecards are given: the same users.
    assert report_gallery(g).count('class="xrec-gallery"') == len(chosen)


def test_items_without_pictures_get_text_tiles():
    fold = synthetic_fold(3, 6, interaction_frame([0, 1, 2], [0, 1, 2]), interaction_frame([0, 1, 2], [3, 4, 5]))
    raw = np.arange(18, dtype=np.float32).reshape(3, 6)
    sources = {"a": FixedScores(raw).fit(fold), "b": FixedScores(-raw).fit(fold)}
    g = Gallery(sources, fold, weights={"a": 1.0, "b": 0.5}, k=3, user="u1")
    assert g.user_ == 1 and "<img" not in g.html() and 'class="xrec-no-image"' in g.html()


def test_widget_picker_and_revision(shop, gallery):
    pytest.importorskip("ipywidgets")
    panel = gallery.widget
    assert "xrec-gallery-panel" in panel._dom_classes
    before = gallery.revision_
    gallery.picker.value = "a miss"  # choosing an entry shows a user at once
    assert gallery.revision_ == before + 1 and len(gallery.view_.blend_hits) == 0
    gallery.picker.value = "user id"
    gallery.user_box.value = "no such user"
    gallery.next_button.click()
    assert "not in the fold" in gallery.status.value and gallery.revision_ == before + 1
    gallery.user_box.value = str(shop[1].user_ids[7])
    gallery.next_button.click()
    assert gallery.user_ == 7 and gallery.status.value == ""
    assert f'data-revision="{gallery.revision_}"' in gallery._panel.value
    bundle = gallery._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in bundle
    still = bundle["text/html"]
    assert still == gallery.static_html_ and "data-revision" not in still
    assert _parse(still).tiles == _parse(gallery.html()).tiles  # the same lists, without the live revision


def test_gallery_follows_the_mixer(shop):
    pytest.importorskip("ipywidgets")
    from xrec.notebook import WeightMixer

    dataset, fold, sources = shop
    mixer = WeightMixer(sources, fold, baseline="pop", ks=(10, 20), dataset=dataset, weights=WEIGHTS, sample_size=150, seed=3)
    g = Gallery(sources, fold, dataset=dataset, seed=4).follow(mixer)
    assert g.weights == WEIGHTS and g.baseline_name == "pop"
    revisions = [g.revision_]

    def then(action):
        action()
        assert mixer.wait(timeout=120)  # slider moves are drawn (and the gallery called) on the mixer's thread
        revisions.append(g.revision_)

    then(lambda: setattr(mixer.sliders["als"], "value", 0.9))
    assert g.weights["als"] == 0.9
    then(lambda: setattr(mixer.normalizer_menu, "value", "rank"))
    assert g.normalizer == "rank"
    then(lambda: setattr(mixer.k_menu, "value", 20))
    assert g.k == 20 and len(g.view_.blend.items) == 20
    then(mixer.pin_baseline)
    # The pinned blend is the current one: the two lists are the same, nothing added or dropped.
    assert g.baseline_name.startswith("pinned blend") and len(g.view_.added) == len(g.view_.dropped) == 0
    then(mixer.unpin_baseline)
    assert g.baseline_name == "pop"
    assert np.all(np.diff(revisions) == 1), revisions
    ref = Blend(sources, mixer.weights, "rank").fit(fold).score(np.array([g.user_]))[0]
    np.testing.assert_allclose(g.view_.blend.scores, ref[g.view_.blend.items], rtol=1e-6, atol=1e-6)
    with pytest.raises(ConfigError, match="sources"):
        Gallery({"pop": sources["pop"], "als": sources["als"]}, fold).follow(mixer)


def test_row_cache_stays_within_its_budget_and_gives_the_same_rows(shop, monkeypatch):
    import xrec.notebook._gallery_rank as rank

    _, fold, sources = shop
    reference = rank.RowCache(sources, fold).rows(np.arange(12), "zscore")
    # A catalog this size under a budget of 3 users' rows: 3 kept, batches of 3.
    monkeypatch.setattr(rank, "CELL_BUDGET", 3 * len(sources) * fold.n_items)
    small = rank.RowCache(sources, fold)
    assert small.max_users == small.users_within_budget == 3
    rows, mask = small.rows(np.arange(12), "zscore")
    assert len(small._rows) == 3
    for name in sources:
        np.testing.assert_array_equal(rows[name], reference[0][name])
    np.testing.assert_array_equal(mask, reference[1])


def test_display_adds_a_still_picture_that_code_keeps_current(shop, gallery, monkeypatch):
    pytest.importorskip("ipywidgets")
    import IPython.display

    shown, updated = [], []
    monkeypatch.setattr(IPython.display, "display", lambda obj, **kw: shown.append((obj, kw)))
    monkeypatch.setattr(IPython.display, "update_display", lambda obj, **kw: updated.append((obj, kw)))
    gallery._ipython_display_()
    assert shown[0][0] is gallery.widget
    picture, options = shown[1]
    assert options["raw"] and "xrec-gallery-static" in picture["text/html"]
    assert "data-revision" not in picture["text/html"]  # the browser test watches the live panel only
    gallery.show(shop[1].user_ids[3])
    last = updated[-1]
    assert last[1]["display_id"] == options["display_id"]
    assert f'data-user="{shop[1].user_ids[3]}"' in last[0]["text/html"]
