"""Blend files: a TOML record of a chosen blend that a service can load and reproduce exactly.

A blend file holds no fitted model state (no factors, vectors or similarities): it
names the data (by fingerprint), the split that produced the training rows, each
source's kind and settings, and how the sources are combined (normalizers and weights,
which may have been learned, or a fusion rule). :func:`xrec.runtime.load_blend`
recreates the training fold, refits the sources and serves rankings identical to the
in-memory blend.

Schema (format version 1)
-------------------------
::

    format = "xrec-blend"            # required, exactly this string
    format_version = 1               # required; files of other versions are refused
    written_by = "xrec 0.1.0"        # optional, informational

    [dataset]                        # required
    name = "movielens"               # required, str: Dataset.name when written
    fingerprint = "0a1b…-2c3d…"      # required, str: Dataset.fingerprint() (interactions-catalog)
    [dataset.load]                   # optional, free-form: how a tool may find the data again
    dataset = "movielens"            # (not read by xrec.blendfile itself)

    [split]                          # required: keyword arguments of xrec.split.split_dataset
    fold = "test"                    # required: "test" or "validation", the fold whose
                                     #   training rows the sources are fitted on
    rule = "leave_last"              # required, str
    seed = 0                         # optional, int >= 0
    validation = true                # optional, bool
    min_train = 1                    # optional, int >= 1
    test_fraction = 0.2              # optional, float (rules "random", "time_cutoff")
    cold_fraction = 0.1              # optional, float (rule "cold_items")
    cutoff = "q0.8"                  # optional, str or number (rule "time_cutoff")
    [split.record]                   # optional: the split's settings as produced (row counts,
    n_interactions = 100004          #   resolved cutoffs, ...); on load every recorded value
                                     #   must equal the recreated split's, else FingerprintMismatch

    [combine]                        # required
    method = "weighted"              # "weighted" | "gated" | "rrf" | "combsum" | "combmnz"
    # gated:   head_min = 12 (int >= 1): fewest training interactions of a "head" item
    # rrf:     k = 60.0 (number > 0), depth = 100 (optional int >= 1; absent = all candidates)
    # combsum: normalizer = "minmax" (any of "none"|"minmax"|"zscore"|"rank")
    # combmnz: normalizer = "minmax" | "rank", depth = 100

    [sources.als]                    # one table per source, at least one; order is kept
    kind = "als"                     # required: a registered source kind
    weight = 1.0                     # method "weighted": required, finite number >= 0
    normalizer = "zscore"            # "weighted", "gated": required, "none"|"minmax"|"zscore"|"rank"
    [sources.als.band_weights]       # method "gated" only, required: a weight >= 0 per band
    new = 0.0                        #   (items without training interactions)
    tail = 0.6
    head = 1.0                       #   (items with >= head_min training interactions)
    [sources.als.params]             # optional: Source.get_params(); settings left out take
    factors = 64                     #   the source's defaults (a None setting is left out)

    [evidence]                       # optional, free-form: what the blend was chosen on
    # e.g. a Scorecard.to_dict() or a comparison dict (None values are dropped)

    [check]                          # optional (written when the blend was fitted): a
    users = 64                       #   fingerprint of its rankings. digest = first 16 hex
    k = 10                           #   digits of SHA-256 over the int64 top-k item indices
    digest = "5be0…"                 #   of user indices 0 .. users-1 (ties: lower index first);
                                     #   load_blend recomputes it after refitting

Every other key is an error. ``weight``, ``band_weights`` and ``normalizer`` are
forbidden where their method does not use them; at least one weight must be positive.
Errors name the field, e.g. ``sources.als.weight: must be >= 0, got -1``. The
``split.record`` check skips ``dataset`` (a label) and ``dataset_fingerprint`` (checked
as ``dataset.fingerprint``), and keys the running xrec's split no longer reports.

The file is written atomically (a temporary file in the same folder, then ``os.replace``),
so a reader never sees half a file.
"""

