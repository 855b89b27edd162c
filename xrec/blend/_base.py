"""What blends and fusion rules share: a named set of sources, fitting, and candidate masks."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Self

import numpy as np
import scipy.sparse as sp

from xrec._validation import check_fitted
from xrec.blend._rank import Candidates
from xrec.errors import ConfigError, DataError
from xrec.fold import Fold


def check_sources(sources: Mapping[str, Any]) -> dict[str, Any]:
    """A plain ordered dict of the sources, after checking names and objects."""
    if not isinstance(sources, Mapping) or not sources:
        raise ConfigError("sources: give a non-empty mapping of name -> source")
    out: dict[str, Any] = {}
    for name, src in sources.items():
        if not isinstance(name, str) or not name:
            raise ConfigError(f"sources: names must be non-empty strings, got {name!r}")
        if not (callable(getattr(src, "fit", None)) and callable(getattr(src, "score", None))):
            raise ConfigError(f"sources.{name}: expected a source with fit() and score(), got {type(src).__name__}")
        out[name] = src
    return out


class Combiner:
    """Base of :class:`~xrec.blend.Blend` and the fusion rules: fits sources, masks seen items.

    Subclasses implement :meth:`score`. Sources already fitted when :meth:`fit` is called
    are taken as they are (they are assumed to have been fitted on the same training rows).
    """

    sources: dict[str, Any]

    @property
    def is_low_rank(self) -> bool:
        return False

    def fit(self, fold: Fold, *, refit: bool = False, progress: bool = False) -> Self:
        """Fit the sources not fitted yet and keep the fold's training matrix; returns ``self``.

        Parameters
        ----------
        fold
            Its training rows fit the sources and mark each user's seen items.
        refit
            Fit every source again, also those already fitted (e.g. on another fold).
        progress
            Show a progress bar over the sources being fitted.
        """
        names = [n for n in self.sources if refit or not getattr(self.sources[n], "fitted_", False)]
        if progress and names:
            from tqdm.auto import tqdm

            names = tqdm(names, desc="fitting sources")
        for name in names:
            self.sources[name].fit(fold)
        self.train_matrix_: sp.csr_matrix = fold.train_matrix
        self.n_items_: int = fold.n_items
        self.fold_settings_: dict = dict(fold.settings)
        self.fitted_ = True
        return self

    def _check_fitted(self) -> None:
        check_fitted(self, how="call fit(fold) first")

    def _copy_fitted_state(self, other: Combiner) -> None:
        for attr in ("train_matrix_", "n_items_", "fold_settings_", "fitted_"):
            if hasattr(self, attr):
                setattr(other, attr, getattr(self, attr))

    def candidates(self, users: np.ndarray) -> Candidates:
        """The candidate (unseen) items of a block of users."""
        self._check_fitted()
        users = np.asarray(users, dtype=np.int64)
        return Candidates.from_seen(self.train_matrix_[users], len(users), self.n_items_)

    def candidate_mask(self, users: np.ndarray) -> np.ndarray:
        """Boolean ``(len(users), n_items)``: True where the item was not seen in training."""
        return self.candidates(users).mask

    def _source_block(self, name: str, users: np.ndarray) -> np.ndarray:
        block = np.asarray(self.sources[name].score(users))
        expected = (len(users), self.n_items_)
        if block.shape != expected:
            raise ValueError(f"source {name!r} returned scores of shape {block.shape}, expected {expected}")
        finite = np.isfinite(block)
        if not finite.all():
            bad_rows = np.flatnonzero(~finite.all(axis=1))
            raise DataError(
                f"source {name!r} returned {int((~finite).sum())} non-finite scores (NaN or inf), "
                f"first at user index {int(np.asarray(users)[bad_rows[0]])}; normalizers need finite scores"
            )
        return block

    def score(self, users: np.ndarray) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError


def fill_seen_with_row_min(out: np.ndarray, cand: Candidates) -> np.ndarray:
    """Give non-candidates the row's lowest candidate value (0 for rows without candidates), in place."""
    lo = cand.keyed(out, np.inf).min(axis=1, initial=np.inf)
    lo[~np.isfinite(lo)] = 0.0
    out[cand.seen_rows, cand.seen_cols] = lo[cand.seen_rows]
    return out
