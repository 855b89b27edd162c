"""Run an experiment spec: load data, split, fit sources, evaluate sources and blends, compare."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from xrec.data.dataset import Dataset
from xrec.data.location import load_dataset
from xrec.errors import ConfigError, DataError, XrecError
from xrec.spec import ExperimentSpec
from xrec.sources.base import Source, make_source


def load_spec_dataset(spec: ExperimentSpec, *, progress: bool = False) -> Dataset:
    """The dataset a spec names (:func:`xrec.data.location.load_dataset` of ``spec.data``)."""
    return load_dataset(spec.data, progress=progress)


def build_sources(spec: ExperimentSpec, *, progress: bool = False) -> dict[str, Source]:
    """Unfitted sources, one per ``[sources.NAME]`` table.

    With ``progress``, sources that can show their own bars (encoders, implicit models) do,
    unless the spec sets their ``progress`` explicitly.

    Raises
    ------
    ConfigError
        A file setting (:attr:`~xrec.sources.base.Source.path_settings`) leads outside the
        spec's folder (``..``, an absolute path, a symbolic link) without
        ``data.allow_outside = true``; the message names it, e.g. ``sources.current.path``.
    """
    from xrec._settings import setting_names
    from xrec.sources.base import source_class

    out = {}
    for name, table in spec.sources.items():
        settings = {k: v for k, v in table.items() if k != "kind"}
        cls = source_class(table["kind"])
        if cls is not None:  # file paths in a spec are relative to the spec file, and stay inside its folder
            _check_inside(spec, name, cls.path_fields(settings))
            settings = cls.resolve_paths(settings, spec.resolve)
        if progress and cls is not None and "progress" in setting_names(cls):
            settings.setdefault("progress", True)
        try:
            out[name] = make_source(table["kind"], **settings)
        except ConfigError as exc:
            raise ConfigError(f"sources.{name}: {exc}") from exc
    return out


def fit_source(name: str, source: Source, fold: Any) -> Source:
    """``source.fit(fold)``, with an xrec error's message prefixed by ``sources.NAME``."""
    try:
        return source.fit(fold)
    except XrecError as exc:
        raise type(exc)(f"sources.{name}: {exc}") from exc


def _check_inside(spec: ExperimentSpec, name: str, fields: dict[str, str]) -> None:
    """Refuse a source file path that leads outside the spec's folder (``..``, absolute, or a
    symbolic link out), the rule of the ``[data]`` table with its opt-out ``data.allow_outside``."""
    if spec.data.allow_outside:
        return
    for field, value in fields.items():
        path = spec.resolve(value)
        if not spec.data.inside(path):
            raise ConfigError(
                f"sources.{name}.{field}: {value!r} leads outside the spec's folder {str(spec.data.base.resolve())!r} "
                f"(to {str(path.resolve())!r}); move the file inside it, or set data.allow_outside = true"
            )


def _outside_fields(spec: ExperimentSpec, name: str) -> list[str]:
    """The file settings of source ``name`` that lie outside the spec's folder (allowed by ``data.allow_outside``)."""
    from xrec.sources.base import source_class

    table = spec.sources[name]
    cls = source_class(table["kind"])
    if cls is None:
        return []
    fields = cls.path_fields({k: v for k, v in table.items() if k != "kind"})
    return [f"sources.{name}.{field}" for field, value in fields.items() if not spec.data.inside(spec.resolve(value))]


def _fit_source(spec: ExperimentSpec, name: str, source: Source, fold: Any) -> Source:
    """``source.fit(fold)``; when it reads a file from outside the spec's folder, a
    :class:`DataError` names the setting but quotes nothing from the file."""
    try:
        return fit_source(name, source, fold)
    except DataError:
        outside = _outside_fields(spec, name)
        if not outside:
            raise
        raise DataError(
            f"{', '.join(outside)}: the file cannot be used as this source's input "
            "(details not shown: the file lies outside the spec's folder)"
        ) from None


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
            rows.append({"scorer": name, **card.summary()["mean"].to_dict()})
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


def cluster_options(spec: ExperimentSpec) -> dict[str, Any] | None:
    """``scheduler`` / ``workers`` of the spec's ``[evaluate]`` table, or ``None`` to evaluate in this process."""
    ev = spec.evaluate
    if ev.get("scheduler") is None and ev.get("workers") is None:
        return None
    return {"scheduler": ev.get("scheduler"), "workers": ev.get("workers")}


