"""What each source kind learned, as named arrays, and how a fresh source takes it back.

A registry keyed by source kind holds two functions per kind:

- ``save(source, context) -> (arrays, state)``: the fitted attributes a scorer needs, as
  numpy arrays (written to one ``.safetensors`` file per source) and a small JSON-ready
  ``state`` dict (written to the manifest);
- ``load(source, arrays, state, fold)``: sets those attributes on a source freshly built from
  its blend-file settings, so that its ``score`` gives exactly the fitted scores. ``fold`` is
  the training fold rebuilt from the bundle (users, items, training rows), never refitted.

Only the fitted attributes are read and written, so the source classes need no changes.
A kind that is not registered is refused at export, by name; a kind that is a plain
:class:`~xrec.sources.base.LowRankSource` (scores = user vectors × item vectors, ``score``
not overridden) is written through its two factor matrices.

Besides what scoring needs, a source can carry how to put a text query into its item
space (``query``: the text encoder name, the centring vector, the bridge), used by text search.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from xrec.errors import ConfigError
from xrec.fold import Fold

Arrays = dict[str, np.ndarray]
SaveFn = Callable[[Any, "ExportContext"], tuple[Arrays, dict[str, Any]]]
LoadFn = Callable[[Any, Arrays, dict[str, Any], Fold], None]


@dataclass(frozen=True)
class ExportContext:
    """What a save function may read besides the fitted source: the training fold (with the full catalog)."""

    fold: Fold
    name: str


@dataclass(frozen=True)
class _Kind:
    save: SaveFn
    load: LoadFn


_KINDS: dict[str, _Kind] = {}


def register_artifacts(kind: str, save: SaveFn, load: LoadFn) -> None:
    """Teach bundles a source kind: how to read its learned state and how to set it back."""
    _KINDS[kind] = _Kind(save, load)


def exportable_kinds() -> list[str]:
    """Source kinds whose learned state a bundle can hold."""
    return sorted(_KINDS)


def _plain_low_rank(source: Any) -> bool:
    from xrec.sources.base import LowRankSource

    return isinstance(source, LowRankSource) and type(source).score is LowRankSource.score


def _entry(source: Any) -> _Kind:
    kind = getattr(source, "kind", "")
    if kind in _KINDS:
        return _KINDS[kind]
    if _plain_low_rank(source):
        return _Kind(_save_factors, _load_factors)
    raise ConfigError(
        f"source kind {kind!r} ({type(source).__name__}): a bundle cannot hold what it learned; "
        f"bundles hold the kinds {exportable_kinds()} and plain low-rank sources"
    )


def check_exportable(name: str, source: Any) -> None:
    """Raise :class:`ConfigError` naming the source and its kind when a bundle cannot hold it."""
    try:
        _entry(source)
    except ConfigError as exc:
        raise ConfigError(f"sources.{name}: {exc}") from None
    if not getattr(source, "fitted_", False):
        raise ConfigError(f"sources.{name}: not fitted; fit the blend before writing a bundle")


def save_source(name: str, source: Any, fold: Fold) -> tuple[Arrays, dict[str, Any]]:
    """The arrays and JSON state of one fitted source (see the module docstring)."""
    check_exportable(name, source)
    arrays, state = _entry(source).save(source, ExportContext(fold, name))
    return {k: np.ascontiguousarray(v) for k, v in arrays.items()}, state


def load_source(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> Any:
    """Set the learned state on a fresh ``source``; returns it, marked fitted."""
    _entry(source).load(source, arrays, state, fold)
    source.fitted_ = True
    return source


# -- shared pieces ------------------------------------------------------------------------------


def _save_factors(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    return {"user_factors": source.user_factors_, "item_factors": source.item_factors_}, {}


def _load_factors(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    source.user_factors_ = _take(arrays, "user_factors", (fold.n_users, None), np.float32)
    source.item_factors_ = _take(arrays, "item_factors", (fold.n_items, None), np.float32)
    if source.user_factors_.shape[1] != source.item_factors_.shape[1]:
        raise ConfigError(f"user_factors has {source.user_factors_.shape[1]} columns, item_factors {source.item_factors_.shape[1]}")


def _take(arrays: Arrays, key: str, shape: tuple[int | None, ...], dtype: Any) -> np.ndarray:
    """``arrays[key]`` checked for shape (``None`` = any) and dtype, else a ConfigError naming the tensor."""
    if key not in arrays:
        raise ConfigError(f"tensor {key!r} is missing")
    value = arrays[key]
    if value.ndim != len(shape) or any(s is not None and s != v for s, v in zip(shape, value.shape, strict=True)):
        raise ConfigError(f"tensor {key!r} has shape {value.shape}, expected {tuple('*' if s is None else s for s in shape)}")
    if value.dtype != np.dtype(dtype):
        raise ConfigError(f"tensor {key!r} has dtype {value.dtype}, expected {np.dtype(dtype)}")
    return value


def _l2_rows(rows: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(rows.astype(np.float64), axis=1, keepdims=True)
    return np.divide(rows, norms, out=np.zeros_like(rows, dtype=np.float64), where=norms > 0).astype(np.float32)


# -- popularity ----------------------------------------------------------------------------------


def _save_popularity(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    return {"popularity": source.popularity_}, {}


def _load_popularity(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    source.popularity_ = _take(arrays, "popularity", (fold.n_items,), np.float32)
    source.user_factors_ = np.ones((fold.n_users, 1), dtype=np.float32)
    source.item_factors_ = source.popularity_[:, None].copy()


# -- item-kNN ------------------------------------------------------------------------------------


def _save_item_knn(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    sim = source.similarity_.tocsr()
    expected = ctx.fold.train_matrix.copy()
    if source.binarize:
        expected.data[:] = 1.0
    if (expected != source.user_items_).nnz:
        raise ConfigError(f"sources.{ctx.name}: its training matrix is not the fold's; refit it on the blend's fold")
    return {
        "similarity_data": sim.data.astype(np.float32),
        "similarity_indices": sim.indices.astype(np.int64),
        "similarity_indptr": sim.indptr.astype(np.int64),
    }, {}


def _load_item_knn(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    n = fold.n_items
    indptr = _take(arrays, "similarity_indptr", (n + 1,), np.int64)
    indices = _take(arrays, "similarity_indices", (None,), np.int64)
    data = _take(arrays, "similarity_data", (len(indices),), np.float32)
    if indptr[0] != 0 or indptr[-1] != len(indices) or np.any(np.diff(indptr) < 0) or (len(indices) and (indices.min() < 0 or indices.max() >= n)):
        raise ConfigError("tensors similarity_*: not a valid items × items sparse matrix")
    source.similarity_ = sp.csr_matrix((data, indices, indptr), shape=(n, n))
    matrix = fold.train_matrix.copy()  # what fit keeps: the fold's training matrix (binarized when asked)
    if source.binarize:
        matrix.data[:] = 1.0
    source.user_items_ = matrix


# -- content sources: factors, which items have content, and the text-query map ----------------


def _save_content(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    arrays, state = _save_factors(source, ctx)
    arrays["has_content"] = np.asarray(source.has_content_, dtype=bool)
    return arrays, state


def _load_content(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    _load_factors(source, arrays, state, fold)
    source.has_content_ = _take(arrays, "has_content", (fold.n_items,), np.bool_)


def _save_text(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    """Also the centring vector a query needs: the mean of the catalog's normalized text vectors."""
    from xrec.sources.content import text_vectors

    arrays, state = _save_content(source, ctx)
    center = np.zeros(source.item_factors_.shape[1], dtype=np.float32)
    if source.center:
        raw, _ = text_vectors(ctx.fold.catalog, source.columns, source.encoder, cache_dir=source.cache_dir)
        unit = _l2_rows(np.asarray(raw, dtype=np.float32))
        present = np.any(unit != 0, axis=1)
        if present.any():
            center = unit[present].mean(axis=0, dtype=np.float64).astype(np.float32)
        # the query map must reproduce the item vectors the source scores with
        rebuilt = _l2_rows(np.where(present[:, None], unit - center, 0.0).astype(np.float32))
        if not np.allclose(rebuilt, source.item_factors_, atol=1e-5):
            raise ConfigError(f"sources.{ctx.name}: the catalog's text vectors no longer give the source's item vectors")
    arrays["query_center"] = center
    state["query"] = {"encoder": source.encoder, "bridge": None}
    return arrays, state


