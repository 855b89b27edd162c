"""One contract every registered source kind keeps, run over all of ``source_kinds()``.

The idea follows scikit-learn's shared estimator checks (``sklearn/utils/estimator_checks.py``:
fit returns self, parameters round-trip, unfitted use is refused, results are reproducible)
and implicit's ``tests/recommender_base_test.py`` (one suite every model runs). Content kinds
run with stub encoders (hash-seeded vectors, no model files), so the suite is fast and
offline; their real encoders are tested in their own modules.

The checks are of the interface, so they hold each kind to xrec's own rules rather than to
outside numbers; each kind's scores are checked against outside references (scikit-learn,
hand-worked examples) in ``test_sources.py`` and ``test_content_sources.py``.

A new built-in kind must get an entry in ``FACTORIES``: ``test_every_builtin_kind_has_a_factory``
fails until it does.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from xrec.data.catalog import Catalog
from xrec.encoders import _by_name
from xrec.encoders.base import Encoder
from xrec.errors import NotFittedError
from xrec.fold import Fold
from xrec.sources import make_source, source_kinds
from xrec.sources.base import Source, source_class

DAY = 86400.0
N_USERS, N_ITEMS = 12, 10
USERS = np.array([3, 0, N_USERS - 1, 5])  # unsorted, with the user who has no history


def _unit_rows(seed_text: str, n_rows: int, dim: int) -> np.ndarray:
    rng = np.random.default_rng(int.from_bytes(hashlib.sha256(seed_text.encode()).digest()[:8], "little"))
    v = rng.standard_normal((n_rows, dim)).astype(np.float32)
    return v / np.linalg.norm(v, axis=1, keepdims=True)


class StubText(Encoder):
    """A text encoder whose vector is seeded by the text's hash (no model)."""

    modality = "text"
    identity = "contract-stub-text"
    on_error = "skip"

    @property
    def dim(self) -> int:
        return 8

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        return np.vstack([_unit_rows(str(c), 1, self.dim) for c in contents]) if contents else np.zeros((0, self.dim), np.float32)


class StubImageResult:
    def __init__(self, vectors: np.ndarray, probs: np.ndarray) -> None:
        self.vectors, self.probs = vectors, probs
        self.ok = np.ones(len(vectors), dtype=bool)


class StubImage(Encoder):
    """An image classifier stand-in: features and 1,000 class probabilities seeded by the bytes."""

    modality = "image"
    identity = "contract-stub-image"
    on_error = "skip"
    n_classes = 1000

    @property
    def dim(self) -> int:
        return 6

    def encode_with_probs(self, contents: Sequence[Any], *, progress: bool = False) -> StubImageResult:
        keys = [hashlib.sha256(bytes(c)).hexdigest() for c in contents]
        vectors = np.vstack([_unit_rows(k, 1, self.dim) for k in keys])
        logits = np.vstack([_unit_rows(k + "probs", 1, self.n_classes) for k in keys]) * 20
        probs = np.exp(logits - logits.max(axis=1, keepdims=True))
        return StubImageResult(vectors, (probs / probs.sum(axis=1, keepdims=True)).astype(np.float32))

    def encode(self, contents: Sequence[Any], *, progress: bool = False) -> np.ndarray:
        return self.encode_with_probs(contents).vectors


@pytest.fixture
def stub_encoders(monkeypatch: pytest.MonkeyPatch) -> None:
    # The by-name encoders are shared per process through one table: put the stubs there.
    monkeypatch.setitem(_by_name._SHARED, ("text", "minilm", "skip"), StubText())
    monkeypatch.setitem(_by_name._SHARED, ("image", "efficientnet_lite0", "skip", 1.0), StubImage())


