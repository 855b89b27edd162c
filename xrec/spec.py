"""Experiment specs: a TOML file naming the data, the split, the sources, the blend and the metrics.

Example (``xrec/specs/movielens.toml`` is a complete one)::

    [data]
    dataset = "movielens"        # "movielens", "demo_shop" or "files"
    # folder = "path/to/ml-1m"   # optional: a GroupLens folder / demo shop folder

    [split]
    rule = "leave_last"          # leave_last | time_cutoff | random | cold_items | mixed_last | mixed_cutoff
    seed = 0
    # new_share = 0.2            # mixed_last: share of held-out rows on new items (never in training)
    # cold_users = "keep"        # mixed rules: keep (scored as users without history) | drop; counted either way

    [evaluate]
    ks = [10, 20]
    metrics = ["hit_rate", "ndcg", "recall", "mrr", "coverage", "popularity"]
    baseline = "popularity"      # the source or blend the others are compared with
    # primary = "als_genres"     # the scorer `xrec compare` / `xrec export` use (default: first blend)
    # protocol = "sampled"       # full ranking unless asked; sampled takes `negatives`
    # overlap = 10               # also report each scorer's top-10 overlap with the baseline
    # pairs = [["als", "als_genres"]]  # extra paired comparisons, each against its own baseline
    # by = ["item_segment", "user_segment"]  # also break results down by segment (`--by` replaces it)
    # workers = 2                # evaluate on a local Dask cluster of 2 processes, sharded by users
    #                            # (catalog texts and images missing from the cache are encoded there too)
    # scheduler = "tcp://scheduler-host:8786"  # or on a running Dask cluster (not with `workers`)
    # shard_size = 8192          # users per Dask task (default: about 4 per worker; unused in one process)

    [sources.popularity]
    kind = "popularity"

    [sources.als]
    kind = "als"
    factors = 64

    [sources.genres]
    kind = "attributes"

    [blends.als_genres]
    normalizer = "zscore"        # one for all, or a table per source
    weights = { als = 1.0, genres = 0.3 }

    [blends.learned]             # weights learned on the validation split
    sources = ["als", "genres"]  # default: every source
    weights = "learn"
    method = "coordinate_ascent" # coordinate_ascent | optuna | logistic
    metric = "ndcg@10"
    # gated = true               # separate weights for new / tail / head items
    # objective = "sides"        # gated only: "overall" (default) | "sides" (do well on known
    #                            # AND new items: maximin gain over each side's best source)
    # side_baselines = { new = ["attributes", "text"] }  # sides only: a side's reference sources

    [blends.rrf]                 # a tuning-free fusion rule
    fusion = "rrf"               # rrf (k = 60) | combsum | combmnz (depth = 100)

Source kinds (``kind`` in ``[sources.NAME]``; the other keys are the source class's
settings): ``popularity``, ``als``, ``bpr``, ``item_knn``, ``attributes``, ``text``,
``image``, ``cross_modal``, ``early_fusion``, ``vectors`` (your item vectors from
``.npy`` + id file, Parquet or ``.safetensors``: :class:`xrec.sources.VectorSource`) and
``ranking`` (your current ranking from CSV or Parquet: :class:`xrec.sources.RankingSource`),
for example::

    [sources.current]
    kind = "ranking"
    path = "current.csv"         # relative to the spec file, like every file setting

Source file settings (``vectors``: ``path``, ``ids``; ``ranking``: ``path``; ``cross_modal``:
``image_vectors``, ``text_vectors``; ``early_fusion``: ``vectors``) follow the rule of the data
paths below: inside the spec file's folder unless ``data.allow_outside = true``, errors naming
the setting (``sources.current.path``), nothing quoted from a file outside. Blend files record
them absolute and are read as recorded (the check ran when the spec did).

The ``[data]`` table is checked by :class:`xrec.data.location.DataLocation` (its module
docstring lists every key). For ``dataset = "files"`` it names the catalog and interactions
files, CSV or Parquet by extension, relative to the spec file, and maps your column names
onto xrec's::

    [data]
    dataset = "files"
    catalog = "items.parquet"        # .csv, .tsv (optionally .gz, .zip, ...), .parquet, .pq
    interactions = "events.csv"
    item_col = "sku"                 # default "item"
    user_col = "customer"            # default "user"
    time_col = "ts"                  # default "timestamp": numbers (seconds) or dates
    weight_col = "quantity"          # optional
    categorical = ["brand", "type"]  # or one name: categorical = "brand"
    text = ["title", "description"]
    image = "picture"                # relative paths read from image_root (default: the catalog's folder)
    # name = "shop"                  # default: the catalog file's name without extension
    # allow_outside = true           # read data from outside this spec's folder

In CSV files only an empty field is a missing value (``NA``, ``null`` and ``None`` are text).
Data paths, and the catalog's image paths, must lie inside the spec file's folder (also after
following ``..`` and symbolic links) unless ``allow_outside = true``; values from files outside it are never quoted in
error messages.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from xrec._files import read_text_file
from xrec._validation import check_int
from xrec.data._readers import path_problem
from xrec.data.location import DataLocation
from xrec.errors import ConfigError

_SPLIT_KEYS = {"rule", "seed", "validation", "test_fraction", "cutoff", "cold_fraction", "min_train", "new_share", "cold_users"}
_EVAL_KEYS = {
    "ks", "metrics", "baseline", "primary", "protocol", "negatives", "seed", "chunk_size",
    "scheduler", "workers", "shard_size", "overlap", "pairs", "by",
}
_BLEND_KEYS = {"weights", "normalizer", "sources", "method", "metric", "gated", "objective", "side_baselines", "fusion", "k", "depth", "seed"}
_LEARN_METHODS = ("coordinate_ascent", "optuna", "logistic")
_OBJECTIVES = ("overall", "sides")  # xrec.blend.gating.OBJECTIVES
_FUSIONS = ("rrf", "combsum", "combmnz")
_TOP_KEYS = {"data", "split", "evaluate", "sources", "blends", "name"}


@dataclass
class ExperimentSpec:
    """A validated experiment spec (see the module docstring for the file format).

    ``data`` is the checked ``[data]`` table: where the dataset lives, read from ``base_dir``.
    """

    data: DataLocation
    split: dict[str, Any] = field(default_factory=dict)
    evaluate: dict[str, Any] = field(default_factory=dict)
    sources: dict[str, dict[str, Any]] = field(default_factory=dict)
    blends: dict[str, dict[str, Any]] = field(default_factory=dict)
    name: str = "experiment"
    base_dir: Path = field(default_factory=Path.cwd)

    @property
    def ks(self) -> tuple[int, ...]:
        """``evaluate.ks`` (default ``(10,)``)."""
        return tuple(self.evaluate.get("ks", (10,)))

    @property
    def baseline(self) -> str | None:
        """``evaluate.baseline``: the scorer the others are compared with, or ``None``."""
        return self.evaluate.get("baseline")

    @property
    def primary(self) -> str:
        """The scorer this spec stands for: ``evaluate.primary``, else the first blend, else the first source."""
        if "primary" in self.evaluate:
            return self.evaluate["primary"]
        return next(iter(self.blends)) if self.blends else next(iter(self.sources))

    def resolve(self, path: str) -> Path:
        """``path`` made relative to the spec file's folder (absolute paths pass through)."""
        p = Path(path)
        return p if p.is_absolute() else self.base_dir / p


