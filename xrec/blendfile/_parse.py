"""Validation of a parsed blend file, field by field (the work of :meth:`BlendSpec.from_dict`)."""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

from xrec._toml_tables import check_type, get_value, no_unknown, require_table, type_name
from xrec.blend.blend import check_weight
from xrec.blend.gating import BANDS
from xrec.blend.normalize import check_normalizer
from xrec.blendfile._schema import (
    CHECK_KEYS,
    DATASET_KEYS,
    FOLDS,
    FORMAT,
    FORMAT_VERSION,
    METHODS,
    METHOD_KEYS,
    SOURCE_KEYS,
    SPLIT_TYPES,
    TOP_KEYS,
    SourceSpec,
)
from xrec.errors import ConfigError

__all__ = ["parse_fields"]


def parse_fields(raw: Mapping[str, Any]) -> dict[str, Any]:
    """Validate parsed TOML content; the keyword arguments of ``BlendSpec``, or :class:`ConfigError` naming the bad field."""
    from xrec.sources.base import source_kinds

    require_table(raw, "the file")
    no_unknown(raw, TOP_KEYS, "")
    fmt = get_value(raw, "format", str, "")
    if fmt != FORMAT:
        raise ConfigError(f"format: expected {FORMAT!r}, got {fmt!r} (is this an xrec blend file?)")
    version = get_value(raw, "format_version", int, "")
    if version != FORMAT_VERSION:
        raise ConfigError(f"format_version: unsupported version {version}; this xrec reads version {FORMAT_VERSION}")
    if "written_by" in raw:
        get_value(raw, "written_by", str, "")

    dataset = get_value(raw, "dataset", dict, "")
    no_unknown(dataset, DATASET_KEYS, "dataset")
    name = get_value(dataset, "name", str, "dataset")
    fingerprint = get_value(dataset, "fingerprint", str, "dataset")
    load = get_value(dataset, "load", dict, "dataset", required=False)

    split_raw = dict(get_value(raw, "split", dict, ""))
    record = split_raw.pop("record", None)
    if record is not None and not isinstance(record, dict):
        raise ConfigError(f"split.record: must be a table, got {type_name(record)}")
    fold = get_value(split_raw, "fold", str, "split")
    if fold not in FOLDS:
        raise ConfigError(f"split.fold: must be one of {list(FOLDS)}, got {fold!r}")
    del split_raw["fold"]
    no_unknown(split_raw, set(SPLIT_TYPES), "split", what="split setting")
    get_value(split_raw, "rule", str, "split")
    for key, value in split_raw.items():
        check_type(value, SPLIT_TYPES[key], f"split.{key}")
        if key in ("test_fraction", "cold_fraction", "cutoff", "new_share") and isinstance(value, float) and not math.isfinite(value):
            raise ConfigError(f"split.{key}: must be finite, got {value!r}")

    combine = dict(get_value(raw, "combine", dict, ""))
    method = get_value(combine, "method", str, "combine")
    if method not in METHODS:
        raise ConfigError(f"combine.method: unknown method {method!r}; choose one of {list(METHODS)}")
    del combine["method"]
    no_unknown(combine, METHOD_KEYS[method], "combine", what=f"setting for method {method!r}")
    if method == "gated" and "head_min" not in combine:
        raise ConfigError("combine.head_min: missing (method 'gated' needs the head band's edge)")
    params = {}
    for key, value in combine.items():
        where = f"combine.{key}"
        if key == "k":
            check_type(value, (int, float), where)
            if not (math.isfinite(value) and value > 0):
                raise ConfigError(f"{where}: must be a finite number > 0, got {value!r}")
            value = float(value)
        elif key in ("depth", "head_min"):
            check_type(value, (int,), where)
            if value < 1:
                raise ConfigError(f"{where}: must be >= 1, got {value}")
        elif key == "normalizer":
            check_type(value, (str,), where)
            check_normalizer(value, where)
        params[key] = value

    sources_raw = get_value(raw, "sources", dict, "")
    if not sources_raw:
        raise ConfigError("sources: the file names no source")
    kinds = source_kinds()
    sources: dict[str, SourceSpec] = {}
    for src_name, table in sources_raw.items():
        where = f"sources.{src_name}"
        if not isinstance(table, dict):
            raise ConfigError(f"{where}: must be a table, got {type_name(table)}")
        no_unknown(table, SOURCE_KEYS, where)
        kind = get_value(table, "kind", str, where)
        if kind not in kinds:
            raise ConfigError(f"{where}.kind: unknown source kind {kind!r}; known: {kinds}")
        src_params = get_value(table, "params", dict, where, required=False) or {}
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
            bands = get_value(table, "band_weights", dict, where)
            no_unknown(bands, set(BANDS), f"{where}.band_weights", what="band")
            missing = [b for b in BANDS if b not in bands]
            if missing:
                raise ConfigError(f"{where}.band_weights.{missing[0]}: missing (bands are {list(BANDS)})")
            bands = {b: check_weight(bands[b], f"{where}.band_weights.{b}") for b in BANDS}
        if "normalizer" in used:
            normalizer = get_value(table, "normalizer", str, where)
            check_normalizer(normalizer, f"{where}.normalizer")
        sources[src_name] = SourceSpec(
            kind=kind, params=dict(src_params), weight=weight, normalizer=normalizer, band_weights=bands
        )
    if method == "weighted" and not any(s.weight > 0 for s in sources.values()):
        raise ConfigError("sources: every weight is zero; at least one source needs a positive weight")
    if method == "gated" and not any(w > 0 for s in sources.values() for w in s.band_weights.values()):
        raise ConfigError("sources: every band weight is zero; at least one needs to be positive")

    evidence = get_value(raw, "evidence", dict, "", required=False)
    if "check" not in raw:
        raise ConfigError("check: missing; every blend file carries the check of its rankings (users, k, digest)")
    check = get_value(raw, "check", dict, "")
    no_unknown(check, CHECK_KEYS, "check")
    # Bounded by the sizes the file records, before any data is loaded (the runtime bounds them
    # again by the data it loads): a huge check.users or check.k would make huge arrays.
    for key, recorded in (("users", "n_users"), ("k", "n_items")):
        value = get_value(check, key, int, "check")
        if value < 1:
            raise ConfigError(f"check.{key}: must be >= 1, got {value}")
        limit = (record or {}).get(recorded)
        if isinstance(limit, int) and not isinstance(limit, bool) and value > limit:
            raise ConfigError(f"check.{key}: {value} exceeds split.record.{recorded} = {limit}")
    digest = get_value(check, "digest", str, "check")
    if not re.fullmatch(r"[0-9a-f]{16}", digest):
        raise ConfigError(f"check.digest: must be 16 lowercase hex digits, got {digest!r}")
    return dict(
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
        check=dict(check),
        format_version=version,
    )
