"""The ``vectors`` source: item vectors read from .npy, Parquet and .safetensors files."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from safetensors.numpy import save_file
from sklearn.metrics.pairwise import cosine_similarity
from sklearn.preprocessing import normalize

from xrec.data.catalog import Catalog
from xrec.errors import ConfigError, DataError
from xrec.fold import Fold
from xrec.sources import VectorSource, make_source
from xrec.sources.vectors import read_item_vectors

DAY = 86400.0
N_USERS, N_ITEMS, DIM = 9, 14, 6


def _fold(seed: int = 0) -> Fold:
    rng = np.random.default_rng(seed)
    rows = [
        (u, int(i), float(rng.integers(0, 50)) * DAY, 1.0)
        for u in range(N_USERS - 1)  # the last user has no history
        for i in rng.choice(N_ITEMS, size=int(rng.integers(1, 5)), replace=False)
    ]
    train = pd.DataFrame(rows, columns=["user_idx", "item_idx", "timestamp", "weight"]).astype({"weight": "float32"})
    catalog = Catalog.from_ids([f"i{j}" for j in range(N_ITEMS)])
    return Fold(catalog, np.array([f"u{u}" for u in range(N_USERS)]), train, train.iloc[:0])


def _vectors(seed: int = 1) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(N_ITEMS, DIM)).astype(np.float32)


@pytest.fixture
def files(tmp_path):
    """The same vectors, in file order reversed, in every supported layout."""
    vec = _vectors()
    order = np.arange(N_ITEMS)[::-1]
    ids = [f"i{j}" for j in order]
    out = {}
    np.save(tmp_path / "v.npy", vec[order])
    (tmp_path / "ids.txt").write_text("\n".join(ids) + "\n", encoding="utf-8")
    np.save(tmp_path / "ids.npy", np.array(ids))
    out["npy"] = {"path": str(tmp_path / "v.npy"), "ids": str(tmp_path / "ids.txt")}
    out["npy_npy_ids"] = {"path": str(tmp_path / "v.npy"), "ids": str(tmp_path / "ids.npy")}
    fixed = pa.FixedSizeListArray.from_arrays(pa.array(vec[order].ravel()), DIM)
    pq.write_table(pa.table({"item": ids, "vec": fixed}), tmp_path / "fixed.parquet")
    out["parquet_fixed"] = {"path": str(tmp_path / "fixed.parquet")}
    pq.write_table(pa.table({"item": ids, "vec": [list(map(float, r)) for r in vec[order]]}), tmp_path / "list.parquet")
    out["parquet_list"] = {"path": str(tmp_path / "list.parquet")}
    cols = {"sku": ids} | {f"d{k}": vec[order, k] for k in range(DIM)}
    pq.write_table(pa.table(cols), tmp_path / "wide.parquet")
    out["parquet_wide"] = {"path": str(tmp_path / "wide.parquet"), "id_col": "sku"}
    # integer ids: the catalog's "i7" is not an integer, so the safetensors file uses its own catalog below
    save_file({"vectors": vec[order], "ids": np.array(order, dtype=np.int64)}, str(tmp_path / "v.safetensors"))
    out["safetensors_int_ids"] = {"path": str(tmp_path / "v.safetensors")}
    save_file({"emb": vec[order]}, str(tmp_path / "noids.safetensors"))
    out["safetensors_id_file"] = {"path": str(tmp_path / "noids.safetensors"), "ids": str(tmp_path / "ids.txt"), "tensor": "emb"}
    return out


@pytest.mark.parametrize(
    "layout", ["npy", "npy_npy_ids", "parquet_fixed", "parquet_list", "parquet_wide", "safetensors_int_ids", "safetensors_id_file"]
)
def test_every_layout_reads_the_same_vectors_in_catalog_order(files, layout) -> None:
    fold = _fold()
    catalog = Catalog.from_ids([str(j) for j in range(N_ITEMS)]) if layout == "safetensors_int_ids" else fold.catalog
    vectors, has = read_item_vectors(catalog, **files[layout])
    assert vectors.dtype == np.float32 and has.all()
    np.testing.assert_array_equal(vectors, _vectors())


def test_npy_vectors_are_memory_mapped(files, monkeypatch) -> None:
    seen = {}
    real_load = np.load

    def spy(*args, **kwargs):
        seen.setdefault("mmap_mode", []).append(kwargs.get("mmap_mode"))
        return real_load(*args, **kwargs)

    monkeypatch.setattr(np, "load", spy)
    read_item_vectors(_fold().catalog, **files["npy"])
    assert "r" in seen["mmap_mode"]


def test_scores_equal_sklearn_cosine_of_mean_profile_and_items(files) -> None:
    fold = _fold()
    src = VectorSource(**files["npy"]).fit(fold)
    scores = src.score(np.arange(N_USERS))
    unit = normalize(_vectors())
    profiles = np.zeros((N_USERS, DIM))
    for u, group in fold.train.groupby("user_idx"):
        profiles[u] = unit[group["item_idx"].to_numpy()].mean(axis=0)
    # The cosine of profile and item, computed by scikit-learn's cosine_similarity (reference library)
    expected = cosine_similarity(profiles[: N_USERS - 1], _vectors())
    np.testing.assert_allclose(scores[: N_USERS - 1], expected, atol=1e-5)
    assert not scores[N_USERS - 1].any()  # no history, no profile
    assert src.is_low_rank and scores.dtype == np.float32


def test_centring_and_half_life_match_sklearn(files) -> None:
    fold = _fold()
    src = VectorSource(**files["parquet_fixed"], center=True, half_life_days=10.0).fit(fold)
    unit = normalize(_vectors())
    centred = unit - unit.mean(axis=0)
    profiles = np.zeros((N_USERS - 1, DIM))
    for u, group in fold.train.groupby("user_idx"):
        times = group["timestamp"].to_numpy()
        w = 2.0 ** (-(times.max() - times) / DAY / 10.0)  # halves every 10 days before the latest
        profiles[u] = (w[:, None] * centred[group["item_idx"].to_numpy()]).sum(axis=0)
    # scikit-learn's cosine_similarity as the reference for the cosine (reference library)
    np.testing.assert_allclose(src.score(np.arange(N_USERS - 1)), cosine_similarity(profiles, centred), atol=1e-5)


def test_spec_style_construction_and_params(files) -> None:
    src = make_source("vectors", **files["npy"], on_missing="skip")
    assert src.get_params()["on_missing"] == "skip"
    assert VectorSource.path_settings == ("path", "ids")
    with pytest.raises(ConfigError, match="no setting"):
        make_source("vectors", path="x.npy", normalise=True)


# ---------------------------------------------------------------------------------------
# bad input
# ---------------------------------------------------------------------------------------


def _npy(tmp_path, vec, ids):
    np.save(tmp_path / "bad.npy", vec)
    (tmp_path / "bad.txt").write_text("\n".join(ids), encoding="utf-8")
    return {"path": str(tmp_path / "bad.npy"), "ids": str(tmp_path / "bad.txt")}


def _ids(n=N_ITEMS):
    return [f"i{j}" for j in range(n)]


def test_catalog_items_without_vector_error_or_skip(tmp_path) -> None:
    cat = _fold().catalog
    spec = _npy(tmp_path, _vectors()[:-2], _ids(N_ITEMS - 2))
    with pytest.raises(DataError, match=r"2 catalog item\(s\) have no vector: 'i12', 'i13'"):
        read_item_vectors(cat, **spec)
    with pytest.warns(UserWarning, match="2 catalog item"):
        vectors, has = read_item_vectors(cat, **spec, on_missing="skip")
    assert not vectors[-2:].any() and has.tolist() == [True] * (N_ITEMS - 2) + [False, False]
    src = VectorSource(**spec, on_missing="skip")
    with pytest.warns(UserWarning):
        src.fit(_fold())
    assert not src.item_factors_[-2:].any() and not src.has_content_[-2:].any()


def test_ids_not_in_catalog_error_or_ignore(tmp_path) -> None:
    vec = np.vstack([_vectors(), np.ones((1, DIM), dtype=np.float32)])
    spec = _npy(tmp_path, vec, [*_ids(), "stranger"])
    with pytest.raises(DataError, match=r"1 id\(s\) are not in the catalog: 'stranger'"):
        read_item_vectors(_fold().catalog, **spec)
    with pytest.warns(UserWarning, match="1 vector id"):
        vectors, has = read_item_vectors(_fold().catalog, **spec, on_extra="ignore")
    np.testing.assert_array_equal(vectors, _vectors())


@pytest.mark.parametrize(
    ("vec", "ids", "message"),
    [
        (_vectors(), [*_ids(N_ITEMS - 1), "i0"], r"1 id\(s\) appear more than once: 'i0'"),
        (_vectors(), _ids(N_ITEMS - 1), r"13 ids for 14 vectors"),
        (np.where(np.arange(N_ITEMS)[:, None] == 3, np.nan, _vectors()), _ids(), r"1 vector\(s\) hold NaN or infinite values, ids 'i3'"),
        (np.where(np.arange(N_ITEMS)[:, None] == 5, np.inf, _vectors()), _ids(), r"ids 'i5'"),
        (_vectors().astype(str), _ids(), "must be numbers"),
        (_vectors() > 0, _ids(), "must be numbers"),
        (_vectors()[:, :, None], _ids(), "must be a 2-D array"),
        (np.zeros((0, DIM), dtype=np.float32), [], "holds no vectors"),
    ],
)
def test_bad_npy_files_name_the_problem(tmp_path, vec, ids, message) -> None:
    with pytest.raises(DataError, match=message):
        read_item_vectors(_fold().catalog, **_npy(tmp_path, vec, ids))


def test_wrong_dimension_is_refused(files) -> None:
    with pytest.raises(DataError, match="6 dimensions, the setting 'dim' expects 8"):
        read_item_vectors(_fold().catalog, **files["npy"], dim=8)


def test_mixed_lengths_in_a_parquet_list_name_the_rows(tmp_path) -> None:
    rows = [list(r) for r in _vectors().astype(float)]
    rows[4] = rows[4][:-1]
    pq.write_table(pa.table({"item": _ids(), "vec": rows}), tmp_path / "m.parquet")
    with pytest.raises(DataError, match=r"mixed lengths: most have 6 dimensions, but 1 row\(s\) differ, ids 'i4 \(5\)'"):
        read_item_vectors(_fold().catalog, path=str(tmp_path / "m.parquet"))


def test_parquet_problems(tmp_path) -> None:
    cat = _fold().catalog
    pq.write_table(pa.table({"item": _ids(), "a": [1.0] * N_ITEMS, "name": ["x"] * N_ITEMS}), tmp_path / "t.parquet")
    with pytest.raises(DataError, match="column 'name' has type string"):
        read_item_vectors(cat, path=str(tmp_path / "t.parquet"))
    with pytest.raises(DataError, match="no id column 'sku'"):
        read_item_vectors(cat, path=str(tmp_path / "t.parquet"), id_col="sku")
    pq.write_table(pa.table({"item": _ids(), "a": [[1.0]] * N_ITEMS, "b": [[2.0]] * N_ITEMS}), tmp_path / "two.parquet")
    with pytest.raises(DataError, match="several list columns"):
        read_item_vectors(cat, path=str(tmp_path / "two.parquet"))
    pq.write_table(pa.table({"item": pa.array([], pa.string()), "a": pa.array([], pa.float32())}), tmp_path / "e.parquet")
    with pytest.raises(DataError, match="holds no vectors"):
        read_item_vectors(cat, path=str(tmp_path / "e.parquet"))


def test_setting_and_file_problems(tmp_path, files) -> None:
    cat = _fold().catalog
    with pytest.raises(ConfigError, match="needs an id file"):
        read_item_vectors(cat, path=files["npy"]["path"])
    with pytest.raises(ConfigError, match="file not found"):
        read_item_vectors(cat, path=str(tmp_path / "nope.npy"), ids=files["npy"]["ids"])
    (tmp_path / "v.csv").write_text("x")
    with pytest.raises(ConfigError, match="unknown extension"):
        read_item_vectors(cat, path=str(tmp_path / "v.csv"))
    with pytest.raises(ConfigError, match="on_missing"):
        read_item_vectors(cat, **files["npy"], on_missing="zero")
    with pytest.raises(DataError, match="no 'ids' tensor"):
        read_item_vectors(cat, path=files["safetensors_id_file"]["path"], tensor="emb")
    with pytest.raises(DataError, match="no tensor named 'vectors'"):
        read_item_vectors(cat, path=files["safetensors_id_file"]["path"], ids=files["npy"]["ids"])
    np.save(tmp_path / "obj.npy", np.array(["a", 1], dtype=object), allow_pickle=True)
    with pytest.raises(DataError, match="without pickle"):
        read_item_vectors(cat, path=files["npy"]["path"], ids=str(tmp_path / "obj.npy"))
    with pytest.raises(ConfigError, match="half_life_days"):
        VectorSource(**files["npy"], half_life_days=0).fit(_fold())


def test_all_zero_vector_counts_as_no_content(tmp_path) -> None:
    vec = _vectors()
    vec[2] = 0
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a zero row is not a missing item: no warning
        _, has = read_item_vectors(_fold().catalog, **_npy(tmp_path, vec, _ids()))
    assert has.tolist() == [j != 2 for j in range(N_ITEMS)]


def test_vectors_from_a_setting_path_or_table(files) -> None:
    from xrec.sources.vectors import vectors_from_setting

    cat = _fold().catalog
    a, _ = vectors_from_setting(cat, files["parquet_fixed"]["path"], "text_vectors")
    b, _ = vectors_from_setting(cat, files["npy"], "text_vectors")
    np.testing.assert_array_equal(a, b)
    with pytest.raises(ConfigError, match="setting 'text_vectors': unknown key"):
        vectors_from_setting(cat, {**files["npy"], "center": True}, "text_vectors")
    with pytest.raises(ConfigError, match="setting 'image_vectors': a vector file path"):
        vectors_from_setting(cat, 3, "image_vectors")


def test_spec_paths_resolve_against_the_spec_folder(tmp_path) -> None:
    from xrec.sources.ranking import RankingSource

    resolve = lambda p: tmp_path / p  # noqa: E731
    got = VectorSource.resolve_paths({"path": "v.npy", "ids": "ids.txt", "dim": 3}, resolve)
    assert got == {"path": str(tmp_path / "v.npy"), "ids": str(tmp_path / "ids.txt"), "dim": 3}
    assert RankingSource.resolve_paths({"path": "/abs/r.csv"}, lambda p: Path("/abs") / p)["path"] == "/abs/r.csv"

    class Tables(VectorSource):
        kind = ""  # not registered
        path_settings = ("one", "many")

    got = Tables.resolve_paths({"one": {"path": "a.npy", "ids": "a.txt", "id_col": "x"}, "many": {"m": {"path": "b.pq"}, "n": "c.pq"}}, resolve)
    assert got["one"] == {"path": str(tmp_path / "a.npy"), "ids": str(tmp_path / "a.txt"), "id_col": "x"}
    assert got["many"] == {"m": {"path": str(tmp_path / "b.pq")}, "n": str(tmp_path / "c.pq")}
    assert Tables.resolve_paths({"one": None}, resolve) == {"one": None} and Tables.resolve_paths({}, resolve) == {}