from __future__ import annotations

import datetime as _dt
import inspect
import math
import os
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from numbers import Integral, Real
from pathlib import Path
from typing import Any

import numpy as np
import tomli_w

from xrec._files import write_text_atomic
from xrec.blend.blend import Blend, check_weight
from xrec.blend.fusion import FUSION_METHODS, Fusion, make_fusion
from xrec.blend.gating import BANDS
from xrec.blend.normalize import check_normalizer
from xrec.data.dataset import Dataset
from xrec.errors import ConfigError, FingerprintMismatch

FORMAT = "xrec-blend"
FORMAT_VERSION = 1
METHODS: tuple[str, ...] = ("weighted", "gated", *FUSION_METHODS)
FOLDS = ("test", "validation")

_TOP_KEYS = {"format", "format_version", "written_by", "dataset", "split", "combine", "sources", "evidence", "check"}
_CHECK_KEYS = {"users", "k", "digest"}
CHECK_USERS = 64
CHECK_K = 10
_DATASET_KEYS = {"name", "fingerprint", "load"}
_SOURCE_KEYS = {"kind", "weight", "band_weights", "normalizer", "params"}
# Types of the split_dataset keyword arguments a file may carry.
_SPLIT_TYPES: dict[str, tuple[type, ...]] = {
    "rule": (str,),
    "seed": (int,),
    "validation": (bool,),
    "min_train": (int,),
    "test_fraction": (int, float),
    "cold_fraction": (int, float),
    "cutoff": (str, int, float),
}
_METHOD_KEYS: dict[str, set[str]] = {
    "weighted": set(),
    "gated": {"head_min"},
    "rrf": {"k", "depth"},
    "combsum": {"normalizer"},
    "combmnz": {"normalizer", "depth"},
}


@dataclass(frozen=True)
class SourceSpec:
    """One source of a blend file: kind, settings, and its weight (or band weights) and normalizer."""

    kind: str
    params: dict[str, Any] = field(default_factory=dict)
    weight: float | None = None
    normalizer: str | None = None
    band_weights: dict[str, float] | None = None