def evaluate_scorers(
    spec: ExperimentSpec, scorers: dict[str, Any], fold: Any, *, progress: bool = False, client: Any = None
) -> dict[str, Any]:
    """Scorecards of ``scorers`` on ``fold`` with the spec's ``[evaluate]`` options.

    With ``scheduler`` or ``workers`` in ``[evaluate]`` the users are sharded over one Dask
    cluster shared by every scorer (:func:`xrec.evaluate.evaluate_sharded`); the scorecards
    are the same as in one process. ``client``: an open client to use for that (else one
    is opened for this call).
    """
    from xrec.evaluate import evaluate, evaluate_sharded

    opts = evaluation_options(spec)
    cluster = cluster_options(spec)
    items = _progress(scorers.items(), progress, "evaluating")
    if cluster is None:
        return {name: evaluate(scorer, fold, name=name, **opts) for name, scorer in items}
    from xrec.cluster import open_client

    shard_size = spec.evaluate.get("shard_size")
    with (open_client(**cluster) if client is None else open_client(client=client)) as active:
        return {
            name: evaluate_sharded(scorer, fold, name=name, shard_size=shard_size, client=active, progress=progress, **opts)
            for name, scorer in items
        }


@contextlib.contextmanager
def spec_cluster(spec: ExperimentSpec) -> Iterator[Any]:
    """The spec's Dask client for a whole run (``None`` without ``scheduler``/``workers``).

    Inside, catalog texts and images missing from the embedding cache are encoded on the
    cluster's workers (sharded by items), so a run pays for one cluster, not one per step.
    """
    cluster = cluster_options(spec)
    if cluster is None:
        yield None
        return
    from xrec.cluster import open_client
    from xrec.encoders._cluster_hook import encoding_on

    with open_client(**cluster) as client, encoding_on(client):
        yield client


def run_experiment(
    spec: ExperimentSpec,
    *,
    progress: bool = False,
    dataset: Dataset | None = None,
    only: str | None = None,
    by: Sequence[str] | None = None,
) -> ExperimentResult:
    """Fit every source on the test fold's training rows, evaluate sources and blends, compare with the baseline.

    With ``only`` (a source or blend name) just that scorer and the sources it needs are
    fitted and evaluated, and there is no comparison. With ``by`` (``"item_segment"``,
    ``"user_segment"`` or catalog column names) every scorecard and the comparison are also
    broken down by those segments (:func:`xrec.evaluate.segments.segment_labels`):
    ``extras["segments"]`` holds the per-segment scorecard table, the comparison its
    ``segments`` table. ``by=None`` takes the spec's ``evaluate.by`` list; ``()`` breaks
    nothing down.
    """
    by = tuple(spec.evaluate.get("by", ()) if by is None else by)
    with spec_cluster(spec) as client:
        return _run_experiment(spec, progress=progress, dataset=dataset, only=only, by=by, client=client)


