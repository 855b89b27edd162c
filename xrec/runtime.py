"""Serve a blend file: recreate the training fold, refit the sources, rank items for users.

Unknown users
-------------
A blend file scores the users of the data it was made on. :meth:`BlendRuntime.recommend`
raises :class:`~xrec.errors.DataError` naming an unknown user by default
(``unknown="error"``); with ``unknown="popular"`` it falls back to the items with the most
training interactions (a plain cold-start list, flagged by ``score`` = training count).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp

from xrec._validation import check_int
from xrec.blendfile import BlendSpec, ranking_digest, read_blend
from xrec.data.dataset import Dataset
from xrec.data.location import DataLocation, load_dataset
from xrec.errors import ConfigError, DataError, FingerprintMismatch
from xrec.evaluate._ranking import top_k_items
from xrec.fold import Fold

_UNKNOWN_RULES = ("error", "popular")


@dataclass
class BlendRuntime:
    """A fitted blend (or fusion rule) recreated from a blend file, ready to rank.

    Attributes
    ----------
    spec
        The validated file content.
    dataset
        The data it was loaded with.
    fold
        The recreated fold whose training rows the sources were fitted on.
    scorer
        The fitted :class:`~xrec.blend.Blend` or fusion rule.
    """

    spec: BlendSpec
    dataset: Dataset
    fold: Fold
    scorer: Any
    _positions: dict[str, int] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self._positions = {str(u): i for i, u in enumerate(self.fold.user_ids)}

    @property
    def user_ids(self) -> np.ndarray:
        """External user ids; position ``u`` is user index ``u``."""
        return self.fold.user_ids

    def user_index(self, user_id: Any) -> int:
        """Index of ``user_id``; raises :class:`DataError` for a user the blend does not know."""
        key = str(user_id)
        if key not in self._positions:
            raise DataError(
                f"unknown user {user_id!r}: the blend serves the {len(self._positions)} users of dataset "
                f"{self.spec.dataset_name!r} (pass unknown='popular', or --unknown popular on the command line, for a cold-start list)"
            )
        return self._positions[key]

    def score_users(self, user_indices: np.ndarray) -> np.ndarray:
        """Scores of shape ``(len(user_indices), n_items)``, float32, exactly as the blend computes them."""
        users = np.asarray(user_indices, dtype=np.int64)
        if users.ndim != 1:
            raise DataError(f"user_indices must be 1-D, got shape {users.shape}")
        bad = users[(users < 0) | (users >= self.fold.n_users)]
        if len(bad):
            raise DataError(f"user indices out of range [0, {self.fold.n_users}): {bad[:5].tolist()}")
        return self.scorer.score(users)

    def top_items(self, user_indices: np.ndarray, k: int = 10) -> np.ndarray:
        """Item indices of each user's ``k`` best unseen items, best first.

        Ties go to the lower item index; rows with fewer than ``k`` unseen items are padded with -1.
        """
        users = np.asarray(user_indices, dtype=np.int64)
        scores = self.score_users(users)
        return top_k_items(scores, self.scorer.train_matrix_[users], _check_k(k))

    def recommend(self, user_id: Any, k: int = 10, *, unknown: str = "error") -> pd.DataFrame:
        """The ``k`` best items for one user, seen items excluded.

        Parameters
        ----------
        user_id
            External user id (compared as a string).
        k
            Number of items, > 0.
        unknown
            ``"error"`` (default): an unknown user raises :class:`DataError`.
            ``"popular"``: an unknown user gets the most-interacted training items.

        Returns
        -------
        pandas.DataFrame
            Columns ``item`` (catalog id), ``score`` (float32) and ``rank`` (1 = best);
            fewer than ``k`` rows when the user has fewer unseen items.
        """
        if unknown not in _UNKNOWN_RULES:
            raise ConfigError(f"unknown: must be one of {list(_UNKNOWN_RULES)}, got {unknown!r}")
        k = _check_k(k)
        if unknown == "popular" and str(user_id) not in self._positions:
            counts = self.fold.item_train_counts.astype(np.float32)
            items = top_k_items(counts[None, :], sp.csr_matrix((1, len(counts)), dtype=np.float32), k)[0]
            items = items[items >= 0]
            scores = counts[items]
        else:
            u = self.user_index(user_id)
            row = self.score_users(np.array([u]))
            items = top_k_items(row, self.scorer.train_matrix_[[u]], k)[0]
            items = items[items >= 0]
            scores = row[0, items]
        return pd.DataFrame(
            {
                "item": self.dataset.catalog.item_ids[items],
                "score": scores.astype(np.float32),
                "rank": np.arange(1, len(items) + 1, dtype=np.int64),
            }
        )


def _check_k(k: Any) -> int:
    return check_int(k, "k", low=1)


def load_blend(path: str | os.PathLike, dataset: Dataset, *, progress: bool = False, verify: bool = True) -> BlendRuntime:
    """Load a blend file, recreate its training fold from ``dataset`` and refit its sources.

    Parameters
    ----------
    path
        A file written by :func:`xrec.blendfile.save_blend`.
    dataset
        The data the blend was made on (checked by fingerprint).
    progress
        Show a progress bar while the sources are fitted.
    verify
        When the file has a ``[check]`` table, recompute the rankings fingerprint after
        refitting and raise on a difference (a source that is not deterministic, or other
        library versions). ``False`` serves without checking.

    Raises
    ------
    ConfigError
        The file breaks the schema (see :mod:`xrec.blendfile`).
    FingerprintMismatch
        ``dataset`` is not the data the file was made on, the recreated split differs
        from the recorded one, or (with ``verify``) the refitted blend ranks differently.
    """
    from xrec.split import split_dataset

    spec = read_blend(path)
    spec.check_dataset(dataset)
    try:
        split = split_dataset(dataset, **spec.split)
    except ConfigError as exc:
        raise ConfigError(f"split: {exc}") from exc
    _check_split_record(spec, split.settings)
    fold = split.test if spec.fold == "test" else split.validation
    if fold is None:
        raise ConfigError("split.fold: 'validation' needs split.validation = true")
    scorer = _fit(spec.build(), fold, progress)
    if verify and spec.check:
        digest = ranking_digest(scorer, int(spec.check["users"]), int(spec.check["k"]))
        if digest != spec.check["digest"]:
            raise FingerprintMismatch(
                f"check.digest: the refitted blend ranks the first {spec.check['users']} users differently than "
                f"when the file was written ({digest!r} != {spec.check['digest']!r}); the file was edited after it "
                "was written, a source is not deterministic, or library versions differ "
                "(load_blend(..., verify=False) serves anyway)"
            )
    return BlendRuntime(spec=spec, dataset=dataset, fold=fold, scorer=scorer)


def runtime_for_blend_file(
    path: str | os.PathLike, *, data_folder: str | os.PathLike | None = None, progress: bool = False
) -> BlendRuntime:
    """Load a blend file with the data its ``[dataset.load]`` table records (or found in ``data_folder``).

    Parameters
    ----------
    path
        A blend file written by ``xrec export`` (which records where its data lives).
    data_folder
        Look for the data here instead (the data was moved): see
        :meth:`~xrec.data.location.DataLocation.with_folder`. The folder also becomes the one
        the data must lie inside.
    progress
        Show progress bars while the data is read and the sources are fitted.

    Raises
    ------
    ConfigError
        The file records no data location, or the location is unusable (missing files, ...).
    """
    spec = read_blend(path)
    if not spec.dataset_load:
        raise ConfigError(
            f"{path}: the blend file records no [dataset.load] table; load it from Python with xrec.runtime.load_blend(path, dataset)"
        )
    location = DataLocation.from_hints(spec.dataset_load)
    if data_folder is not None:
        location = location.with_folder(Path(data_folder))
    return load_blend(path, load_dataset(location, progress=progress), progress=progress)


def _fit(scorer: Any, fold: Fold, progress: bool) -> Any:
    """Fit each source, naming the file's field when a setting turns out bad only at fit time."""
    from tqdm.auto import tqdm

    for name in tqdm(list(scorer.sources), desc="fitting sources", disable=not progress):
        try:
            scorer.sources[name].fit(fold)
        except ConfigError as exc:
            raise ConfigError(f"sources.{name}.params: {exc}") from exc
    return scorer.fit(fold)  # every source is fitted: this keeps the fold's training matrix


def _check_split_record(spec: BlendSpec, settings: dict[str, Any]) -> None:
    for key, written in spec.split_record.items():
        if key in ("dataset", "dataset_fingerprint"):
            continue  # a label, and a hash already checked against the data
        if key not in settings:
            continue  # a key an older xrec recorded; nothing to compare with
        now = settings[key]
        same = now == written or (isinstance(now, float) and isinstance(written, float) and np.isnan(now) and np.isnan(written))
        if not same:
            raise FingerprintMismatch(f"split.record.{key}: the file records {written!r}, the recreated split gives {now!r}")