@pytest.fixture
def catalog(tmp_path: Path) -> Catalog:
    for j in range(N_ITEMS):
        (tmp_path / f"{j}.img").write_bytes(f"image bytes of item {j}".encode())
    rng = np.random.default_rng(3)
    frame = pd.DataFrame(
        {
            "item": [f"i{j}" for j in range(N_ITEMS)],
            "title": [f"item number {j} in colour {j % 3}" for j in range(N_ITEMS)],
            "colour": np.array(["red", "blue", "green"])[np.arange(N_ITEMS) % 3],
            "tags": ["a|b", "b", "c", "", "a|c"] * (N_ITEMS // 5),
            "price": rng.lognormal(2.0, 0.7, N_ITEMS),
            "image": [f"{j}.img" for j in range(N_ITEMS)],
        }
    )
    return Catalog.from_frame(
        frame, categorical=["colour"], multilabel=["tags"], numeric=["price"], text=["title"], image="image", image_root=tmp_path
    )


def _fold(catalog: Catalog, heldout_seed: int = 0) -> Fold:
    rng = np.random.default_rng(0)
    rows = [
        (u, int(i), float(rng.integers(0, 100)) * DAY, float(rng.integers(1, 6)))
        for u in range(N_USERS - 1)  # the last user has no training rows
        for i in np.flatnonzero(rng.random(N_ITEMS) < 0.4)
    ]
    held_rng = np.random.default_rng(100 + heldout_seed)
    held = [(u, int(held_rng.integers(N_ITEMS)), 200 * DAY, 1.0) for u in range(N_USERS)]
    cols = ["user_idx", "item_idx", "timestamp", "weight"]
    types = {"user_idx": "int64", "item_idx": "int64", "timestamp": "float64", "weight": "float32"}
    return Fold(
        catalog=catalog,
        user_ids=np.array([f"u{u}" for u in range(N_USERS)]),
        train=pd.DataFrame(rows, columns=cols).astype(types),
        heldout=pd.DataFrame(held, columns=cols).astype(types),
    )


def _own_files(cache: str) -> Path:
    """Seeded item vectors (.npy + ids) and a ranking file (CSV) beside the cache folder, written once."""
    folder = Path(cache).parent / "own_files"
    if not folder.is_dir():
        folder.mkdir(parents=True)
        rng = np.random.default_rng(7)
        order = rng.permutation(N_ITEMS)
        np.save(folder / "vectors.npy", rng.standard_normal((N_ITEMS, 5)).astype(np.float32))
        (folder / "ids.txt").write_text("\n".join(f"i{j}" for j in order), encoding="utf-8")
        rows = [(f"u{u}", f"i{j}", float(s)) for u in range(N_USERS - 2) for s, j in enumerate(rng.permutation(N_ITEMS)[:4])]
        pd.DataFrame(rows, columns=["user", "item", "rank"]).to_csv(folder / "ranking.csv", index=False)
    return folder


# kind -> (cache folder -> unfitted source with small, fast settings)
FACTORIES: dict[str, Callable[[str], Source]] = {
    "popularity": lambda cache: make_source("popularity"),
    "als": lambda cache: make_source("als", factors=4, iterations=5, num_threads=1),
    "bpr": lambda cache: make_source("bpr", factors=4, iterations=20),
    "item_knn": lambda cache: make_source("item_knn", neighbors=3),
    "attributes": lambda cache: make_source("attributes", half_life_days=30.0),
    "text": lambda cache: make_source("text", cache_dir=cache),
    "image": lambda cache: make_source("image", cache_dir=cache, center=True),
    "cross_modal": lambda cache: make_source("cross_modal", bridge="ridge", cache_dir=cache),
    "early_fusion": lambda cache: make_source("early_fusion", modalities=["text", "image", "attributes"], cache_dir=cache),
    "mapped_factors": lambda cache: make_source(
        "mapped_factors", modalities=["attributes", "text"], als={"factors": 4, "iterations": 5, "num_threads": 1}, cache_dir=cache
    ),
    "vectors": lambda cache: make_source(
        "vectors", path=str(_own_files(cache) / "vectors.npy"), ids=str(_own_files(cache) / "ids.txt"), center=True
    ),
    "ranking": lambda cache: make_source("ranking", path=str(_own_files(cache) / "ranking.csv"), depth=3),
}


def _builtin_kinds() -> list[str]:
    # Tests may register their own kinds; the contract covers every kind xrec itself ships.
    return [k for k in source_kinds() if source_class(k).__module__.startswith("xrec.")]


def test_every_builtin_kind_has_a_factory() -> None:
    missing = sorted(set(_builtin_kinds()) - set(FACTORIES))
    assert not missing, f"add the source kind(s) {missing} to FACTORIES in tests/test_source_contract.py"
    assert set(FACTORIES) <= set(source_kinds())


@pytest.mark.parametrize("kind", sorted(FACTORIES))
def test_source_contract(kind: str, catalog: Catalog, tmp_path: Path, stub_encoders: None) -> None:
    cache = str(tmp_path / "cache")
    fold = _fold(catalog)
    src = FACTORIES[kind](cache)
    assert src.kind == kind and type(src) is source_class(kind)

    # Settings round-trip: get_params rebuilds an equal source (what a blend file relies on).
    params = src.get_params()
    again = make_source(kind, **params)
    assert type(again) is type(src) and again.get_params() == params

    # Unfitted use is refused with xrec's own error (also a RuntimeError, as before).
    with pytest.raises(NotFittedError, match="not fitted"):
        src.score(USERS)

    assert src.fit(fold) is src
    scores = src.score(USERS)
    assert scores.shape == (len(USERS), N_ITEMS)
    assert scores.dtype == np.float32
    assert np.isfinite(scores).all()
    # Rows follow the users asked for, in their order (a one-row product may round differently).
    np.testing.assert_allclose(scores[1], src.score(np.array([0]))[0], rtol=1e-5, atol=1e-6)

    # Same settings, same data: the same scores (every random choice is seeded).
    np.testing.assert_array_equal(FACTORIES[kind](cache).fit(fold).score(USERS), scores)

    # Held-out rows are never read: other held-out rows give the same scores.
    np.testing.assert_array_equal(FACTORIES[kind](cache).fit(_fold(catalog, heldout_seed=1)).score(USERS), scores)

    if src.is_low_rank:
        # A low-rank source's scores are its factors' product (the engine relies on it).
        u, v = np.asarray(src.user_factors_), np.asarray(src.item_factors_)
        assert u.shape[0] == N_USERS and v.shape[0] == N_ITEMS and u.shape[1] == v.shape[1]
        np.testing.assert_allclose(scores, u[USERS] @ v.T, rtol=1e-5, atol=1e-6)
