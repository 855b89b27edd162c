"""Run an experiment spec: load data, split, fit sources, evaluate sources and blends, compare."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from xrec.data.dataset import Dataset
from xrec.errors import ConfigError
from xrec.spec import ExperimentSpec
from xrec.sources.base import Source, make_source


def load_spec_dataset(spec: ExperimentSpec, *, progress: bool = False) -> Dataset:
    """The dataset a spec names."""
    data = spec.data
    kind = data.get("dataset", "movielens")
    if kind == "movielens":
        from xrec.data.movielens import load_movielens

        folder = data.get("folder")
        return load_movielens(spec.resolve(folder) if folder else None, progress=progress)
    if kind == "demo_shop":
        from xrec.data.demo import load_demo_shop

        folder = data.get("folder")
        return load_demo_shop(spec.resolve(folder) if folder else None)
    return _load_files(spec)


def _load_files(spec: ExperimentSpec) -> Dataset:
    from xrec.data.catalog import Catalog
    from xrec.data.interactions import Interactions

    data = spec.data
    catalog_path, inter_path = spec.resolve(data["catalog"]), spec.resolve(data["interactions"])
    for key, p in (("catalog", catalog_path), ("interactions", inter_path)):
        if not p.is_file():
            raise ConfigError(f"data.{key}: file not found: {p}")
    catalog = Catalog.from_frame(
        pd.read_csv(catalog_path),
        item_col=data.get("item_col", "item"),
        categorical=data.get("categorical", ()),
        multilabel=data.get("multilabel", ()),
        numeric=data.get("numeric", ()),
        text=data.get("text", ()),
        image=data.get("image"),
        image_root=spec.resolve(data.get("image_root", str(catalog_path.parent))),
    )
    frame = pd.read_csv(inter_path, dtype={data.get("user_col", "user"): str, data.get("item_col", "item"): str})
    interactions = Interactions.from_frame(
        frame,
        user_col=data.get("user_col", "user"),
        item_col=data.get("item_col", "item"),
        time_col=data.get("time_col", "timestamp"),
        weight_col=data.get("weight_col"),
        catalog=catalog,
    )
    return Dataset(catalog, interactions, name=data.get("name", catalog_path.stem))


def build_sources(spec: ExperimentSpec) -> dict[str, Source]:
    """Unfitted sources, one per ``[sources.NAME]`` table."""
    out = {}
    for name, table in spec.sources.items():
        settings = {k: v for k, v in table.items() if k != "kind"}
        try:
            out[name] = make_source(table["kind"], **settings)
        except ConfigError as exc:
            raise ConfigError(f"sources.{name}: {exc}") from exc
    return out


@dataclass
class ExperimentResult:
    """Everything a spec run produced: the split, fitted scorers, scorecards and the comparison."""

    spec: ExperimentSpec
    dataset: Dataset
    split: Any
    scorers: dict[str, Any]
    scorecards: dict[str, Any]
    comparison: Any = None
    extras: dict[str, Any] = field(default_factory=dict)

    def table(self) -> pd.DataFrame:
        """One row per scorer, one column per metric (means)."""
        rows = []
        for name, card in self.scorecards.items():
            summary = card.summary()
            row = {"scorer": name}
            for _, r in summary.iterrows():
                row[r["metric"]] = r["mean"]
            rows.append(row)
        return pd.DataFrame(rows).set_index("scorer")


def evaluation_options(spec: ExperimentSpec) -> dict[str, Any]:
    """Keyword arguments for :func:`xrec.evaluate.evaluate` from the spec's ``[evaluate]`` table."""
    from xrec.evaluate import FullRanking, SampledNegatives

    ev = spec.evaluate
    opts: dict[str, Any] = {"ks": spec.ks}
    if "metrics" in ev:
        opts["metrics"] = tuple(ev["metrics"])
    if "chunk_size" in ev:
        opts["chunk_size"] = int(ev["chunk_size"])
    if ev.get("protocol", "full") == "sampled":
        opts["protocol"] = SampledNegatives(n_negatives=int(ev.get("negatives", 100)), seed=int(ev.get("seed", 0)))
    else:
        opts["protocol"] = FullRanking()
    return opts


def run_experiment(spec: ExperimentSpec, *, progress: bool = False, dataset: Dataset | None = None) -> ExperimentResult:
    """Fit every source on the test fold's training rows, evaluate sources and blends, compare with the baseline."""
    from xrec.blend import Blend
    from xrec.evaluate import compare, evaluate
    from xrec.split import split_dataset

    dataset = dataset or load_spec_dataset(spec, progress=progress)
    split = split_dataset(dataset, **spec.split)
    fold = split.test
    sources = build_sources(spec)
    for name, source in _progress(sources.items(), progress, "fitting sources"):
        source.fit(fold)
    scorers: dict[str, Any] = dict(sources)
    for name, table in spec.blends.items():
        try:
            scorers[name] = Blend(
                {s: sources[s] for s in table["weights"]},
                weights=table["weights"],
                normalizers=table.get("normalizer", "zscore"),
            ).fit(fold)
        except ConfigError as exc:
            raise ConfigError(f"blends.{name}: {exc}") from exc
    opts = evaluation_options(spec)
    scorecards = {
        name: evaluate(scorer, fold, name=name, **opts)
        for name, scorer in _progress(scorers.items(), progress, "evaluating")
    }
    comparison = None
    baseline = spec.baseline
    if baseline is not None and len(scorecards) > 1:
        others = [card for name, card in scorecards.items() if name != baseline]
        comparison = compare(scorecards[baseline], *others, seed=int(spec.evaluate.get("seed", 0)))
    return ExperimentResult(spec, dataset, split, scorers, scorecards, comparison)


def _progress(items, enabled: bool, desc: str):
    if not enabled:
        return items
    from tqdm.auto import tqdm

    items = list(items)
    return tqdm(items, desc=desc, total=len(items))
