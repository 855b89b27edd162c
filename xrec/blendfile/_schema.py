"""What a blend file may hold: its format marker, the keys and types of each table, and :class:`SourceSpec`."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from xrec.blend.fusion import FUSION_METHODS

__all__ = ["CHECK_K", "CHECK_USERS", "FOLDS", "FORMAT", "FORMAT_VERSION", "METHODS", "SourceSpec"]

FORMAT = "xrec-blend"
FORMAT_VERSION = 2
METHODS: tuple[str, ...] = ("weighted", "gated", *FUSION_METHODS)
FOLDS = ("test", "validation")

TOP_KEYS = {"format", "format_version", "written_by", "dataset", "split", "combine", "sources", "evidence", "check"}
CHECK_KEYS = {"users", "k", "digest"}
CHECK_USERS = 64
CHECK_K = 10
DATASET_KEYS = {"name", "fingerprint", "load"}
SOURCE_KEYS = {"kind", "weight", "band_weights", "normalizer", "params"}
# Types of the split_dataset keyword arguments a file may carry.
SPLIT_TYPES: dict[str, tuple[type, ...]] = {
    "rule": (str,),
    "seed": (int,),
    "validation": (bool,),
    "min_train": (int,),
    "test_fraction": (int, float),
    "cold_fraction": (int, float),
    "cutoff": (str, int, float),
    "new_share": (int, float),
    "cold_users": (str,),
}
METHOD_KEYS: dict[str, set[str]] = {
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
