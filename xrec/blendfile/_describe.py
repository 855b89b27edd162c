"""Describing a blend or fusion rule as a :class:`BlendSpec`, and the fingerprint of its rankings."""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from typing import Any

import numpy as np

from xrec._toml_tables import plain
from xrec.blend.blend import Blend
from xrec.blend.fusion import Fusion
from xrec.blend.gating import BANDS
from xrec.blendfile._blend_spec import BlendSpec
from xrec.blendfile._schema import CHECK_K, CHECK_USERS, FOLDS, METHODS, SPLIT_TYPES, SourceSpec
from xrec.data.dataset import Dataset
from xrec.errors import ConfigError, FingerprintMismatch

__all__ = ["ranking_digest", "spec_from_scorer"]


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
    unsupported = [k for k in split_keys if k not in SPLIT_TYPES]
    if unsupported:
        raise ConfigError(f"split_settings: blend files cannot record split setting(s) {unsupported} yet")
    split_args = {k: plain(settings[k], f"split.{k}") for k in split_keys}
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
    if not getattr(scorer, "fitted_", False):
        raise ConfigError(
            "check: the blend is not fitted; fit it on its fold first (every blend file records a check of its rankings)"
        )
    users, k = min(CHECK_USERS, scorer.train_matrix_.shape[0]), min(CHECK_K, scorer.train_matrix_.shape[1])
    check = {"users": users, "k": k, "digest": ranking_digest(scorer, users, k)}
    return BlendSpec(
        dataset_name=dataset.name,
        fingerprint=dataset.fingerprint(),
        split=split_args,
        fold=fold,
        method=method,
        sources=sources,
        method_params=method_params,
        split_record=plain(record, "split.record"),
        evidence=plain(dict(evidence), "evidence") if evidence else None,
        dataset_load=plain(dict(dataset_load), "dataset.load") if dataset_load else None,
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
        out[key] = plain(value, f"{where}.{key}", drop_none=False)
    return out

