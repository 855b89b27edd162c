"""The main job on the demo shop: encode, fit, learn blend weights, evaluate, compare, report.

``xrec demo`` runs :func:`run_demo`. Every step uses the public pieces of xrec, so the
code doubles as a worked example of a full study:

1. load the demo shop and split it by the mixed protocol (``mixed_last``: latest purchase
   held out, the most recently introduced items made new until 20% of the held-out
   purchases are on new items; validation carved from training the same way);
2. fit every source twice: on the validation fold's training rows (to choose weights)
   and on the test fold's training rows (to report); the mapped source's
   ``new_item_scale`` is chosen on the validation split by the two-sided objective (its
   worse side, known-item or new-item users, relative to the best scale on that side);
3. learn blend weights on the validation split (coordinate ascent, corners included),
   then popularity-gated weights starting from them with the two-sided objective
   (``objective="sides"``: the maximin gain over known-item and new-item validation users,
   the known side against its best single source, the new side against its best content-only
   source, as the comparisons below), so the new-item band is learned on the
   validation split's new items (their count is reported) without the known side outvoting it;
4. evaluate every single source, the learned blend, the gated blend and reciprocal rank
   fusion on the test split (full ranking) and compare them, paired, with the best single
   source (chosen on validation) and with popularity; then side by side on known-item and
   new-item users: the blends against the best single source on known items and the best
   content-only source on new items (both chosen on validation), and the mapped source
   against attributes and text on new items (full ranking, and among new items only);
5. explain: hit rate per planted taste (which signal finds which taste);
6. write ``scorecards.json``, ``blend.toml`` (the gated blend), ``report.html`` and ``bundle/`` (the blend file
   with every learned artifact, servable by ``xrec serve``) to the output folder.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from xrec._files import write_text_atomic
from xrec._jsonable import json_default
from xrec.errors import ConfigError

#: The sources of the demo: name -> (kind, settings).
DEMO_SOURCES: dict[str, tuple[str, dict[str, Any]]] = {
    "popularity": ("popularity", {}),
    "als": ("als", {"factors": 48, "iterations": 15, "regularization": 0.05, "random_state": 0}),
    "attributes": ("attributes", {}),
    "text": ("text", {"columns": ["name", "description"], "center": True}),
    "image": ("image", {"center": True}),
    "mapped": ("mapped_factors", {"modalities": ["attributes", "text", "image"], "text_columns": ["name", "description"],
                                  "als": {"factors": 48, "iterations": 15, "regularization": 0.05, "random_state": 0}}),
}
#: Sources that read content only (no interactions): the new-item side is compared with the best of them.
CONTENT_SOURCES = ("attributes", "text", "image")
#: The mixed protocol of the demo: leave-last, with this share of the held-out rows on new items.
NEW_SHARE = 0.2
#: Candidate ``new_item_scale`` of the mapped source, chosen on the validation split (two-sided objective).
MAPPED_SCALES = (1.0, 1.5, 2.0, 3.0, 4.0, 6.0)
#: What the gated search and the mapped source's scale maximize: the worse side's gain, known vs new items
#: (:func:`xrec.blend.gating.learn_gated_weights`, ``objective="sides"``).
OBJECTIVE = "sides"
METRIC = "ndcg@10"
KS = (10, 20)
TASTE_SIGNAL = {"look": "image", "theme": "text", "spec": "attributes", "circle": "collaborative", "noise": "none"}


class _Clock:
    """Prints each step with its duration, so a user sees where the time goes."""

    def __init__(self, enabled: bool) -> None:
        self.enabled = enabled
        self.start = time.perf_counter()
        self.steps: dict[str, float] = {}

    @contextmanager
    def step(self, label: str) -> Iterator[None]:
        t0 = time.perf_counter()
        if self.enabled:
            print(f"- {label} ...", flush=True)
        try:
            yield
        finally:
            self.steps[label] = time.perf_counter() - t0
        if self.enabled:  # reached only when the step did not raise
            print(f"  done in {self.steps[label]:.1f} s", flush=True)

    @property
    def total(self) -> float:
        return time.perf_counter() - self.start


def _fit_sources(fold, cache_dir: str | None, progress: bool) -> dict[str, Any]:
    from xrec.sources import make_source

    fitted = {}
    for name, (kind, settings) in DEMO_SOURCES.items():
        params = dict(settings)
        if kind in ("text", "image", "mapped_factors"):
            params.update(cache_dir=cache_dir, progress=progress)
        fitted[name] = make_source(kind, **params).fit(fold)
    return fitted


def _taste_hit_rates(cards: dict[str, Any], fold, truth: dict, k: int = 10) -> pd.DataFrame:
    """Hit rate@k per planted taste kind: each test user's held-out purchase has a known reason."""
    from xrec.evaluate._stats import wilson_interval

    held = fold.heldout[["user_idx", "item_idx"]].copy()
    held["user"] = fold.user_ids[held["user_idx"].to_numpy()]
    held["item"] = fold.catalog.item_ids[held["item_idx"].to_numpy()]
    reasons = truth["purchases"].rename(columns={"shopper_id": "user", "item_id": "item"})
    held = held.merge(reasons, on=["user", "item"], how="left")
    reason_of_user = held.groupby("user_idx")["reason"].first()
    rows = []
    for name, card in cards.items():
        per_user = card.per_user.set_index("user")[f"hit_rate@{k}"]
        joined = pd.DataFrame({"hit": per_user, "reason": reason_of_user.reindex(per_user.index)}).dropna()
        for reason, group in joined.groupby("reason"):
            hits, n = np.array([group["hit"].sum()]), np.array([len(group)])
            lo, hi = wilson_interval(hits, n)
            rows.append({
                "scorer": name, "taste": f"{reason} ({TASTE_SIGNAL.get(reason, '?')})", "hit_rate": float(hits[0] / n[0]),
                "ci_low": float(lo[0]), "ci_high": float(hi[0]), "n": int(n[0]),
            })
    return pd.DataFrame(rows)