def _run_experiment(
    spec: ExperimentSpec, *, progress: bool, dataset: Dataset | None, only: str | None, by: Sequence[str], client: Any
) -> ExperimentResult:
    from xrec.evaluate import compare
    from xrec.evaluate.segments import segment_labels
    from xrec.split import split_dataset

    dataset = dataset or load_spec_dataset(spec, progress=progress)
    check_spec_sizes(spec, dataset.catalog.n_items)
    split = split_dataset(dataset, **spec.split)
    fold = split.test
    labels = [segment_labels(fold, name) for name in dict.fromkeys(by)]  # bad names fail before any fitting
    sources = build_sources(spec, progress=progress)
    blends = dict(spec.blends)
    if only is not None:
        if only in blends:
            blends = {only: blends[only]}
            sources = {n: sources[n] for n in _blend_source_names(blends[only], sources)}
        elif only in sources:
            blends, sources = {}, {only: sources[only]}
        else:
            raise ConfigError(f"no source or blend named {only!r}; known: {sorted([*sources, *blends])}")
    for name, source in _progress(sources.items(), progress, "fitting sources"):
        _fit_source(spec, name, source, fold)
    scorers: dict[str, Any] = dict(sources) if only is None or only in sources else {}
    learned: dict[str, Any] = {}
    valid_sources: dict[Any, Any] = {}  # sources fitted on the validation split, and searches done on them
    for name, table in blends.items():
        try:
            scorers[name] = _build_blend(spec, table, sources, split, valid_sources, learned, name, progress)
        except ConfigError as exc:
            raise ConfigError(f"blends.{name}: {exc}") from exc
    scorecards = evaluate_scorers(spec, scorers, fold, progress=progress, client=client)
    comparison = None
    baseline = spec.baseline
    seed = int(spec.evaluate.get("seed", 0))
    if only is None and baseline is not None and len(scorecards) > 1:
        others = [card for name, card in scorecards.items() if name != baseline]
        comparison = compare(scorecards[baseline], *others, seed=seed, by=labels or None)
    extras: dict[str, Any] = {"learned": learned}
    if labels:
        extras["segments"] = pd.concat(
            [card.by_segment(labels, seed=seed).assign(scorer=name) for name, card in scorecards.items()], ignore_index=True
        )
    overlap_k = int(spec.evaluate.get("overlap", 0))
    if comparison is not None and overlap_k:
        from xrec.evaluate.overlap import top_list_change

        # How much of each top-K list changes against the baseline (evaluate.overlap = K).
        extras["top_lists"] = {
            name: top_list_change(scorers[baseline], scorers[name], fold, k=overlap_k, names=(baseline, name))
            for name in scorecards if name != baseline
        }
    if only is None and spec.evaluate.get("pairs"):
        extras["pairs"] = _paired_runs(spec, scorers, scorecards, fold, overlap_k)
    return ExperimentResult(spec, dataset, split, scorers, scorecards, comparison, extras=extras)


def _paired_runs(spec: ExperimentSpec, scorers: dict, scorecards: dict, fold: Any, overlap_k: int) -> list[dict[str, Any]]:
    """``evaluate.pairs``: each (baseline, candidate) pair compared on its own, with top-list overlap."""
    from xrec.evaluate import compare
    from xrec.evaluate.overlap import top_list_change

    runs = []
    for base, cand in spec.evaluate["pairs"]:
        run: dict[str, Any] = {"comparison": compare(scorecards[base], scorecards[cand], seed=int(spec.evaluate.get("seed", 0)))}
        if overlap_k:
            run["top_lists"] = top_list_change(scorers[base], scorers[cand], fold, k=overlap_k, names=(base, cand))
        runs.append(run)
    return runs


def check_spec_sizes(spec: ExperimentSpec, n_items: int) -> None:
    """Refuse cut-offs longer than the catalog (``evaluate.ks``, a learned blend's ``metric``) before any fit.

    A top-K list cannot hold more items than the catalog has, and a huge K would make
    ``(users, K)`` arrays; raises :class:`ConfigError` naming the field.
    """
    from xrec.evaluate._metrics import check_cutoffs

    check_cutoffs(list(spec.ks), n_items, "evaluate.ks")
    for name, table in spec.blends.items():
        metric = table.get("metric")
        if table.get("weights") == "learn" and isinstance(metric, str) and metric.rpartition("@")[2].isdigit():
            check_cutoffs(int(metric.rpartition("@")[2]), n_items, f"blends.{name}.metric")


def _blend_source_names(table: dict[str, Any], sources: dict[str, Source]) -> list[str]:
    if table.get("sources"):
        return list(table["sources"])
    if isinstance(table.get("weights"), dict):
        return list(table["weights"])
    return list(sources)