def _check_keys(table: dict, allowed: set[str], where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {unknown}; allowed: {sorted(allowed)}")


def _check_table(value: Any, where: str) -> dict:
    if not isinstance(value, dict):
        raise ConfigError(f"{where}: must be a table, got {type(value).__name__}")
    return value


def _check_int(table: dict, key: str, lowest: int, where: str) -> None:
    check_int(table.get(key, lowest), f"{where}.{key}:", low=lowest, expected=f"an integer >= {lowest}")


def _check_blend(table: dict, where: str, sources: dict, *, learning_allowed: bool) -> None:
    """A blend is fixed weights, learned weights (optionally gated) or a fusion rule."""
    fusion, weights = table.get("fusion"), table.get("weights")
    if fusion is not None and weights is not None:
        raise ConfigError(f"{where}: give either 'weights' or 'fusion', not both")
    if fusion is None and weights is None:
        raise ConfigError(f"{where}: needs 'weights' (a table, or \"learn\") or 'fusion' ({', '.join(_FUSIONS)})")
    if fusion is not None and fusion not in _FUSIONS:
        raise ConfigError(f"{where}.fusion: must be one of {list(_FUSIONS)}, got {fusion!r}")
    if fusion == "rrf" and "normalizer" in table:
        raise ConfigError(f"{where}.normalizer: reciprocal rank fusion uses ranks, not normalized scores; remove it")
    if fusion == "combsum" and "depth" in table:
        raise ConfigError(f"{where}.depth: only for rrf and combmnz")
    if fusion in ("combsum", "combmnz") and "k" in table:
        raise ConfigError(f"{where}.k: only for rrf")
    if fusion is None and ("k" in table or "depth" in table):
        raise ConfigError(f"{where}: 'k' and 'depth' belong to fusion rules (fusion = \"rrf\" or \"combmnz\")")
    listed = table.get("sources")
    if listed is not None:
        if not isinstance(listed, list) or not listed or not all(isinstance(x, str) for x in listed):
            raise ConfigError(f"{where}.sources: a non-empty list of source names, got {listed!r}")
        unknown = [x for x in listed if x not in sources]
        if unknown:
            raise ConfigError(f"{where}.sources: no source(s) {unknown}; sources: {sorted(sources)}")
    if weights == "learn":
        if not learning_allowed:
            raise ConfigError(f"{where}.weights: learning weights needs a validation split; remove split.validation = false")
        if table.get("method", "coordinate_ascent") not in _LEARN_METHODS:
            raise ConfigError(f"{where}.method: must be one of {list(_LEARN_METHODS)}, got {table.get('method')!r}")
    elif fusion is None:
        weights = _check_table(weights, f"{where}.weights")
        for src, w in weights.items():
            if src not in sources:
                raise ConfigError(f"{where}.weights.{src}: no source of that name; sources: {sorted(sources)}")
            if not isinstance(w, (int, float)) or isinstance(w, bool):
                raise ConfigError(f"{where}.weights.{src}: must be a number, got {w!r}")
        for key in ("method", "metric", "gated", "objective", "side_baselines", "seed"):
            if key in table:
                raise ConfigError(f"{where}.{key}: only for learned weights (weights = \"learn\")")
    if "gated" in table and not isinstance(table["gated"], bool):
        raise ConfigError(f"{where}.gated: must be true or false, got {table['gated']!r}")
    if "objective" in table:
        if not table.get("gated", False):
            raise ConfigError(f"{where}.objective: only for gated blends (gated = true)")
        if table["objective"] not in _OBJECTIVES:
            raise ConfigError(f"{where}.objective: must be one of {list(_OBJECTIVES)}, got {table['objective']!r}")
    if "side_baselines" in table:
        given = table["side_baselines"]
        if table.get("objective") != "sides":
            raise ConfigError(f"{where}.side_baselines: only with objective = \"sides\"")
        if not isinstance(given, dict) or any(k not in ("known", "new") for k in given):
            raise ConfigError(f"{where}.side_baselines: a table with keys 'known' and/or 'new', got {given!r}")
        for side, names in given.items():
            if not isinstance(names, list) or not names or any(n not in sources for n in names):
                raise ConfigError(f"{where}.side_baselines.{side}: a non-empty list of source names; sources: {sorted(sources)}")
    if not isinstance(table.get("metric", ""), str):
        raise ConfigError(f"{where}.metric: must be a string such as 'ndcg@10', got {table['metric']!r}")
    _check_int(table, "seed", 0, where)
    norm = table.get("normalizer", "zscore")
    if not isinstance(norm, (str, dict)):
        raise ConfigError(f"{where}.normalizer: a name or a table per source, got {norm!r}")


def _check_source_settings(name: str, table: dict) -> None:
    """Names and types of a source's settings, checked before any data is loaded."""
    from xrec._settings import check_settings
    from xrec.sources.base import source_class, source_kinds

    cls = source_class(table["kind"])
    if cls is None:
        raise ConfigError(f"sources.{name}.kind: unknown source kind {table['kind']!r}; known: {source_kinds()}")
    try:
        check_settings(cls, {k: v for k, v in table.items() if k != "kind"}, f"source {table['kind']!r}")
    except ConfigError as exc:
        raise ConfigError(f"sources.{name}: {exc}") from exc


def parse_spec(raw: dict[str, Any], base_dir: Path | None = None) -> ExperimentSpec:
    """Validate a spec already read into a dict; errors name the offending field."""
    _check_keys(raw, _TOP_KEYS, "spec")
    base_dir = base_dir or Path.cwd()
    data = DataLocation.from_table(raw.get("data", {}), base_dir)
    split = _check_table(raw.get("split", {}), "split")
    _check_keys(split, _SPLIT_KEYS, "split")
    evaluate = _check_table(raw.get("evaluate", {}), "evaluate")
    _check_keys(evaluate, _EVAL_KEYS, "evaluate")
    ks = evaluate.get("ks", [10])
    if not isinstance(ks, list) or not ks or not all(isinstance(k, int) and not isinstance(k, bool) and k > 0 for k in ks):
        raise ConfigError(f"evaluate.ks: must be a non-empty list of positive integers, got {ks!r}")
    if evaluate.get("protocol", "full") not in ("full", "sampled"):
        raise ConfigError(f"evaluate.protocol: must be 'full' or 'sampled', got {evaluate.get('protocol')!r}")
    metrics = evaluate.get("metrics", ["hit_rate"])
    if not isinstance(metrics, list) or not metrics or not all(isinstance(m, str) for m in metrics):
        raise ConfigError(f"evaluate.metrics: must be a non-empty list of metric names, got {metrics!r}")
    from xrec.evaluate._metrics import ALL_METRICS

    unknown = [m for m in metrics if m not in ALL_METRICS]
    if unknown:
        raise ConfigError(f"evaluate.metrics: unknown metric name(s) {unknown}; known: {list(ALL_METRICS)}")
    for key, lowest in (("chunk_size", 1), ("negatives", 1), ("seed", 0), ("shard_size", 1), ("overlap", 1)):
        _check_int(evaluate, key, lowest, "evaluate")
    from xrec.cluster import check_cluster_options

    check_cluster_options(evaluate.get("scheduler"), evaluate.get("workers"), where="evaluate.")
    sources = _check_table(raw.get("sources", {}), "sources")
    if not sources:
        raise ConfigError("sources: at least one [sources.NAME] table is needed")
    for name, table in sources.items():
        _check_table(table, f"sources.{name}")
        if not isinstance(table.get("kind"), str):
            raise ConfigError(f"sources.{name}.kind: required (e.g. 'popularity', 'als')")
        _check_source_settings(name, table)
    blends = _check_table(raw.get("blends", {}), "blends")
    for name, table in blends.items():
        where = f"blends.{name}"
        _check_table(table, where)
        _check_keys(table, _BLEND_KEYS, where)
        if name in sources:
            raise ConfigError(f"{where}: a blend may not share its name with a source")
        _check_blend(table, where, sources, learning_allowed=split.get("validation", True))
    for key in ("baseline", "primary"):
        value = evaluate.get(key)
        if value is not None and not isinstance(value, str):
            raise ConfigError(f"evaluate.{key}: the name of a source or blend, got {value!r}")
        if value is not None and value not in sources and value not in blends:
            raise ConfigError(f"evaluate.{key}: {value!r} is neither a source nor a blend")
    pairs = evaluate.get("pairs", [])
    if not isinstance(pairs, list) or not all(isinstance(p, list) and len(p) == 2 for p in pairs):
        raise ConfigError(f"evaluate.pairs: must be a list of [baseline, candidate] name pairs, got {pairs!r}")
    for pair in pairs:
        for value in pair:
            if value not in sources and value not in blends:
                raise ConfigError(f"evaluate.pairs: {value!r} is neither a source nor a blend")
    by = evaluate.get("by", [])
    if not isinstance(by, list) or not all(isinstance(b, str) and b.strip() for b in by):
        raise ConfigError(
            f"evaluate.by: a list of segment names (item_segment, user_segment or catalog columns), got {by!r}"
        )
    return ExperimentSpec(
        data=data,
        split=split,
        evaluate=evaluate,
        sources={k: dict(v) for k, v in sources.items()},
        blends={k: dict(v) for k, v in blends.items()},
        name=str(raw.get("name", "experiment")),
        base_dir=base_dir,
    )


BUILTIN_DIR = Path(__file__).with_name("specs")


def builtin_specs() -> list[str]:
    """Names of the specs shipped with xrec (usable instead of a path)."""
    return sorted(p.stem for p in BUILTIN_DIR.glob("*.toml"))


def load_spec(path_or_name: str | Path) -> ExperimentSpec:
    """Read and validate a spec file, or a built-in spec by name (see :func:`builtin_specs`)."""
    path = Path(path_or_name)
    if not path.is_file():
        builtin = BUILTIN_DIR / f"{path_or_name}.toml"
        if builtin.is_file():
            path = builtin
        elif path.exists():  # a folder, a device such as /dev/null, ...: say what it is
            raise ConfigError(f"spec: {path_problem(path, 'spec file')}")
        else:
            raise ConfigError(f"no spec file {str(path_or_name)!r} and no built-in spec of that name; built-in: {builtin_specs()}")
    text = read_text_file(path, "spec")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    base = path.parent if path.parent != BUILTIN_DIR else Path.cwd()
    return parse_spec(raw, base_dir=base)