def _taste_chart(frame: pd.DataFrame, k: int):
    import altair as alt

    base = alt.Chart(frame).encode(
        y=alt.Y("scorer:N", title=None), color=alt.Color("scorer:N", legend=None),
    )
    bars = base.mark_bar().encode(
        x=alt.X("hit_rate:Q", title=f"hit rate@{k}"),
        tooltip=["scorer", "taste", alt.Tooltip("hit_rate:Q", format=".3f"), "n"],
    )
    rules = base.mark_rule().encode(x="ci_low:Q", x2="ci_high:Q")
    return (bars + rules).properties(width=220, height=140).facet(
        facet=alt.Facet("taste:N", title="the planted taste behind the held-out purchase"), columns=3
    ).properties(title="Which signal finds which taste")


def run_demo(
    output: str | Path = "xrec-out",
    shop: str | Path | None = None,
    *,
    progress: bool = True,
    quick: bool = False,
    cache_dir: str | None = None,
    seed: int = 0,
) -> dict[str, Any]:
    """Run the whole product on the demo shop and write scorecards, blend file and report.

    Parameters
    ----------
    output
        Folder for ``scorecards.json``, ``blend.toml``, ``report.html`` and ``bundle/`` (created).
    shop
        Demo shop folder; default the one shipped in the repository.
    progress
        Print steps and show progress bars.
    quick
        A smaller weight search (for smoke tests); the numbers are less tuned.
    cache_dir
        Embedding cache folder (default: ``$XREC_CACHE_DIR``, else ``.xrec-cache``).
    seed
        Seed of the split, the searches and the resampling.

    Returns
    -------
    dict
        Paths written, the chosen weights, headline numbers and step timings.
    """
    from xrec.blend import Blend, ReciprocalRankFusion
    from xrec.blend.engine import BlendEngine
    from xrec.blend.gating import GatedBlend, learn_gated_weights
    from xrec.blend.learn import learn_weights
    from xrec.data.demo import demo_shop_truth, load_demo_shop
    from xrec.evaluate import compare, evaluate
    from xrec._demo_cold import best_on, side_comparisons
    from xrec.evaluate.known_new import among_new_items, known_new_labels, known_new_table
    from xrec.sources.mapped import choose_new_item_scale
    from xrec.split import split_dataset

    out = Path(output)
    if out.exists() and not out.is_dir():
        raise ConfigError(f"output {str(out)!r} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    clock = _Clock(progress)

    with clock.step("loading the demo shop (mixed split: known and new items held out together)"):
        dataset = load_demo_shop(shop)
        truth = demo_shop_truth(shop)
        split = split_dataset(dataset, "mixed_last", validation=True, seed=seed, new_share=NEW_SHARE)
    with clock.step("fitting sources on the validation split (encodes images and text, cached)"):
        valid_sources = _fit_sources(split.validation, cache_dir, progress)
        scale, scale_table = choose_new_item_scale(valid_sources["mapped"], split.validation, MAPPED_SCALES, metric=METRIC,
                                                   objective=OBJECTIVE)
        valid_sources["mapped"] = valid_sources["mapped"].with_new_item_scale(scale)
    with clock.step("fitting sources on the test split"):
        test_sources = _fit_sources(split.test, cache_dir, progress)
        test_sources["mapped"] = test_sources["mapped"].with_new_item_scale(scale)

    with clock.step("learning blend weights on the validation split"):
        valid_engine = BlendEngine(valid_sources, split.validation, "zscore", ks=(10,), metric=METRIC).prepare()
        test_engine = BlendEngine(test_sources, split.test, "zscore", ks=(10,), metric=METRIC).prepare()
        options = {"n_restarts": 1, "max_sweeps": 3} if quick else {"n_restarts": 4}
        learned = learn_weights(valid_engine, method="coordinate_ascent", seed=seed, test_fold=split.test, progress=progress,
                                test_sources=test_sources, **options)
        gated = learn_gated_weights(valid_engine, start=learned.weights, seed=seed, test_engine=test_engine, progress=progress,
                                    objective=OBJECTIVE, side_baselines={"new": list(CONTENT_SOURCES)},
                                    **({"n_restarts": 0, "max_sweeps": 2} if quick else {}))
        # which single source is best on known items, and which content source on new items: chosen on validation
        valid_parts = known_new_labels(split.validation)
        valid_cards = {n: evaluate(src, split.validation, ks=(10,), metrics=("ndcg",), name=n) for n, src in valid_sources.items()}
        best_known = best_on(valid_cards, valid_parts, "known items", list(valid_sources))
        best_content_new = best_on(valid_cards, valid_parts, "new items", list(CONTENT_SOURCES))

    with clock.step("evaluating on the test split (full ranking), known and new items apart"):
        best_single = learned.best_single[0]
        blend = Blend(test_sources, learned.weights, "zscore").fit(split.test)
        gated_blend = GatedBlend(test_sources, gated.band_weights, "zscore", head_min=int(gated.details["head_min"])).fit(split.test)
        rrf = ReciprocalRankFusion(test_sources).fit(split.test)
        scorers: dict[str, Any] = {**test_sources, "learned blend": blend, "gated blend": gated_blend, "rank fusion": rrf}
        cards = {name: evaluate(s, split.test, ks=KS, name=name) for name, s in scorers.items()}
        vs_best = compare(cards[best_single], cards["learned blend"], cards["gated blend"], cards["rank fusion"], seed=seed)
        vs_pop = compare(cards["popularity"], cards["learned blend"], cards[best_single], seed=seed)
        parts = known_new_labels(split.test)
        part_table = known_new_table(cards, parts, ("hit_rate@10", METRIC), seed=seed)
        new_users = parts.index[parts == "new items"].to_numpy()
        among_new = {n: evaluate(among_new_items(test_sources[n], split.test), split.test, users=new_users, ks=(10,),
                                 metrics=("hit_rate", "ndcg"), name=f"{n} [among new items]") for n in (*CONTENT_SOURCES, "mapped")}
        sides = side_comparisons(cards, parts, best_known, best_content_new, seed, among_new)

    with clock.step("explaining: tastes"):
        tastes = _taste_hit_rates(cards, split.test, truth)

    with clock.step("writing scorecards, blend file and report"):
        study = {"parts": part_table, "sides": sides, "best_known": best_known, "best_content_new": best_content_new,
                 "mapped_scale": scale, "mapped_scales": scale_table, "mapped_choice": test_sources["mapped"].chosen,
                 "part_counts": parts.value_counts().to_dict(),
                 "validation_new": {k: split.settings[f"validation_{k}"] for k in ("new_items", "new_item_heldout_rows")}}
        paths = _write_outputs(
            out, dataset, split, cards, learned, gated, vs_best, vs_pop, tastes, study, gated_blend, best_single,
            dataset_load=_load_hints(shop),
        )

    summary = _summary(cards, learned, gated, vs_best, best_single, paths, clock, study)
    if progress:
        print(summary_text(summary))
    return summary


def _load_hints(shop: str | Path | None) -> dict[str, str]:
    """``[dataset.load]`` of the blend file: a shop other than the shipped one is named, so
    ``xrec recommend`` loads the data the blend was made on."""
    hints = {"dataset": "demo_shop"}
    if shop is not None:
        hints["folder"] = str(Path(shop).resolve())
    return hints


def _write_outputs(out, dataset, split, cards, learned, gated, vs_best, vs_pop, tastes, study, blend, best_single, *,
                   dataset_load):
    from xrec._demo_cold import EXPORTED, parts_chart, side_rows
    from xrec.blendfile import save_blend
    from xrec.notebook.charts import charts_to_html, comparison_chart, metric_bars, weight_profile
    from xrec.notebook.segment_charts import segment_section

    rows = side_rows(study["sides"])

    payload = {
        "dataset": {"name": dataset.name, "fingerprint": dataset.fingerprint()},
        "split": split.settings,
        "metric": METRIC,
        "best_single_source": best_single,
        "learned_weights": learned.weights,
        "learned": {"validation": learned.valid_score, "test": learned.test_score,
                    "best_single_validation": learned.best_single[1], "best_single_test": learned.best_single_test},
        "gated_band_weights": gated.band_weights,
        "gated": {"validation": gated.valid_score, "test": gated.test_score, **_band_details(gated)},
        "exported_blend": EXPORTED,
        "mapped": {"new_item_scale": study["mapped_scale"], "scales": study["mapped_scales"].to_dict(orient="records"),
                   "mapping": study["mapped_choice"]},
        "best_single_known_items": study["best_known"],
        "best_content_new_items": study["best_content_new"],
        "parts": study["part_counts"],
        "known_new": study["parts"].to_dict(orient="records"),
        "side_comparisons": rows,
        "summaries": {n: c.summary().reset_index().to_dict(orient="records") for n, c in cards.items()},
        "comparison_vs_best_single": vs_best.to_dict(),
        "comparison_vs_popularity": vs_pop.to_dict(),
        "tastes": tastes.to_dict(orient="records"),
        "scorecards": {n: c.to_dict() for n, c in cards.items()},
    }
    # Results by segment (held-out item new / tail / head, shopper history length, product type).
    segment_sections, payload["by_segment"] = segment_section(
        cards, split.test, best_single, ["learned blend", "gated blend"], ("item_segment", "user_segment", "product_type"))
    scorecard_path = write_text_atomic(out / "scorecards.json", json.dumps(payload, indent=1, default=json_default))

    card = cards[EXPORTED]
    evidence = {
        "scorer": EXPORTED,
        "search": {"method": gated.method, "metric": gated.metric, "validation": gated.valid_score, "test": gated.test_score},
        "metrics": {m: {k: float(v) for k, v in r[["mean", "ci_low", "ci_high"]].items() if pd.notna(v)}
                    for m, r in card.summary().iterrows()},
        "comparison": {"baseline": vs_best.baseline,
                       "rows": [r for r in vs_best.to_dict()["rows"] if r.get("candidate") == EXPORTED]},
    }
    blend_path = save_blend(out / "blend.toml", blend, dataset=dataset, split_settings=split.settings, fold="test",
                            evidence=evidence, dataset_load=dataset_load)
    from xrec.bundle import save_bundle

    bundle_path = save_bundle(out / "bundle", blend, dataset=dataset, split_settings=split.settings, fold="test",
                              evidence=evidence, dataset_load=dataset_load)

    row = vs_best.table
    row = row[(row["metric"] == METRIC) & (row["candidate"] == "learned blend")].iloc[0]
    bands = _band_details(gated)
    intro = (
        f"<p>Demo shop: {dataset.catalog.n_items} products, {split.test.n_users} shoppers, "
        f"{len(dataset.interactions)} purchases. Mixed split (<code>mixed_last</code>): each shopper's latest purchase "
        f"is held out, and the most recently introduced items are made new (never in training) until "
        f"{NEW_SHARE:.0%} of the held-out purchases are on new items; validation is carved from training the same way. "
        f"Weights learned on the validation split by coordinate ascent on {METRIC}; every number below is on the test "
        "split, full ranking (known and new items compete in one ranking).</p>"
        f"<p><b>Learned blend vs the best single source ({best_single}):</b> {METRIC} "
        f"{row['baseline_mean']:.4f} → {row['candidate_mean']:.4f}, difference {row['difference']:+.4f} "
        f"(95% paired-bootstrap CI {row['ci_low']:+.4f} … {row['ci_high']:+.4f}, sign-flip p = {row['p_value']:.4f}).</p>"
        f"<p><b>Exported blend:</b> the {EXPORTED} (weights per popularity band; new-item band learned on "
        f"{bands['band_heldout']['new']} validation purchases of new items"
        + (f"; not learned: {bands['unlearned_bands']}" if bands["unlearned_bands"] else "") + ").</p>"
        "<p>Planted tastes: <i>look</i> (a colourway, visible only in the image), <i>theme</i> (emoji subgroup words, "
        "only in the description), <i>spec</i> (product type, price band, size: the attributes) and <i>circle</i> "
        "(community co-purchases, only collaborative signals see them).</p>"
    )
    sides = pd.DataFrame(rows)
    sections = {
        "Metrics with 95% CIs (test split)": metric_bars(cards, ["ndcg@10", "hit_rate@10"], baseline=best_single),
        "Known vs new items": parts_chart(study["parts"]),
        "Known-item and new-item comparisons (paired, 95% CI)": sides.round(4).to_html(index=False),
        f"Paired differences vs the best single source ({best_single})": comparison_chart(vs_best, [METRIC, "hit_rate@10"]),
        f"What the learned blend recommends, next to {best_single}": _gallery_section(dataset, split.test, blend.sources, learned.weights,
                                                                                     best_single, cards),
        "Learned blend weights": weight_profile(learned.weights, normalizers="zscore"),
        "Gated blend band weights": pd.DataFrame(gated.band_weights).round(3).to_html(),
        "Which signal finds which taste": _taste_chart(tastes, 10),
        "Reading the new-item panel": (
            "<p>New items have no purchases in training, so popularity and ALS cannot rank them; the content "
            "sources (attributes, text, image) still can, and the <code>mapped_factors</code> source places them in "
            "ALS's factor space from their content (Gantner et al., ICDM 2010). The gated blend picks its weights by "
            "the item's training popularity, so its new-item band is learned on the new items of the mixed validation "
            "split while known items keep collaborative-heavy weights.</p>"
        ),
        **segment_sections,
        f"Scorecard of the {EXPORTED}": card,
        "Comparison vs popularity": vs_pop,
    }
    report_path = charts_to_html(sections, "xrec demo shop report", out / "report.html", intro_html=intro)
    return {"scorecards": scorecard_path, "blend": blend_path, "report": report_path, "bundle": bundle_path}


def _gallery_section(dataset, fold, sources, weights, best_single, cards) -> str:
    """Six shoppers' top 10 as thumbnails: the learned blend beside the best single source, with
    each source's contribution; shoppers chosen by the rule the section states (wins, losses, new items)."""
    from xrec.notebook.gallery import Gallery, report_gallery

    gallery = Gallery(sources, fold, dataset=dataset, baseline=best_single, weights=weights, normalizer="zscore", k=10)
    return report_gallery(gallery, cards["learned blend"], cards[best_single], metric=METRIC)


def _band_details(gated) -> dict[str, Any]:
    """Band weights' provenance: validation held-out purchases per band, learned and not learned bands, the objective."""
    from xrec.blend.gating import band_provenance

    return band_provenance(gated)


def _summary(cards, learned, gated, vs_best, best_single, paths, clock, study) -> dict[str, Any]:
    from xrec._demo_cold import EXPORTED, side_rows

    t = vs_best.table
    rows = t[t["metric"] == METRIC].set_index("candidate")
    parts = study["parts"]
    hr = parts[parts["metric"] == "hit_rate@10"]
    return {
        "paths": {k: str(v) for k, v in paths.items()},
        "metric": METRIC,
        "best_single_source": best_single,
        "weights": learned.weights,
        "test": {n: c.means()[METRIC] for n, c in cards.items()},
        "vs_best_single": {
            cand: {"difference": float(r["difference"]), "ci_low": float(r["ci_low"]), "ci_high": float(r["ci_high"]), "p_value": float(r["p_value"])}
            for cand, r in rows.iterrows()
        },
        "exported_blend": EXPORTED,
        "known_new_hit_rate": {n: dict(zip(g["part"], g["mean"].astype(float), strict=True)) for n, g in hr.groupby("scorer", sort=False)},
        "parts": {str(k): int(v) for k, v in study["part_counts"].items()},
        "best_single_known_items": study["best_known"],
        "best_content_new_items": study["best_content_new"],
        "sides": side_rows(study["sides"]),
        "gated_band_weights": gated.band_weights,
        "gated_bands": _band_details(gated),
        "validation_new": study["validation_new"],
        "mapped_new_item_scale": study["mapped_scale"],
        "mapped_mapping": study["mapped_choice"],
        "seconds": {**{k: round(v, 2) for k, v in clock.steps.items()}, "total": round(clock.total, 2)},
    }


def summary_text(summary: dict[str, Any]) -> str:
    """The closing lines of ``xrec demo``: test metric per scorer, weights, comparisons, paths."""
    lines = ["", f"Test {summary['metric']} (full ranking):"]
    for name, value in sorted(summary["test"].items(), key=lambda kv: -kv[1]):
        lines.append(f"  {name:<14} {value:.4f}")
    lines.append("Learned weights: " + ", ".join(f"{k}={v:.2f}" for k, v in summary["weights"].items()))
    for cand, r in summary["vs_best_single"].items():
        verdict = "CI excludes 0" if r["ci_low"] > 0 or r["ci_high"] < 0 else "CI includes 0"
        lines.append(f"  {cand} vs {summary['best_single_source']}: {r['difference']:+.4f} "
                     f"[{r['ci_low']:+.4f}, {r['ci_high']:+.4f}] ({verdict}, p={r['p_value']:.4f})")
    parts = summary.get("known_new_hit_rate", {})
    if parts:
        lines.append("Hit rate@10 on known items | on new items (test split, mixed protocol):")
        for name, v in parts.items():
            lines.append(f"  {name:<14} {v.get('known items', float('nan')):.3f} | {v.get('new items', float('nan')):.3f}")
        from xrec.blend.gating import band_weights_text

        bands = summary["gated_bands"]
        vnew = summary["validation_new"]
        lines.append(f"Gated blend band weights (objective {bands.get('objective_used', 'overall')}; validation purchases per band "
                     f"{bands['band_heldout']}, a band needs {bands['min_band_heldout']} to be learned; the new band's "
                     f"{vnew['new_item_heldout_rows']} purchases are on {vnew['new_items']} distinct new items):")
        lines.extend(band_weights_text(summary["gated_band_weights"], bands))
        if "side_scores" in bands:
            refs = bands["side_reference"]
            lines.append("  validation " + summary["metric"] + " per side: " + ", ".join(
                f"{s} {bands['side_scores'][s]:.4f} vs {refs[s]['source']} alone {refs[s]['value']:.4f} (n={bands['side_users'][s]})"
                for s in ("known", "new")))
        from xrec._demo_cold import sides_text

        lines.append(f"Known side vs {summary['best_single_known_items']}, new side vs {summary['best_content_new_items']} "
                     f"(chosen on validation), hit rate@10:")
        lines.extend(sides_text(summary["sides"]))
        from xrec._demo_cold import closing_note

        lines.extend(closing_note(summary["sides"]))
    lines.append("Wrote: " + ", ".join(summary["paths"].values()))
    lines.append(f"Total {summary['seconds']['total']:.1f} s")
    return "\n".join(lines)
