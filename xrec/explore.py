"""Search a catalog across pictures and words: descriptions → images, similar items, composed queries.

:class:`CatalogExplorer` reads every item's image and text vectors through the embedding
cache, fits a bridge (:func:`xrec.encoders.bridge.make_bridge`) on the catalog's own
(image, description) pairs, and answers four kinds of question, each as a DataFrame:

- :meth:`~CatalogExplorer.search`: a typed description → the nearest catalog images
  (through the bridge), or the nearest descriptions;
- :meth:`~CatalogExplorer.similar`: an item → its nearest items by image, by text, by
  attributes, and through the bridge (its description against the others' images, or its
  image against their descriptions);
- :meth:`~CatalogExplorer.compose`: "this item, but <words>" — vector arithmetic in the
  shared space (formula in the method's docstring);
- every query takes ``where=``: attribute filters on the results (see :mod:`xrec._where`).

The notebook widget over it is :class:`xrec.notebook.explorer.ExplorerWidget`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, Self

import numpy as np
import pandas as pd

from xrec._validation import check_fitted, check_int, check_number
from xrec._where import item_table, where_mask
from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError

__all__ = ["MODALITIES", "MAX_QUERY_CHARS", "CatalogExplorer"]

#: What :meth:`CatalogExplorer.similar` compares: the query item's side → the results' side.
MODALITIES = ("image", "text", "attributes", "text_to_image", "image_to_text")
#: Longest description accepted, in characters.
MAX_QUERY_CHARS = 2000
_COLUMNS = ["item", "name", "score", "rank", "modality"]
# the caption columns the thumbnails look for, in the same order
_NAME_COLUMNS = ("name", "title", "product_name", "label")


def _unit(rows: np.ndarray) -> np.ndarray:
    """Rows scaled to unit length in float64, returned as float32; zero rows stay zero."""
    rows = np.asarray(rows, dtype=np.float64)
    norms = np.linalg.norm(rows, axis=-1, keepdims=True)
    return np.divide(rows, norms, out=np.zeros_like(rows), where=norms > 0).astype(np.float32)


def _centred(rows: np.ndarray, ok: np.ndarray, center: bool) -> tuple[np.ndarray, np.ndarray]:
    """``rows`` minus the mean of the ``ok`` rows (when ``center``), zero rows where not ``ok``; and that mean."""
    mean = rows[ok].mean(axis=0, dtype=np.float64).astype(np.float32) if center and ok.any() else np.zeros(rows.shape[1], np.float32)
    return np.where(ok[:, None], rows - mean, 0.0).astype(np.float32), mean


class CatalogExplorer:
    """Nearest items across images, texts and attributes, with a bridge between images and words.

    Parameters
    ----------
    bridge
        ``"ridge"``, ``"cca"`` or ``"contrastive"`` (fitted in :meth:`fit` on every item
        that has both an image and a text), or an already fitted bridge object (e.g. a
        fitted ``cross_modal`` source's ``bridge_``; see :meth:`from_source`), used as is.
    bridge_settings
        Settings passed to :func:`~xrec.encoders.bridge.make_bridge` with a bridge name
        (``{"alpha": 1.0}``, ...); the contrastive bridge gets ``cache_dir`` unless given.
    text_columns
        Columns joined into each item's text; ``None``: the catalog's declared text columns.
    text_encoder, image_encoder, image_crop
        Encoders by name and the share of each image's side the image encoder sees, as
        the content sources take them; vectors come from the embedding cache.
    center
        Subtract the catalog's mean from each side's vectors before cosines (image
        features, text vectors, and each side of the shared space). Encoders give every
        item of one catalog a large common part; removing it leaves what tells them apart.
    name_column
        Column shown as the item's name; ``None``: the first of ``name``, ``title``,
        ``product_name``, ``label`` the catalog has, else its first text column, else the item id.
    cache_dir
        Embedding cache folder; ``None``: ``XREC_CACHE_DIR`` or the default.
    progress
        Progress bars while encoding items the cache does not hold yet.

    Attributes
    ----------
    catalog_
        The catalog explored.
    bridge_
        The fitted bridge.
    image_, text_, attributes_
        ``(n_items, ·)`` float32 unit rows: centred image features, centred text vectors,
        attribute vectors (:class:`~xrec.encoders.attributes.AttributeEncoder`; ``None``
        when the catalog declares no attribute column). Items without content have zero rows.
    shared_image_, shared_text_
        ``(n_items, d)`` float32 unit rows: every item's image and text in the bridge's
        shared space, centred by ``shared_image_mean_`` / ``shared_text_mean_``.
    shared_image_mean_, shared_text_mean_
        ``(d,)`` float32 catalog means subtracted in the shared space (zeros without ``center``).
    text_mean_
        ``(text dim,)`` float32 catalog mean of the text vectors (for ``search(against="text")``).
    has_image_, has_text_
        ``(n_items,)`` bool: items with an image / a text vector.
    names_
        ``(n_items,)`` the names shown in results.
    name_column_
        The column they come from (``None``: item ids).

    Examples
    --------
    >>> explorer = CatalogExplorer(bridge="ridge").fit(load_demo_shop())  # doctest: +SKIP
    >>> explorer.search("a smiling cat", k=5, where={"product_type": "sticker"})  # doctest: +SKIP
    >>> explorer.compose("p0001", "embroidered patch", alpha=1.0)  # doctest: +SKIP
    """

    def __init__(
        self,
        bridge: str | Any = "ridge",
        *,
        bridge_settings: Mapping[str, Any] | None = None,
        text_columns: Sequence[str] | None = None,
        text_encoder: str = "minilm",
        image_encoder: str = "efficientnet_lite0",
        image_crop: float = 1.0,
        center: bool = True,
        name_column: str | None = None,
        cache_dir: str | None = None,
        progress: bool = False,
    ) -> None:
        self.bridge = bridge
        self.bridge_settings = bridge_settings
        self.text_columns = text_columns
        self.text_encoder = text_encoder
        self.image_encoder = image_encoder
        self.image_crop = image_crop
        self.center = center
        self.name_column = name_column
        self.cache_dir = cache_dir
        self.progress = progress

    @classmethod
    def from_source(cls, source: Any, *, center: bool = True, name_column: str | None = None, progress: bool = False) -> CatalogExplorer:
        """An unfitted explorer that reuses a fitted ``cross_modal`` source's bridge and encoder settings.

        Call :meth:`fit` with the catalog the source was fitted on; the bridge is not refitted.

        Raises
        ------
        ConfigError
            When ``source`` is not a fitted cross-modal source with a bridge (the
            ``"clip"`` bridge has none), or its bridge reads class probabilities (ConSE).
        """
        bridge = getattr(source, "bridge_", None)
        if getattr(source, "kind", None) != "cross_modal" or bridge is None:
            raise ConfigError("source: needs a fitted cross_modal source with a bridge ('cca', 'ridge' or 'contrastive')")
        if getattr(bridge, "input", None) != "features":
            raise ConfigError(f"source: its bridge {type(bridge).__name__} reads ImageNet class probabilities; the explorer needs one that reads image features")
        if getattr(source, "image_vectors", None) is not None or getattr(source, "text_vectors", None) is not None:
            raise ConfigError("source: a cross_modal source built on your own vectors cannot be explored from the catalog's encoders")
        return cls(
            bridge,
            text_columns=source.text_columns,
            text_encoder=source.text_encoder,
            image_encoder=source.image_encoder,
            image_crop=source.image_crop,
            center=center,
            name_column=name_column,
            cache_dir=source.cache_dir,
            progress=progress,
        )

    # -- fit ---------------------------------------------------------------------------------

    def _make_bridge(self) -> Any:
        from xrec.encoders.bridge import make_bridge

        if not isinstance(self.bridge, str):
            if getattr(self.bridge, "input", None) != "features" or not callable(getattr(self.bridge, "transform_text", None)):
                raise ConfigError("bridge: must be 'ridge', 'cca', 'contrastive' or a fitted bridge that reads image features")
            check_fitted(self.bridge, how="fit it first, or pass its name")
            if self.bridge_settings:
                raise ConfigError("bridge_settings: only used with a bridge name; this bridge is already fitted")
            return self.bridge
        if self.bridge not in ("ridge", "cca", "contrastive"):
            raise ConfigError(f"bridge: must be 'ridge', 'cca' or 'contrastive' (fitted on the catalog's own pairs), got {self.bridge!r}")
        settings = dict(self.bridge_settings or {})
        if self.bridge == "contrastive":
            settings.setdefault("cache_dir", self.cache_dir)
        return make_bridge(self.bridge, **settings)

    def fit(self, data: Catalog | Any) -> Self:
        """Read the catalog's vectors (cached), fit the bridge on its own pairs; returns ``self``.

        Parameters
        ----------
        data
            A :class:`~xrec.data.catalog.Catalog` or anything with a ``catalog`` (a
            :class:`~xrec.data.dataset.Dataset`). Interactions are not used.

        Raises
        ------
        ConfigError
            For a bad setting, or a catalog without an image column or text.
        DataError
            When fewer than two items have both an image and a text.
        """
        from xrec.encoders.attributes import AttributeEncoder
        from xrec.sources.content import image_vectors, text_vectors

        catalog = data if isinstance(data, Catalog) else getattr(data, "catalog", None)
        if not isinstance(catalog, Catalog):
            raise ConfigError(f"data: must be an xrec Catalog or Dataset, got {type(data).__name__}")
        check_number(self.image_crop, "image_crop", low=0, high=1, low_open=True)
        name_column = self._name_column(catalog)
        bridge = self._make_bridge()
        opts = {"cache_dir": self.cache_dir, "progress": self.progress}
        text, text_ok = text_vectors(catalog, self.text_columns, self.text_encoder, **opts)
        image, image_ok = image_vectors(catalog, self.image_encoder, crop=self.image_crop, **opts)
        both = text_ok & image_ok
        if bridge is not self.bridge:
            if both.sum() < 2:
                raise DataError(f"explorer: the bridge needs items with both an image and a text; found {int(both.sum())}")
            bridge.fit(image[both], text[both])
        center = bool(self.center)
        self.catalog_ = catalog
        self.bridge_ = bridge
        self.has_image_, self.has_text_ = image_ok, text_ok
        centred_text, self.text_mean_ = _centred(text, text_ok, center)
        self.image_, self.text_ = _unit(_centred(image, image_ok, center)[0]), _unit(centred_text)
        self.attributes_ = _unit(AttributeEncoder().fit_transform(catalog)) if catalog.schema.attribute_columns else None
        shared_image, self.shared_image_mean_ = _centred(bridge.transform(image), image_ok, center)
        shared_text, self.shared_text_mean_ = _centred(bridge.transform_text(text), text_ok, center)
        self.shared_image_, self.shared_text_ = _unit(shared_image), _unit(shared_text)
        self.name_column_ = name_column
        values = catalog.item_ids if self.name_column_ is None else catalog.items[self.name_column_]
        self.names_ = np.asarray([str(v) for v in values], dtype=object)
        self._table = item_table(catalog)
        self._queries: dict[str, np.ndarray] = {}
        self.fitted_ = True
        return self

    def _name_column(self, catalog: Catalog) -> str | None:
        column = self.name_column
        if column is None:
            known = [c for c in _NAME_COLUMNS if c in catalog.items.columns]
            return known[0] if known else (catalog.schema.text[0] if catalog.schema.text else None)
        if column not in catalog.items.columns:
            raise ConfigError(f"name_column: {column!r} is not a catalog column; it has {list(catalog.items.columns)}")
        return column

    # -- vectors -------------------------------------------------------------------------------

    def item_index(self, item: Any) -> int:
        """Catalog position of item id ``item``; :class:`DataError` naming an unknown id."""
        check_fitted(self)
        return int(self.catalog_.index_of([item])[0])

    def _raw_text(self, text: Any) -> np.ndarray:
        from xrec.encoders.bridge import make_text_encoder

        if not isinstance(text, str) or not text.strip():
            raise ConfigError(f"text: must be a non-blank string, got {text!r}"[:200])
        if len(text) > MAX_QUERY_CHARS:
            raise ConfigError(f"text: at most {MAX_QUERY_CHARS} characters, got {len(text)}")
        if text not in self._queries:
            if len(self._queries) >= 256:
                self._queries.clear()
            self._queries[text] = np.asarray(make_text_encoder(self.text_encoder).encode([text]), dtype=np.float32)
        return self._queries[text]

    def text_query(self, text: str) -> np.ndarray:
        """A description in the shared space: ``n(B_text(E(text)) − shared_text_mean_)``, float32 ``(d,)``.

        ``E`` is the text encoder, ``B_text`` the bridge's text side and ``n(v) = v / ‖v‖``.
        """
        check_fitted(self)
        return _unit(self.bridge_.transform_text(self._raw_text(text))[0] - self.shared_text_mean_)

    def composed_query(self, item: Any, words: str, alpha: float = 1.0) -> np.ndarray:
        """The query vector of :meth:`compose`: ``n(shared_image_[item] + alpha · text_query(words))``, float32 ``(d,)``."""
        check_fitted(self)
        alpha = check_number(alpha, "alpha")
        i = self.item_index(item)
        if not self.has_image_[i]:
            raise DataError(f"item {item!r} has no image vector to start from")
        return _unit(self.shared_image_[i].astype(np.float64) + float(alpha) * self.text_query(words).astype(np.float64))

    # -- queries -------------------------------------------------------------------------------

    def search(self, text: str, k: int = 10, *, where: Any = None, against: str = "image") -> pd.DataFrame:
        """The ``k`` catalog items nearest a typed description.

        Parameters
        ----------
        text
            The description.
        k
            Number of results.
        where
            Attribute filters on the results (see :mod:`xrec._where`).
        against
            ``"image"``: cosine of :meth:`text_query` with every item's image in the shared
            space (modality ``"text_to_image"``); ``"text"``: cosine of the centred text
            vector with every item's text (modality ``"text"``).

        Returns
        -------
        pandas.DataFrame
            Columns ``item``, ``name``, ``score`` (cosine), ``rank`` (1 = best), ``modality``;
            score descending, ties to the earlier catalog item.
        """
        check_fitted(self)
        if against == "image":
            return self._top(self.shared_image_ @ self.text_query(text), self._allowed(where) & self.has_image_, k, "text_to_image")
        if against == "text":
            query = _unit(self._raw_text(text)[0] - self.text_mean_)
            return self._top(self.text_ @ query, self._allowed(where) & self.has_text_, k, "text")
        raise ConfigError(f"against: must be 'image' or 'text', got {against!r}")

    def similar(self, item: Any, k: int = 10, *, modality: str | Sequence[str] | None = None, where: Any = None) -> pd.DataFrame:
        """The ``k`` items nearest ``item`` (itself left out) per modality.

        Parameters
        ----------
        item
            Item id.
        k
            Results per modality.
        modality
            One or several of :data:`MODALITIES` (default: all the catalog supports):
            ``"image"`` (image features), ``"text"`` (text vectors), ``"attributes"``,
            ``"text_to_image"`` (the item's text against the others' images in the shared
            space), ``"image_to_text"`` (its image against their texts).
        where
            Attribute filters on the results.

        Returns
        -------
        pandas.DataFrame
            One block of up to ``k`` rows per modality, columns as in :meth:`search`.
        """
        check_fitted(self)
        i = self.item_index(item)
        if modality is None:
            modality = [m for m in MODALITIES if m != "attributes" or self.attributes_ is not None]
        names = [modality] if isinstance(modality, str) else list(modality)
        allowed = self._allowed(where)
        allowed[i] = False
        frames = []
        for name in names:
            query_side, items_side, has_query, has_items = self._sides(name)
            if not has_query[i]:
                raise DataError(f"item {item!r} has no {name.split('_to_')[0]} vector")
            frames.append(self._top(items_side @ query_side[i], allowed & has_items, k, name))
        return pd.concat(frames, ignore_index=True)

    def _sides(self, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        if name == "image":
            return self.image_, self.image_, self.has_image_, self.has_image_
        if name == "text":
            return self.text_, self.text_, self.has_text_, self.has_text_
        if name == "text_to_image":
            return self.shared_text_, self.shared_image_, self.has_text_, self.has_image_
        if name == "image_to_text":
            return self.shared_image_, self.shared_text_, self.has_image_, self.has_text_
        if name == "attributes":
            if self.attributes_ is None:
                raise ConfigError("modality 'attributes': the catalog declares no attribute column")
            every = np.ones(len(self.attributes_), dtype=bool)
            return self.attributes_, self.attributes_, every, every
        raise ConfigError(f"modality: must be one of {list(MODALITIES)}, got {name!r}")

    def compose(self, item: Any, words: str, alpha: float = 1.0, k: int = 10, *, where: Any = None) -> pd.DataFrame:
        """"This item, but <words>": the ``k`` images nearest the item's image moved towards the words.

        The query, in the bridge's shared space, is::

            q = n( n(B_image(x_item) − m_image) + alpha · n(B_text(E(words)) − m_text) )

        where ``x_item`` is the item's image features, ``B_image`` / ``B_text`` the bridge's
        two sides, ``E`` the text encoder, ``m_image`` / ``m_text`` the catalog means of each
        side in the shared space (``shared_image_mean_``, ``shared_text_mean_``; zeros
        without ``center``) and ``n(v) = v / ‖v‖``. Each catalog item ``j`` scores
        ``q · n(B_image(x_j) − m_image)`` (cosine). ``alpha = 0`` gives the item's image
        neighbours in the shared space; a large ``alpha`` approaches :meth:`search` with
        the words alone. The item itself is left out.

        Returns
        -------
        pandas.DataFrame
            Columns as in :meth:`search`, modality ``"composed"``.
        """
        query = self.composed_query(item, words, alpha)
        allowed = self._allowed(where)
        allowed[self.item_index(item)] = False
        return self._top(self.shared_image_ @ query, allowed & self.has_image_, k, "composed")

    # -- helpers -------------------------------------------------------------------------------

    def _allowed(self, where: Any) -> np.ndarray:
        return where_mask(where, self.catalog_, self._table)

    def _top(self, scores: np.ndarray, allowed: np.ndarray, k: Any, modality: str) -> pd.DataFrame:
        """The ``k`` best ``allowed`` items as a result frame."""
        from xrec.bundle import top_k

        k = check_int(k, "k", low=1)
        top = top_k(scores, allowed, k)
        return pd.DataFrame(
            {
                "item": self.catalog_.item_ids[top],
                "name": self.names_[top],
                "score": scores[top].astype(np.float32),
                "rank": np.arange(1, len(top) + 1, dtype=np.int64),
                "modality": modality,
            },
            columns=_COLUMNS,
        )

    def __repr__(self) -> str:
        bridge = self.bridge if isinstance(self.bridge, str) else type(self.bridge).__name__
        state = f", {self.catalog_.n_items} items" if getattr(self, "fitted_", False) else ""
        return f"CatalogExplorer(bridge={bridge!r}{state})"
