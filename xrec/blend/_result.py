"""What a weight search returns (:class:`LearnResult`) and the default grid of shares it tries.

The lowest module of weight search: the exhaustive search (``_search``), the fast search
(``_fast_search``), gating and ``learn`` all import it, and it imports no search code.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

__all__ = ["DEFAULT_GRID", "LearnResult"]

#: Shares tried for one source in a coordinate line search (0 = source off, 1 = source alone).
DEFAULT_GRID = (0.0, 0.02, 0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45, 0.5, 0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95, 0.98, 1.0)


@dataclass
class LearnResult:
    """Outcome of a weight search.

    Attributes
    ----------
    method
        Search method name.
    metric
        The metric maximized, ``"<name>@<k>"``.
    weights
        Chosen weights, non-negative, summing to 1, in source order.
    valid_score
        Metric of ``weights`` on the validation users.
    test_score
        Metric of ``weights`` on the test fold, when one was given.
    best_single
        ``(source, validation score)`` of the best source alone.
    best_single_test
        Test score of that source alone, when a test fold was given.
    history
        One row per evaluated weight vector: the weights, the validation score and the phase.
    details
        Method-specific extras (restarts, coefficients, trials).
    band_weights
        Gated blends only (:func:`~xrec.blend.gating.learn_gated_weights`): ``{band: {source: weight}}``.
    """

    method: str
    metric: str
    weights: dict[str, float]
    valid_score: float
    test_score: float | None = None
    best_single: tuple[str, float] | None = None
    best_single_test: float | None = None
    history: pd.DataFrame = field(default_factory=pd.DataFrame)
    details: dict = field(default_factory=dict)
    band_weights: dict[str, dict[str, float]] | None = None

    def summary(self) -> pd.DataFrame:
        """Validation and test score of the chosen blend and of the best single source, side by side."""
        rows = [{"blend": f"{self.method} blend", "validation": self.valid_score, "test": self.test_score}]
        if self.best_single is not None:
            rows.append({"blend": f"{self.best_single[0]} alone", "validation": self.best_single[1], "test": self.best_single_test})
        return pd.DataFrame(rows).set_index("blend")

    def __repr__(self) -> str:
        w = ", ".join(f"{k}={v:.3f}" for k, v in self.weights.items())
        test = "" if self.test_score is None else f", test {self.metric}={self.test_score:.4f}"
        return f"LearnResult({self.method}: {w}; validation {self.metric}={self.valid_score:.4f}{test})"
