"""A loaded bundle: rank items for users, items like an item, and items matching a text, with filters."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import scipy.sparse as sp

from xrec.bundle._filters import ItemTable
from xrec.errors import ConfigError, DataError

UNKNOWN_RULES = ("error", "popular")
#: Longest text query accepted by :meth:`Bundle.search_text`, in characters.
MAX_QUERY_CHARS = 2000


@dataclass
class Bundle:
    """A blend restored from a bundle folder (see :func:`xrec.bundle.load_bundle`), ready to rank.

    Its scores are the fitted blend's own: the restored scorer is the same object type with
    the same learned arrays, so ``score`` gives the same float32 values.

    Filters (see :mod:`xrec.bundle._filters` for the structure) restrict which items may be
    returned; they never change scores (a blend normalizes each source over the user's
    unseen items, as when it was evaluated). They apply before the top-``k`` cut, so ``k``
    items come back whenever ``k`` items pass.

    Attributes
    ----------
    path
        The bundle folder.
    spec
        The blend file's validated content (:class:`~xrec.blendfile.BlendSpec`).
    manifest
        The parsed ``manifest.json``.
    identity
        SHA-256 of ``manifest.json`` (64 hex digits): names this exact bundle.
    fold
        The training fold rebuilt from the bundle (users, items, training rows; nothing held out).
    scorer
        The restored blend or fusion rule.
    items
        The catalog's filterable columns (:class:`~xrec.bundle.ItemTable`).
    states
        Per source, the JSON state the manifest records (text-query maps, bridge settings).
    """

    path: Path
    spec: Any
    manifest: dict[str, Any]
    identity: str
    fold: Any
    scorer: Any
    items: ItemTable
    states: dict[str, dict[str, Any]] = field(default_factory=dict)
    _users: dict[str, int] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self._users = {str(u): i for i, u in enumerate(self.fold.user_ids)}
        self._counts = self.fold.item_train_counts

    # -- ids ------------------------------------------------------------------------------------

    @property
    def user_ids(self) -> np.ndarray:
        """User ids; position ``u`` is user index ``u``."""
        return self.fold.user_ids

    @property
    def item_ids(self) -> np.ndarray:
        """Item ids; position ``j`` is item index ``j``."""
        return self.items.item_ids

    def has_user(self, user_id: Any) -> bool:
        """Whether the bundle knows ``user_id`` (compared as a string)."""
        return str(user_id) in self._users

    def user_index(self, user_id: Any) -> int:
        """Index of ``user_id``; :class:`DataError` naming it when unknown."""
        key = str(user_id)
        if key not in self._users:
            raise DataError(f"user: unknown user {key!r}; the bundle serves {len(self._users)} users (unknown='popular' gives a cold-start list)")
        return self._users[key]

    def item_index(self, item_id: Any) -> int:
        """Index of ``item_id``; :class:`DataError` naming it when unknown."""
        key = str(item_id)
        if key not in self.items.positions:
            raise DataError(f"item: unknown item {key!r}; the bundle holds {self.items.n_items} items")
        return self.items.positions[key]

    # -- recommending -----------------------------------------------------------------------------

    def recommend(
        self,
        user_id: Any,
        k: int = 10,
        *,
        filters: dict[str, Any] | None = None,
        exclude_seen: bool = True,
        unknown: str = "error",
    ) -> pd.DataFrame:
        """The ``k`` best items for one user.

        Parameters
        ----------
        user_id
            User id (compared as a string).
        k
            List length, >= 1.
        filters
            Item conditions (see :mod:`xrec.bundle._filters`); ``None``: every item.
        exclude_seen
            Leave out the user's training items (default). With ``False`` they may be
            listed, but a blend scores them at its row minimum (its normalizers are taken
            over unseen items), so they come after every unseen item that passes the filters.
        unknown
            ``"error"``: an unknown user raises :class:`DataError`; ``"popular"``: an unknown
            user gets the items with the most training interactions (``score`` = that count).

        Returns
        -------
        pandas.DataFrame
            ``item``, ``score`` (float32), ``rank`` (1 = best); fewer than ``k`` rows only
            when fewer items pass.
        """
        top, scores = self.ranked(user_id, k, filters=filters, exclude_seen=exclude_seen, unknown=unknown)
        return self._table(top, scores)

    def ranked(
        self,
        user_id: Any,
        k: int = 10,
        *,
        filters: dict[str, Any] | None = None,
        exclude_seen: bool = True,
        unknown: str = "error",
    ) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`recommend` as arrays: item indices (best first) and their float32 scores."""
        if unknown not in UNKNOWN_RULES:
            raise ConfigError(f"unknown: must be one of {list(UNKNOWN_RULES)}, got {unknown!r}")
        k = check_k(k)
        allowed = self._allowed(filters)
        if unknown == "popular" and not self.has_user(user_id):
            scores = self._counts.astype(np.float32)
        else:
            u = self.user_index(user_id)
            scores = self.scorer.score(np.array([u], dtype=np.int64))[0]
            if exclude_seen:
                allowed = allowed.copy()
                allowed[self.seen_items(u)] = False
        top = top_k(scores, allowed, k)
        return top, scores[top].astype(np.float32)

    def seen_items(self, user: int) -> np.ndarray:
        """Item indices of user index ``user``'s training items."""
        m = self.scorer.train_matrix_
        return m.indices[m.indptr[user] : m.indptr[user + 1]]

    def top_items(self, user_indices: np.ndarray, k: int = 10) -> np.ndarray:
        """Item indices of each user's ``k`` best unseen items (no filters), ``-1``-padded."""
        users = np.asarray(user_indices, dtype=np.int64)
        scores = self.scorer.score(users)
        k = check_k(k)
        out = np.full((len(users), k), -1, dtype=np.int64)
        for r, u in enumerate(users):
            allowed = np.ones(self.items.n_items, dtype=bool)
            allowed[self.seen_items(u)] = False
            top = top_k(scores[r], allowed, k)
            out[r, : len(top)] = top
        return out

    # -- items like an item ----------------------------------------------------------------------

    def similarity_sources(self) -> list[str]:
        """Sources that compare items with items: item vectors of 2+ dimensions, or an item-kNN table."""
        out = []
        for name, src in self.scorer.sources.items():
            if hasattr(src, "similarity_") or (getattr(src, "item_factors_", None) is not None and src.item_factors_.shape[1] >= 2):
                out.append(name)
        return out

    def item_similarity(self, source: str, item: int) -> np.ndarray:
        """One source's similarity of every item to item index ``item``: float32 ``(n_items,)``.

        Cosine of item vectors; for item-kNN the learned neighbour weights (0 beyond the neighbours).
        """
        src = self.scorer.sources[source]
        if hasattr(src, "similarity_"):
            return np.asarray(src.similarity_[item].toarray()).ravel().astype(np.float32)
        vectors = src.item_factors_.astype(np.float64)
        norms = np.linalg.norm(vectors, axis=1)
        dots = vectors @ vectors[item]
        with np.errstate(divide="ignore", invalid="ignore"):
            cos = np.where(norms > 0, dots / (norms * norms[item]), 0.0) if norms[item] > 0 else np.zeros(len(vectors))
        return cos.astype(np.float32)

    def similar_items(self, item_id: Any, k: int = 10, *, source: str | None = None, filters: dict[str, Any] | None = None) -> pd.DataFrame:
        """The ``k`` items most like ``item_id`` (itself excluded).

        Parameters
        ----------
        item_id
            The item to compare with.
        k
            List length, >= 1.
        source
            One source's similarity (see :meth:`similarity_sources`: a modality such as
            ``"image"`` or ``"text"``, or a collaborative source), or ``None`` for the blended
            similarity: each comparing source's similarities normalized as the blend normalizes
            that source and weighted as the blend weighs it (fusion rules: weight 1 each).
        filters
            Item conditions, as for :meth:`recommend`.
        """
        from xrec.blend.normalize import normalize

        k = check_k(k)
        item = self.item_index(item_id)
        names = self.similarity_sources()
        if source is not None and source not in names:
            raise ConfigError(f"source: {source!r} does not compare items; choose one of {names} or leave it out for the blend")
        if not names:
            raise ConfigError("source: no source of this blend compares items with items")
        allowed = self._allowed(filters).copy()
        allowed[item] = False
        if source is not None:
            return self._frame(self.item_similarity(source, item), allowed, k)
        weights = self._similarity_weights(names)
        itself = sp.csr_matrix(([1.0], ([0], [item])), shape=(1, self.items.n_items))
        total = np.zeros(self.items.n_items, dtype=np.float32)
        for name, (weight, normalizer) in weights.items():
            total += normalize(self.item_similarity(name, item)[None, :], normalizer, seen=itself)[0] * np.asarray(weight, dtype=np.float32)
        return self._frame(total, allowed, k)

    def _similarity_weights(self, names: list[str]) -> dict[str, tuple[Any, str]]:
        scorer = self.scorer
        if hasattr(scorer, "item_weights"):
            weights = scorer.item_weights()
            return {n: (weights[n], scorer.normalizers[n]) for n in names if n in weights}
        normalizer = getattr(scorer, "normalizer", "rank")
        return {n: (1.0, normalizer) for n in names}

    # -- text search ------------------------------------------------------------------------------

    def search_sources(self) -> list[str]:
        """Sources that can place a text query among their items (text sources and bridged cross-modal ones)."""
        return [n for n, s in self.states.items() if s.get("query")]

    def default_search_source(self) -> str | None:
        """The source :meth:`search_text` uses when none is named: the first bridged cross-modal
        source, else the first text source; ``None`` when no source takes text queries."""
        names = self.search_sources()
        return next((n for n in names if self.scorer.sources[n].kind == "cross_modal"), names[0] if names else None)

    def search_text(self, text: str, k: int = 10, *, source: str | None = None, filters: dict[str, Any] | None = None) -> pd.DataFrame:
        """The ``k`` items whose vectors in ``source``'s item space are closest (cosine) to ``text``.

        The text is encoded by the source's text encoder (loaded on first use from its
        package) and mapped as the source maps item texts: centred for a centred text
        source, through the bridge's text side for a cross-modal source, so a text query
        finds images through the bridge. ``source=None`` takes the first searchable source.
        """
        names = self.search_sources()
        if not names:
            raise ConfigError("source: no source of this bundle can place a text query (a text source or a bridged cross_modal source)")
        if source is None:
            source = self.default_search_source()
        if source not in names:
            raise ConfigError(f"source: {source!r} cannot place a text query; choose one of {names}")
        if not isinstance(text, str) or not text.strip():
            raise ConfigError("text: must be a non-blank string")
        if len(text) > MAX_QUERY_CHARS:
            raise ConfigError(f"text: at most {MAX_QUERY_CHARS} characters, got {len(text)}")
        k = check_k(k)
        allowed = self._allowed(filters)
        return self._frame(self.query_scores(source, text), allowed, k)

    def query_scores(self, source: str, text: str) -> np.ndarray:
        """Cosine of the text query with every item vector of ``source``: float32 ``(n_items,)``."""
        from xrec.encoders.bridge import make_text_encoder

        src = self.scorer.sources[source]
        query = self.states[source]["query"]
        raw = np.asarray(make_text_encoder(query["encoder"]).encode([text]), dtype=np.float32)
        if src.kind == "text":
            vec = _unit(_unit(raw) - src.query_center_)
        else:
            vec = _unit(src.bridge_.transform_text(raw))
        return (src.item_factors_ @ vec[0]).astype(np.float32)

    # -- helpers -----------------------------------------------------------------------------------

    def _allowed(self, filters: dict[str, Any] | None) -> np.ndarray:
        mask = self.items.mask(filters)
        return np.ones(self.items.n_items, dtype=bool) if mask is None else mask

    def _frame(self, scores: np.ndarray, allowed: np.ndarray, k: int) -> pd.DataFrame:
        top = top_k(scores, allowed, k)
        return self._table(top, scores[top].astype(np.float32))

    def _table(self, top: np.ndarray, scores: np.ndarray) -> pd.DataFrame:
        return pd.DataFrame({"item": self.items.item_ids[top], "score": scores, "rank": np.arange(1, len(top) + 1, dtype=np.int64)})


def check_k(k: Any) -> int:
    """``k`` as int if it is an integer >= 1, else :class:`ConfigError` naming ``k``."""
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise ConfigError(f"k: must be an integer >= 1, got {k!r}")
    return int(k)


def top_k(scores: np.ndarray, allowed: np.ndarray, k: int) -> np.ndarray:
    """Indices of the ``k`` best allowed items: score descending, then index ascending (ties to the lower index)."""
    cand = np.flatnonzero(allowed)
    values = scores[cand]
    if len(cand) > 4 * k:
        # every item tied with the k-th best value is kept, so the cut below is exact
        kth = np.partition(values, len(values) - k)[len(values) - k]
        keep = values >= kth
        cand, values = cand[keep], values[keep]
    order = np.lexsort((cand, -values.astype(np.float64)))
    return cand[order[:k]]


def _unit(rows: np.ndarray) -> np.ndarray:
    rows = np.asarray(rows, dtype=np.float64)
    norms = np.linalg.norm(rows, axis=1, keepdims=True)
    return np.divide(rows, norms, out=np.zeros_like(rows), where=norms > 0).astype(np.float32)