@dataclass(frozen=True)
class BlendSpec:
    """A validated blend file, free of data. Build the (unfitted) scorer with :meth:`build`.

    Attributes
    ----------
    dataset_name, fingerprint
        The data the blend was chosen on.
    split
        Keyword arguments for :func:`xrec.split.split_dataset`.
    fold
        ``"test"`` or ``"validation"``: whose training rows the sources are fitted on.
    split_record
        The split's settings as produced when the file was written (checked on load).
    method, method_params
        ``"weighted"`` (weights and normalizers in ``sources``), ``"gated"`` (band weights and
        normalizers in ``sources``, ``head_min`` in ``method_params``) or a fusion rule and its settings.
    sources
        Name -> :class:`SourceSpec`, in file order.
    evidence
        Free-form record of what the blend was chosen on, or ``None``.
    dataset_load
        Free-form hints for finding the data again, or ``None``.
    check
        ``{"users", "k", "digest"}``: a fingerprint of the rankings when written, or ``None``.
    """

    dataset_name: str
    fingerprint: str
    split: dict[str, Any]
    fold: str
    method: str
    sources: dict[str, SourceSpec]
    method_params: dict[str, Any] = field(default_factory=dict)
    split_record: dict[str, Any] = field(default_factory=dict)
    evidence: dict[str, Any] | None = None
    dataset_load: dict[str, Any] | None = None
    check: dict[str, Any] | None = None
    format_version: int = FORMAT_VERSION

    # -- building ------------------------------------------------------------------------------

    def build_sources(self) -> dict[str, Any]:
        """Fresh, unfitted sources named as in the file."""
        from xrec.sources.base import make_source

        out = {}
        for name, src in self.sources.items():
            try:
                out[name] = make_source(src.kind, **src.params)
            except ConfigError as exc:
                raise ConfigError(f"sources.{name}.params: {exc}") from exc
        return out

    def build(self) -> Blend | Fusion:
        """The unfitted blend or fusion rule this file describes."""
        sources = self.build_sources()
        normalizers = {name: s.normalizer for name, s in self.sources.items()}
        if self.method == "weighted":
            return Blend(sources, {name: s.weight for name, s in self.sources.items()}, normalizers)
        if self.method == "gated":
            from xrec.blend.gating import GatedBlend

            band_weights = {b: {name: s.band_weights[b] for name, s in self.sources.items()} for b in BANDS}
            return GatedBlend(sources, band_weights, normalizers, head_min=self.method_params["head_min"])
        return make_fusion(self.method, sources, **self.method_params)

    def check_dataset(self, dataset: Dataset) -> None:
        """Raise :class:`FingerprintMismatch` unless ``dataset`` is the data this file was made on."""
        actual = dataset.fingerprint()
        if actual == self.fingerprint:
            return
        parts = []
        written, now = self.fingerprint.split("-"), actual.split("-")
        if len(written) == 2 and len(now) == 2:
            if written[0] != now[0]:
                parts.append("the interactions differ")
            if written[1] != now[1]:
                parts.append("the catalog differs")
        detail = f" ({' and '.join(parts)})" if parts else ""
        raise FingerprintMismatch(
            f"dataset.fingerprint: the blend file was made on data {self.fingerprint!r} "
            f"({self.dataset_name!r}) but the given dataset {dataset.name!r} has {actual!r}{detail}"
        )

    # -- (de)serializing -----------------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """The file's content as plain TOML-ready values."""
        from xrec import __version__

        out: dict[str, Any] = {"format": FORMAT, "format_version": self.format_version, "written_by": f"xrec {__version__}"}
        dataset: dict[str, Any] = {"name": self.dataset_name, "fingerprint": self.fingerprint}
        if self.dataset_load:
            dataset["load"] = _plain(self.dataset_load, "dataset.load")
        out["dataset"] = dataset
        split: dict[str, Any] = {"fold": self.fold, **self.split}
        if self.split_record:
            split["record"] = _plain(self.split_record, "split.record")
        out["split"] = split
        out["combine"] = {"method": self.method, **{k: v for k, v in self.method_params.items() if v is not None}}
        sources: dict[str, Any] = {}
        for name, src in self.sources.items():
            table: dict[str, Any] = {"kind": src.kind}
            if self.method == "weighted":
                table["weight"] = src.weight
            if self.method in ("weighted", "gated"):
                table["normalizer"] = src.normalizer
            if self.method == "gated":
                table["band_weights"] = dict(src.band_weights or {})
            if src.params:
                table["params"] = src.params
            sources[name] = table
        out["sources"] = sources
        if self.evidence:
            out["evidence"] = _plain(self.evidence, "evidence")
        if self.check:
            out["check"] = dict(self.check)
        return out

    @classmethod
    def from_dict(cls, raw: Mapping[str, Any]) -> BlendSpec:
        """Validate parsed TOML content; raises :class:`ConfigError` naming the bad field."""
        from xrec.sources.base import source_kinds

        _require_table(raw, "the file")
        _no_unknown(raw, _TOP_KEYS, "")
        fmt = _get(raw, "format", str, "")
        if fmt != FORMAT:
            raise ConfigError(f"format: expected {FORMAT!r}, got {fmt!r} (is this an xrec blend file?)")
        version = _get(raw, "format_version", int, "")
        if version != FORMAT_VERSION:
            raise ConfigError(f"format_version: unsupported version {version}; this xrec reads version {FORMAT_VERSION}")
        if "written_by" in raw:
            _get(raw, "written_by", str, "")

        dataset = _get(raw, "dataset", dict, "")
        _no_unknown(dataset, _DATASET_KEYS, "dataset")
        name = _get(dataset, "name", str, "dataset")
        fingerprint = _get(dataset, "fingerprint", str, "dataset")
        load = _get(dataset, "load", dict, "dataset", required=False)

        split_raw = dict(_get(raw, "split", dict, ""))
        record = split_raw.pop("record", None)
        if record is not None and not isinstance(record, dict):
            raise ConfigError(f"split.record: must be a table, got {_type_name(record)}")
        fold = _get(split_raw, "fold", str, "split")
        if fold not in FOLDS:
            raise ConfigError(f"split.fold: must be one of {list(FOLDS)}, got {fold!r}")
        del split_raw["fold"]
        _no_unknown(split_raw, set(_SPLIT_TYPES), "split", what="split setting")
        _get(split_raw, "rule", str, "split")
        for key, value in split_raw.items():
            _check_type(value, _SPLIT_TYPES[key], f"split.{key}")
            if key in ("test_fraction", "cold_fraction", "cutoff") and isinstance(value, float) and not math.isfinite(value):
                raise ConfigError(f"split.{key}: must be finite, got {value!r}")

        combine = dict(_get(raw, "combine", dict, ""))
        method = _get(combine, "method", str, "combine")
        if method not in METHODS:
            raise ConfigError(f"combine.method: unknown method {method!r}; choose one of {list(METHODS)}")
        del combine["method"]
        _no_unknown(combine, _METHOD_KEYS[method], "combine", what=f"setting for method {method!r}")
        if method == "gated" and "head_min" not in combine:
            raise ConfigError("combine.head_min: missing (method 'gated' needs the head band's edge)")
        params = {}
        for key, value in combine.items():
            where = f"combine.{key}"
            if key == "k":
                _check_type(value, (int, float), where)
                if not (math.isfinite(value) and value > 0):
                    raise ConfigError(f"{where}: must be a finite number > 0, got {value!r}")
                value = float(value)
            elif key in ("depth", "head_min"):
                _check_type(value, (int,), where)
                if value < 1:
                    raise ConfigError(f"{where}: must be >= 1, got {value}")
            elif key == "normalizer":
                _check_type(value, (str,), where)
                check_normalizer(value, where)
            params[key] = value

        sources_raw = _get(raw, "sources", dict, "")
        if not sources_raw:
            raise ConfigError("sources: the file names no source")
        kinds = source_kinds()
        sources: dict[str, SourceSpec] = {}
        for src_name, table in sources_raw.items():
            where = f"sources.{src_name}"
            if not isinstance(table, dict):
                raise ConfigError(f"{where}: must be a table, got {_type_name(table)}")
            _no_unknown(table, _SOURCE_KEYS, where)
            kind = _get(table, "kind", str, where)
            if kind not in kinds:
                raise ConfigError(f"{where}.kind: unknown source kind {kind!r}; known: {kinds}")
            src_params = _get(table, "params", dict, where, required=False) or {}
            used = {"weighted": ("weight", "normalizer"), "gated": ("band_weights", "normalizer")}.get(method, ())
            for key in ("weight", "band_weights", "normalizer"):
                if key in table and key not in used:
                    raise ConfigError(f"{where}.{key}: not used by method {method!r}; remove it")
                if key in used and key not in table:
                    raise ConfigError(f"{where}.{key}: missing (method {method!r} needs it for every source)")
            weight = normalizer = bands = None
            if "weight" in used:
                weight = check_weight(table["weight"], f"{where}.weight")
            if "band_weights" in used:
                bands = _get(table, "band_weights", dict, where)
                _no_unknown(bands, set(BANDS), f"{where}.band_weights", what="band")
                missing = [b for b in BANDS if b not in bands]
                if missing:
                    raise ConfigError(f"{where}.band_weights.{missing[0]}: missing (bands are {list(BANDS)})")
                bands = {b: check_weight(bands[b], f"{where}.band_weights.{b}") for b in BANDS}
            if "normalizer" in used:
                normalizer = _get(table, "normalizer", str, where)
                check_normalizer(normalizer, f"{where}.normalizer")
            sources[src_name] = SourceSpec(
                kind=kind, params=dict(src_params), weight=weight, normalizer=normalizer, band_weights=bands
            )
        if method == "weighted" and not any(s.weight > 0 for s in sources.values()):
            raise ConfigError("sources: every weight is zero; at least one source needs a positive weight")
        if method == "gated" and not any(w > 0 for s in sources.values() for w in s.band_weights.values()):
            raise ConfigError("sources: every band weight is zero; at least one needs to be positive")

        evidence = _get(raw, "evidence", dict, "", required=False)
        check = _get(raw, "check", dict, "", required=False)
        if check is not None:
            _no_unknown(check, _CHECK_KEYS, "check")
            for key in ("users", "k"):
                if _get(check, key, int, "check") < 1:
                    raise ConfigError(f"check.{key}: must be >= 1, got {check[key]}")
            _get(check, "digest", str, "check")
        spec = cls(
            dataset_name=name,
            fingerprint=fingerprint,
            split=split_raw,
            fold=fold,
            method=method,
            sources=sources,
            method_params=params,
            split_record=dict(record or {}),
            evidence=evidence,
            dataset_load=load,
            check=dict(check) if check is not None else None,
            format_version=version,
        )
        # Settings a source does not take, or a fusion rule rejects, surface here rather than at load.
        spec.build()
        return spec