def _build_blend(spec, table, sources, split, valid_sources, learned, name, progress):
    """One ``[blends.NAME]`` table as a fitted scorer: fixed weights, learned weights or a fusion rule."""
    from xrec.blend import Blend, make_fusion

    fold = split.test
    names = _blend_source_names(table, sources)
    chosen = {n: sources[n] for n in names}
    normalizer = table.get("normalizer", "zscore")
    if "fusion" in table:
        params = {k: table[k] for k in ("k", "depth") if k in table}
        if table["fusion"] != "rrf" and "normalizer" in table:
            params["normalizer"] = normalizer
        return make_fusion(table["fusion"], chosen, **params).fit(fold)
    if table["weights"] != "learn":
        return Blend(chosen, weights=table["weights"], normalizers=normalizer).fit(fold)

    from xrec._validation import parse_metric_column
    from xrec.blend.engine import BlendEngine
    from xrec.blend.gating import GatedBlend, band_provenance, learn_gated_weights
    from xrec.blend.learn import learn_weights

    if split.validation is None:
        raise ConfigError("weights = \"learn\" needs a validation split")
    # Weights are chosen on the validation fold, with sources fitted on its own training rows.
    built = build_sources(spec, progress=progress)
    for n in names:
        if n not in valid_sources:
            valid_sources[n] = _fit_source(spec, n, built[n], split.validation)
    metric = table.get("metric", "ndcg@10")
    k = parse_metric_column(metric)[1]
    seed = int(table.get("seed", 0))
    # Blends over the same sources, normalizers, metric, method and seed share the engine and
    # the ungated search (a gated blend starts from it), so neither is paid for twice.
    method = table.get("method", "coordinate_ascent")
    key = ("search", tuple(names), repr(normalizer), metric, method, seed)
    if key not in valid_sources:
        engine = BlendEngine({n: valid_sources[n] for n in names}, split.validation, normalizer, ks=(k,), metric=metric)
        engine.prepare(progress=progress)
        valid_sources[key] = (engine, learn_weights(engine, method=method, seed=seed, progress=progress))
    engine, result = valid_sources[key]
    record = {"method": result.method, "metric": result.metric, "weights": result.weights, "validation": result.valid_score,
              "best_single": result.best_single[0] if result.best_single else None,
              "best_single_validation": result.best_single[1] if result.best_single else None}
    if table.get("gated", False):
        objective = table.get("objective", "overall")
        gated = learn_gated_weights(engine, start=result.weights, seed=seed, progress=progress, objective=objective,
                                    side_baselines=table.get("side_baselines"))
        record.update(band_weights=gated.band_weights, validation=gated.valid_score, head_min=int(gated.details["head_min"]),
                      bands=band_provenance(gated))
        learned[name] = record
        return GatedBlend(chosen, gated.band_weights, normalizer, head_min=int(gated.details["head_min"])).fit(fold)
    learned[name] = record
    return Blend(chosen, weights=result.weights, normalizers=normalizer).fit(fold)


def _progress(items, enabled: bool, desc: str):
    if not enabled:
        return items
    from tqdm.auto import tqdm

    items = list(items)
    return tqdm(items, desc=desc, total=len(items))


def _scorer_for(result: ExperimentResult, name: str | None):
    from xrec.blend import Blend

    name = name or result.spec.primary
    if name not in result.scorers:
        raise ConfigError(f"--scorer: {name!r} is neither a source nor a blend of the spec; have {sorted(result.scorers)}")
    scorer = result.scorers[name]
    if not isinstance(scorer, Blend):
        # A lone source is exported as a one-source blend with its raw scores.
        scorer = Blend({name: scorer}, weights={name: 1.0}, normalizers="none").fit(result.split.test)
    return name, scorer


def data_hints(spec: ExperimentSpec) -> dict[str, Any]:
    """The spec's data location with paths made absolute, so a blend file can find its data again
    (:meth:`xrec.data.location.DataLocation.to_hints`)."""
    return spec.data.to_hints()


def evidence_summary(result: ExperimentResult, name: str) -> dict[str, Any]:
    """What a blend was chosen on, compactly: its metric means with CIs and its comparison rows."""
    card = result.scorecards[name]
    summary = card.summary()
    evidence: dict[str, Any] = {
        "scorer": name,
        "n_users": int(card.n_users),
        "protocol": card.protocol,
        "metrics": {
            metric: {k: float(v) for k, v in row[["mean", "ci_low", "ci_high"]].items() if pd.notna(v)}
            for metric, row in summary.iterrows()
        },
    }
    if result.comparison is not None:
        rows = [r for r in result.comparison.to_dict()["rows"] if r.get("candidate") == name]
        if rows:
            evidence["comparison"] = {"baseline": result.comparison.baseline, "rows": rows}
    return evidence