def _load_text(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    _load_content(source, arrays, state, fold)
    source.query_center_ = _take(arrays, "query_center", (source.item_factors_.shape[1],), np.float32)


def _bridge_settings(bridge: Any) -> dict[str, Any]:
    names = [n for n in inspect.signature(type(bridge).__init__).parameters if n != "self"]
    return {n: getattr(bridge, n) for n in names if not isinstance(getattr(bridge, n), np.ndarray)}


def _save_cross_modal(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    arrays, state = _save_content(source, ctx)
    bridge = source.bridge_
    if bridge is None:  # CLIP: scores are kept, but its text tower is not bundled
        state["query"] = None
        return arrays, state
    fitted = {k: v for k, v in vars(bridge).items() if k.endswith("_") and k != "fitted_"}
    none = sorted(k for k, v in fitted.items() if v is None)
    for key, value in fitted.items():
        if value is not None:
            arrays[f"bridge.{key}"] = np.asarray(value)
    state["bridge"] = {"name": source.bridge, "settings": _bridge_settings(bridge), "none": none}
    # a text query goes through the bridge's text side into the space the items are scored in;
    # not when the text side was read from the user's own vector file (no encoder makes those)
    own_text = getattr(source, "text_vectors", None) is not None
    state["query"] = None if own_text else {"encoder": source.text_encoder, "bridge": source.bridge}
    return arrays, state


def _load_cross_modal(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    from xrec.encoders.bridge import make_bridge

    _load_content(source, arrays, state, fold)
    info = state.get("bridge")
    if info is None:
        source.bridge_ = None
        return
    bridge = make_bridge(info["name"], **info["settings"])
    for key, value in arrays.items():
        if key.startswith("bridge."):
            setattr(bridge, key[len("bridge."):], value)
    for key in info.get("none", []):
        setattr(bridge, key, None)
    bridge.fitted_ = True
    source.bridge_ = bridge


def _save_early_fusion(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    arrays, state = _save_factors(source, ctx)
    state["blocks"] = {m: [int(a), int(b)] for m, (a, b) in source.blocks_.items()}
    return arrays, state


def _load_early_fusion(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    _load_factors(source, arrays, state, fold)
    source.blocks_ = {m: (int(a), int(b)) for m, (a, b) in state.get("blocks", {}).items()}


# -- a production ranking read from a file: its per-user list scores --------------------------


def _save_ranking(source: Any, ctx: ExportContext) -> tuple[Arrays, dict[str, Any]]:
    lists = source.list_scores_.tocsr()
    arrays = {
        "list_data": lists.data.astype(np.float32),
        "list_indices": lists.indices.astype(np.int64),
        "list_indptr": lists.indptr.astype(np.int64),
        "list_lengths": np.asarray(source.list_lengths_, dtype=np.int64),
    }
    return arrays, {"by": source.by_, "skipped": {k: int(v) for k, v in source.skipped_.items()}}


def _load_ranking(source: Any, arrays: Arrays, state: dict[str, Any], fold: Fold) -> None:
    indptr = _take(arrays, "list_indptr", (fold.n_users + 1,), np.int64)
    indices = _take(arrays, "list_indices", (None,), np.int64)
    data = _take(arrays, "list_data", (len(indices),), np.float32)
    if indptr[0] != 0 or indptr[-1] != len(indices) or np.any(np.diff(indptr) < 0) or (len(indices) and (indices.min() < 0 or indices.max() >= fold.n_items)):
        raise ConfigError("tensors list_*: not a valid users × items sparse matrix")
    source.list_scores_ = sp.csr_matrix((data, indices, indptr), shape=(fold.n_users, fold.n_items))
    source.list_lengths_ = _take(arrays, "list_lengths", (fold.n_users,), np.int64)
    source.by_ = state.get("by")
    source.skipped_ = dict(state.get("skipped", {}))


for _kind in ("als", "bpr", "attributes"):
    register_artifacts(_kind, _save_factors, _load_factors)
register_artifacts("popularity", _save_popularity, _load_popularity)
register_artifacts("item_knn", _save_item_knn, _load_item_knn)
register_artifacts("image", _save_content, _load_content)
register_artifacts("vectors", _save_content, _load_content)  # the user's own item vectors
register_artifacts("ranking", _save_ranking, _load_ranking)
register_artifacts("text", _save_text, _load_text)
register_artifacts("cross_modal", _save_cross_modal, _load_cross_modal)
register_artifacts("early_fusion", _save_early_fusion, _load_early_fusion)