def read_blend(path: str | os.PathLike) -> BlendSpec:
    """Read and validate a blend file (no data needed).

    Parameters
    ----------
    path
        The TOML blend file.

    Returns
    -------
    BlendSpec
        The validated contents; :func:`xrec.runtime.load_blend` turns them into a fitted blend.

    Raises
    ------
    ConfigError
        When the file is missing, is not TOML, or breaks the schema (the message names the field).
    """
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"blend file not found: {path}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"blend file {path} is not valid TOML: {exc}") from exc
    try:
        return BlendSpec.from_dict(raw)
    except FingerprintMismatch:
        raise
    except ConfigError as exc:
        raise type(exc)(f"{path.name}: {exc}") from exc


def spec_from_scorer(
    scorer: Blend | Fusion,
    *,
    dataset: Dataset,
    split_settings: Mapping[str, Any] | None = None,
    fold: str | None = None,
    evidence: Mapping[str, Any] | None = None,
    dataset_load: Mapping[str, Any] | None = None,
) -> BlendSpec:
    """Describe a blend or fusion rule as a :class:`BlendSpec` (see :func:`save_blend`)."""
    from xrec.sources.base import Source, source_kinds

    if not isinstance(scorer, (Blend, Fusion)):
        raise ConfigError(f"expected a Blend or a fusion rule, got {type(scorer).__name__}")
    method = getattr(scorer, "method", "")
    if method not in METHODS:
        raise ConfigError(f"combine.method: blend files cannot record a {type(scorer).__name__} (method {method!r})")
    if split_settings is None:
        split_settings = getattr(scorer, "fold_settings_", None)
        if not split_settings:
            raise ConfigError("split_settings: not given and the blend was not fitted on a fold that records them")
    settings = dict(split_settings)
    if fold is None:
        fold = settings.get("part", "test")
    if fold not in FOLDS:
        raise ConfigError(f"fold: must be one of {list(FOLDS)}, got {fold!r}")
    if "rule" not in settings:
        raise ConfigError("split_settings: no 'rule'; pass SplitResult.settings (or Fold.settings)")
    recorded_fp = settings.get("dataset_fingerprint")
    if recorded_fp is not None and recorded_fp != dataset.fingerprint():
        raise FingerprintMismatch(
            f"split_settings.dataset_fingerprint: the split was made on data {recorded_fp!r}, "
            f"but the given dataset has {dataset.fingerprint()!r}"
        )
    split_keys = [k for k in _split_parameters() if k in settings]
    unsupported = [k for k in split_keys if k not in _SPLIT_TYPES]
    if unsupported:
        raise ConfigError(f"split_settings: blend files cannot record split setting(s) {unsupported} yet")
    split_args = {k: _plain(settings[k], f"split.{k}") for k in split_keys}
    record = {k: v for k, v in settings.items() if k not in split_args and k != "part" and v is not None}

    kinds = source_kinds()
    sources: dict[str, SourceSpec] = {}
    for name, src in scorer.sources.items():
        if not isinstance(src, Source) or src.kind not in kinds:
            raise ConfigError(f"sources.{name}: only registered source kinds can be written, got {type(src).__name__}")
        params = _source_params(src, f"sources.{name}.params")
        if method == "weighted":
            sources[name] = SourceSpec(src.kind, params, weight=scorer.weights[name], normalizer=scorer.normalizers[name])
        elif method == "gated":
            bands = {b: float(scorer.band_weights[b][name]) for b in BANDS}
            sources[name] = SourceSpec(src.kind, params, normalizer=scorer.normalizers[name], band_weights=bands)
        else:
            sources[name] = SourceSpec(src.kind, params)
    if method == "weighted":
        method_params: dict[str, Any] = {}
    elif method == "gated":
        head_min = scorer.get_params().get("head_min")
        if head_min is None:
            raise ConfigError("combine.head_min: the gated blend has no fixed band edge yet; fit it first")
        method_params = {"head_min": int(head_min)}
    else:
        method_params = {k: v for k, v in scorer.get_params().items() if v is not None}
    check = None
    if getattr(scorer, "fitted_", False):
        users = min(CHECK_USERS, scorer.train_matrix_.shape[0])
        check = {"users": users, "k": CHECK_K, "digest": ranking_digest(scorer, users, CHECK_K)}
    return BlendSpec(
        dataset_name=dataset.name,
        fingerprint=dataset.fingerprint(),
        split=split_args,
        fold=fold,
        method=method,
        sources=sources,
        method_params=method_params,
        split_record=_plain(record, "split.record"),
        evidence=_plain(dict(evidence), "evidence") if evidence else None,
        dataset_load=_plain(dict(dataset_load), "dataset.load") if dataset_load else None,
        check=check,
    )


