"""Blending sources: normalizers, weights, rank fusion, popularity gating, weight search."""

from typing import Any

from xrec.blend.blend import Blend
from xrec.blend.fusion import FUSION_METHODS, CombMNZ, CombSum, Fusion, ReciprocalRankFusion, make_fusion
from xrec.blend.normalize import NORMALIZERS, normalize

# Imported on first use: the weight-search modules pull in heavier dependencies (optuna, evaluation).
_LAZY = {
    "BANDS": "xrec.blend.gating",
    "GatedBlend": "xrec.blend.gating",
    "PopularityBands": "xrec.blend.gating",
    "learn_gated_weights": "xrec.blend.gating",
    "BlendEngine": "xrec.blend.engine",
    "LEARN_METHODS": "xrec.blend.learn",
    "LearnResult": "xrec.blend.learn",
    "learn_weights": "xrec.blend.learn",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'xrec.blend' has no attribute {name!r}")


__all__ = [
    "BANDS",
    "FUSION_METHODS",
    "LEARN_METHODS",
    "NORMALIZERS",
    "Blend",
    "BlendEngine",
    "CombMNZ",
    "CombSum",
    "Fusion",
    "GatedBlend",
    "LearnResult",
    "PopularityBands",
    "ReciprocalRankFusion",
    "learn_gated_weights",
    "learn_weights",
    "make_fusion",
    "normalize",
]