def export_spec(
    spec: ExperimentSpec,
    output: str | Path | None = None,
    *,
    scorer: str | None = None,
    progress: bool = False,
    bundle: str | Path | None = None,
) -> Path:
    """Run ``spec`` and write the blend file of one of its scorers (default: the primary).

    With ``bundle`` (a folder), also write a bundle there (see :func:`xrec.bundle.save_bundle`):
    the blend file plus every learned artifact, loadable without the data. Returns the
    blend file's path, or the bundle folder when no ``output`` is given.
    """
    from xrec.blendfile import save_blend

    # Checked before the (long) run, not after it.
    if output is None and bundle is None:
        raise ConfigError("--output: give a blend file to write, a --bundle folder, or both")
    if output is not None:
        output = Path(output)
        if output.is_dir():
            raise ConfigError(f"--output: {str(output)!r} is a folder; give the blend file's path, e.g. {str(output / 'blend.toml')!r}")
        if not output.parent.is_dir():
            raise ConfigError(f"--output: folder {str(output.parent)!r} does not exist")
    if bundle is not None:
        bundle = Path(bundle)
        if not (bundle.parent if str(bundle.parent) else Path(".")).is_dir():
            raise ConfigError(f"--bundle: folder {str(bundle.parent)!r} does not exist")
        if bundle.exists() and not bundle.is_dir():
            raise ConfigError(f"--bundle: {str(bundle)!r} exists and is not a folder")
    result = run_experiment(spec, progress=progress, by=())  # the blend file keeps no segment tables
    name, blend = _scorer_for(result, scorer)
    evidence = evidence_summary(result, name)
    options = {
        "dataset": result.dataset, "split_settings": result.split.settings, "evidence": evidence,
        "fold": "test", "dataset_load": data_hints(spec),
    }
    written = None
    if bundle is not None:
        from xrec.bundle import save_bundle

        written = save_bundle(bundle, blend, **options)
    if output is not None:
        written = save_blend(output, blend, **options)
    return written


def compare_specs(
    baseline: ExperimentSpec,
    candidate: ExperimentSpec,
    *,
    progress: bool = False,
    by: Sequence[str] | None = None,
    overlap: int | None = None,
):
    """Paired comparison of the primary scorers of two specs; both must use the same data and split.

    ``by`` breaks the comparison down by segments too, as in :func:`run_experiment`
    (``None``: the baseline spec's ``evaluate.by``).
    With ``overlap`` (default: the baseline spec's ``evaluate.overlap``) the comparison's
    ``top_lists`` also holds the candidate's top-K overlap with the baseline per user.
    """
    from xrec.evaluate import compare
    from xrec.evaluate.segments import segment_labels

    # only each spec's primary scorer (and the sources it blends) is fitted and evaluated;
    # segments are broken down once, below, for the comparison
    base = run_experiment(baseline, progress=progress, only=baseline.primary, by=())
    # Relative paths are compared resolved: the same "items.csv" next to two specs may be two files.
    same_data = baseline.data.same_data(candidate.data)
    cand = run_experiment(candidate, progress=progress, dataset=base.dataset if same_data else None, only=candidate.primary, by=())
    if base.dataset.fingerprint() != cand.dataset.fingerprint():
        raise ConfigError("the two specs read different data (dataset fingerprints differ); a paired comparison needs the same data")
    if base.split.settings != cand.split.settings:
        raise ConfigError("the two specs split the data differently ([split] tables differ); a paired comparison needs the same split")
    if sorted(base.spec.ks) != sorted(cand.spec.ks):
        raise ConfigError(f"evaluate.ks differ: {list(base.spec.ks)} vs {list(cand.spec.ks)}")
    b_card = base.scorecards[baseline.primary]
    c_card = cand.scorecards[candidate.primary]
    if b_card.name == c_card.name:
        c_card.name = f"{c_card.name} ({candidate.name})"
        b_card.name = f"{b_card.name} ({baseline.name})"
    by = tuple(baseline.evaluate.get("by", ()) if by is None else by)
    labels = [segment_labels(base.split.test, name) for name in dict.fromkeys(by)]
    comparison = compare(b_card, c_card, seed=int(baseline.evaluate.get("seed", 0)), by=labels or None)
    k = overlap if overlap is not None else int(baseline.evaluate.get("overlap", 0))
    if k:
        from xrec.evaluate.overlap import top_list_change

        # both primaries were fitted on folds of the same data and split: the same users and items
        comparison.top_lists[c_card.name] = top_list_change(
            base.scorers[baseline.primary], cand.scorers[candidate.primary], base.split.test, k=k, names=(b_card.name, c_card.name)
        )
    return comparison


def runtime_for_blend_file(path: str | Path, *, data_folder: str | None = None, progress: bool = False):
    """Load a blend file with the data it records (see :func:`xrec.runtime.runtime_for_blend_file`)."""
    from xrec.runtime import runtime_for_blend_file as load

    return load(path, data_folder=data_folder, progress=progress)