def ranking_digest(scorer: Blend | Fusion, users: int, k: int) -> str:
    """Fingerprint of a fitted scorer's rankings: SHA-256 (16 hex digits) of the top-``k`` item
    indices (int64, little-endian; ties to the lower index) of user indices ``0 .. users-1``."""
    import hashlib

    from xrec.evaluate._ranking import top_k_items

    idx = np.arange(users, dtype=np.int64)
    top = top_k_items(scorer.score(idx), scorer.train_matrix_[idx], k).astype("<i8")
    return hashlib.sha256(np.ascontiguousarray(top).tobytes()).hexdigest()[:16]


def save_blend(
    path: str | os.PathLike,
    blend_or_fusion: Blend | Fusion,
    *,
    dataset: Dataset,
    split_settings: Mapping[str, Any] | None = None,
    evidence: Mapping[str, Any] | None = None,
    fold: str | None = None,
    dataset_load: Mapping[str, Any] | None = None,
) -> Path:
    """Write a blend file atomically and return its path.

    Parameters
    ----------
    path
        Where to write (``.toml``); the folder must exist.
    blend_or_fusion
        A :class:`~xrec.blend.Blend` or a fusion rule whose sources are registered kinds.
    dataset
        The data the blend was chosen on; its name and fingerprint are recorded.
    split_settings
        ``SplitResult.settings`` (or a fold's ``settings``) of the split the sources are
        fitted on. Default: the settings of the fold the blend was fitted on.
    evidence
        Optional record of what the blend was chosen on (``Scorecard.to_dict()``, a
        comparison dict, ...). numpy values become plain numbers / lists; ``None`` values are dropped.
    fold
        ``"test"`` (sources fitted on every non-test row) or ``"validation"``. Default: the
        ``part`` named in ``split_settings``, else ``"test"``.
    dataset_load
        Optional free-form hints (e.g. an experiment spec's ``[data]`` table) for tools that
        must find the data again.

    Raises
    ------
    ConfigError
        When the blend cannot be described (unregistered source, a setting TOML cannot hold)
        or the file would not read back.
    """
    spec = spec_from_scorer(
        blend_or_fusion, dataset=dataset, split_settings=split_settings, fold=fold, evidence=evidence, dataset_load=dataset_load
    )
    content = spec.to_dict()
    BlendSpec.from_dict(content)  # never write a file that would not read back
    text = "# xrec blend file: load with xrec.runtime.load_blend(path, dataset)\n" + tomli_w.dumps(content)
    return write_text_atomic(path, text)


# -- helpers -----------------------------------------------------------------------------------


def _split_parameters() -> list[str]:
    from xrec.split import split_dataset

    return [p for p in inspect.signature(split_dataset).parameters if p != "dataset"]


def _source_params(src: Any, where: str) -> dict[str, Any]:
    params = src.get_params()
    defaults = {
        name: p.default for name, p in inspect.signature(type(src).__init__).parameters.items() if name != "self"
    }
    out = {}
    for key, value in params.items():
        if value is None:
            if defaults.get(key, inspect.Parameter.empty) is not None:
                raise ConfigError(f"{where}.{key}: None cannot be written to TOML and is not the setting's default")
            continue
        out[key] = _plain(value, f"{where}.{key}", drop_none=False)
    return out


def _plain(value: Any, where: str, *, drop_none: bool = True) -> Any:
    """``value`` as TOML-ready built-ins (dict/list/str/int/float/bool/datetime)."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (Integral, np.integer)):
        return int(value)
    if isinstance(value, (Real, np.floating)):
        return float(value)
    if isinstance(value, str):
        return value
    if isinstance(value, (_dt.datetime, _dt.date, _dt.time)):
        return value
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if v is None:
                if drop_none:
                    continue
                raise ConfigError(f"{where}.{k}: None cannot be written to TOML")
            out[str(k)] = _plain(v, f"{where}.{k}", drop_none=drop_none)
        return out
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple, set, frozenset)):
        items = sorted(value, key=str) if isinstance(value, (set, frozenset)) else list(value)
        if any(v is None for v in items):
            raise ConfigError(f"{where}: a list holding None cannot be written to TOML")
        return [_plain(v, f"{where}[{i}]", drop_none=drop_none) for i, v in enumerate(items)]
    if hasattr(value, "isoformat"):  # pandas.Timestamp and friends
        return value.isoformat()
    raise ConfigError(f"{where}: cannot write a {type(value).__name__} to a blend file")


def _type_name(value: Any) -> str:
    return {dict: "a table", list: "an array", str: "a string", bool: "a boolean", int: "an integer", float: "a float"}.get(
        type(value), type(value).__name__
    )


def _check_type(value: Any, types: tuple[type, ...], where: str) -> None:
    ok = isinstance(value, types) and not (isinstance(value, bool) and bool not in types)
    if not ok:
        names = " or ".join(_type_name(t()) if t is not dict else "a table" for t in types)
        raise ConfigError(f"{where}: must be {names}, got {_type_name(value)} {value!r}")


def _get(table: Mapping[str, Any], key: str, typ: type, where: str, *, required: bool = True) -> Any:
    name = f"{where}.{key}" if where else key
    if key not in table:
        if required:
            raise ConfigError(f"{name}: missing")
        return None
    value = table[key]
    _check_type(value, (typ,), name)
    return value


def _require_table(value: Any, where: str) -> None:
    if not isinstance(value, Mapping):
        raise ConfigError(f"{where}: must be a table, got {_type_name(value)}")


def _no_unknown(table: Mapping[str, Any], allowed: set[str], where: str, *, what: str = "key") -> None:
    unknown = [k for k in table if k not in allowed]
    if unknown:
        name = f"{where}.{unknown[0]}" if where else unknown[0]
        raise ConfigError(f"{name}: unknown {what}; allowed here: {sorted(allowed)}")
