"""DataLocation: the checked [data] table, its folder confinement, blend-file hints and loading."""

from __future__ import annotations

import ast
import json
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import xrec.data.location
from xrec.cli import main
from xrec.data.location import DataLocation, load_dataset
from xrec.errors import ConfigError, DataError
from xrec.spec import load_spec, parse_spec

SOURCES = {"pop": {"kind": "popularity"}}


def _shop(folder: Path, ext: str = "csv") -> None:
    """Six items, four customers with three purchases each (behaviour test data, not a reference)."""
    folder.mkdir(parents=True, exist_ok=True)
    items = pd.DataFrame({"sku": [f"s{j}" for j in range(6)], "brand": ["NA", "acme", "NA", "zeta", "acme", "zeta"]})
    events = pd.DataFrame([
        {"customer": f"c{u}", "sku": f"s{(u + j) % 6}", "ts": 10 * u + j, "qty": 1.0 + j} for u in range(4) for j in range(3)
    ])
    for name, frame in (("items", items), ("events", events)):
        if ext == "parquet":
            pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), folder / f"{name}.parquet")
        else:
            frame.to_csv(folder / f"{name}.{ext}", index=False)


def _table(ext: str = "csv", **extra) -> dict:
    return {"dataset": "files", "catalog": f"items.{ext}", "interactions": f"events.{ext}", "item_col": "sku",
            "user_col": "customer", "time_col": "ts", "weight_col": "qty", "categorical": "brand", **extra}


def test_a_string_where_a_list_is_expected_is_one_column(tmp_path):
    _shop(tmp_path)
    location = DataLocation.from_table(_table(), tmp_path)
    assert location.categorical == ("brand",)
    dataset = load_dataset(location)
    assert dataset.catalog.schema.categorical == ("brand",)
    assert dataset.catalog.items["brand"].tolist()[0] == "NA"  # a brand, not a missing value


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"categorical": ["brand", 3]}, "data.categorical"),
        ({"categorical": {"a": 1}}, "data.categorical"),
        ({"item_col": ""}, "data.item_col"),
        ({"weight_col": 1}, "data.weight_col"),
        ({"allow_outside": "yes"}, "data.allow_outside"),
        ({"catalog": 5}, "data.catalog"),
        ({"folder": "x"}, "data.folder"),
        ({"colour": "x"}, "unknown key"),
        ({"dataset": "shop"}, "data.dataset"),
    ],
)
def test_bad_data_tables_name_the_field(change, field):
    with pytest.raises(ConfigError, match=field.replace(".", r"\.")):
        DataLocation.from_table({**_table(), **change})


def test_file_settings_are_refused_for_a_named_dataset():
    with pytest.raises(ConfigError, match=r"\['item_col'\] only for dataset = 'files'"):
        DataLocation.from_table({"dataset": "movielens", "item_col": "movie"})


def test_spec_holds_a_data_location(tmp_path):
    _shop(tmp_path)
    spec = parse_spec({"data": _table(), "sources": SOURCES}, base_dir=tmp_path)
    assert isinstance(spec.data, DataLocation) and spec.data.base == tmp_path
    assert spec.data.to_table()["categorical"] == ["brand"]


@pytest.mark.parametrize("ext", ["csv", "parquet"])
def test_paths_outside_the_spec_folder_are_refused_unless_allowed(tmp_path, ext):
    _shop(tmp_path / "elsewhere", ext)
    (tmp_path / "project").mkdir()
    table = _table(ext, catalog=f"../elsewhere/items.{ext}", interactions=f"../elsewhere/events.{ext}")
    with pytest.raises(ConfigError, match=r"data\.catalog: '\.\./elsewhere/items\..*' leads outside the spec's folder.*allow_outside = true"):
        load_dataset(DataLocation.from_table(table, tmp_path / "project"))
    dataset = load_dataset(DataLocation.from_table({**table, "allow_outside": True}, tmp_path / "project"))
    assert dataset.catalog.n_items == 6


def test_a_symbolic_link_out_of_the_folder_is_outside(tmp_path):
    secret = tmp_path / "system.csv"
    secret.write_text("root:x:0:0:root:/root:/bin/bash\nroot:x:0:0:root:/root:/bin/bash\n", encoding="utf-8")
    project = tmp_path / "project"
    _shop(project)
    (project / "linked.csv").symlink_to(secret)
    with pytest.raises(ConfigError, match="leads outside the spec's folder") as err:
        load_dataset(DataLocation.from_table(_table(catalog="linked.csv"), project))
    assert "root:x" not in str(err.value)
    # Allowed, the file is read, but nothing from it is quoted: not its rows, not its columns.
    with pytest.raises(DataError) as err:
        load_dataset(DataLocation.from_table(_table(catalog="linked.csv", allow_outside=True), project))
    assert "root" not in str(err.value).replace(str(tmp_path), "")


def test_folders_and_devices_are_said_for_what_they_are(tmp_path):
    _shop(tmp_path)
    (tmp_path / "dir.csv").mkdir()
    with pytest.raises(ConfigError, match=r"data\.catalog: .*dir\.csv is a folder, not a data file"):
        load_dataset(DataLocation.from_table(_table(catalog="dir.csv"), tmp_path))
    with pytest.raises(ConfigError, match=r"data\.interactions: /dev/null is a character device") as err:
        load_dataset(DataLocation.from_table(_table(interactions="/dev/null", allow_outside=True), tmp_path))
    assert "not found" not in str(err.value)
    with pytest.raises(ConfigError, match=r"data\.catalog: file not found"):
        load_dataset(DataLocation.from_table(_table(catalog="gone.csv"), tmp_path))


def test_hints_are_absolute_and_read_back_without_a_spec(tmp_path):
    _shop(tmp_path / "data")
    location = DataLocation.from_table(_table(catalog="data/items.csv", interactions="data/events.csv"), tmp_path)
    hints = location.to_hints()
    assert Path(hints["catalog"]).is_absolute() and hints["base"] == str(tmp_path.resolve())
    back = DataLocation.from_hints(hints)
    assert load_dataset(back).fingerprint() == load_dataset(location).fingerprint()
    # Moved: paths keep their place below the new folder.
    moved = tmp_path / "moved"
    (tmp_path / "data").rename(tmp_path / "moved_data")
    (moved / "data").parent.mkdir()
    (tmp_path / "moved_data").rename(moved / "data")
    again = back.with_folder(moved)
    assert again.catalog == "data/items.csv" and again.base == moved
    assert load_dataset(again).fingerprint() == load_dataset(location.with_folder(moved)).fingerprint()


def test_hints_written_before_the_base_was_recorded_still_load(tmp_path):
    _shop(tmp_path)
    old = {**_table(), "catalog": str(tmp_path / "items.csv"), "interactions": str(tmp_path / "events.csv"), "folder": str(tmp_path)}
    location = DataLocation.from_hints(old)
    assert location.base == tmp_path and location.folder is None
    assert load_dataset(location).catalog.n_items == 6


def test_location_module_imports_nothing_above_the_data_layer():
    # data <- spec <- experiment and data <- runtime: the location may not import upwards.
    tree = ast.parse(Path(xrec.data.location.__file__).read_text(encoding="utf-8"))
    imported = {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)}
    imported |= {a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    xrec_modules = {m for m in imported if m and m.startswith("xrec")}
    assert xrec_modules <= {"xrec.errors"} | {m for m in xrec_modules if m.startswith("xrec.data")}


def _spec_file(folder: Path, ext: str) -> Path:
    _shop(folder, ext)
    spec = folder / "spec.toml"
    spec.write_text(
        f'[data]\ndataset = "files"\ncatalog = "items.{ext}"\ninteractions = "events.{ext}"\nitem_col = "sku"\n'
        'user_col = "customer"\ntime_col = "ts"\nweight_col = "qty"\ncategorical = "brand"\n'
        '[evaluate]\nks = [2]\n[sources.pop]\nkind = "popularity"\n[blends.mix]\nweights = { pop = 1.0 }\n',
        encoding="utf-8",
    )
    return spec


def test_parquet_spec_exports_and_recommends_without_a_throwaway_spec(tmp_path, capsys, monkeypatch):
    spec = _spec_file(tmp_path, "parquet")
    blend = tmp_path / "mix.toml"
    assert main(["export", str(spec), "-o", str(blend), "-q"]) == 0

    def no_spec(*args, **kwargs):
        raise AssertionError("loading a blend file built a spec")

    monkeypatch.setattr("xrec.spec.parse_spec", no_spec)
    capsys.readouterr()
    assert main(["recommend", str(blend), "--user", "c1", "-k", "2", "--json", "-q"]) == 0
    assert len(json.loads(capsys.readouterr().out)["c1"]) == 2


def test_csv_and_parquet_specs_read_the_same_data(tmp_path):
    csv = load_spec(_spec_file(tmp_path / "a", "csv"))
    parquet = load_spec(_spec_file(tmp_path / "b", "parquet"))
    assert load_dataset(csv.data).fingerprint() == load_dataset(parquet.data).fingerprint()
    assert not csv.data.same_data(parquet.data)


def test_catalog_images_outside_the_spec_folder_are_named_by_row(tmp_path):
    project = tmp_path / "project"
    _shop(project)
    (tmp_path / "elsewhere.png").write_bytes(b"\x89PNG")
    (project / "inside.png").write_bytes(b"\x89PNG")
    (project / "linked.png").symlink_to(tmp_path / "elsewhere.png")
    items = pd.read_csv(project / "items.csv", keep_default_na=False).assign(picture=["inside.png", "../elsewhere.png", "linked.png", "inside.png", "inside.png", "inside.png"])
    items.to_csv(project / "items.csv", index=False)
    table = _table(image="picture")
    with pytest.raises(DataError, match=r"data\.image: 2 rows have an image in 'picture' outside the spec's folder.*row 2: item='s1', picture='\.\./elsewhere\.png'; row 3: item='s2', picture='linked\.png'"):
        load_dataset(DataLocation.from_table(table, project))
    assert load_dataset(DataLocation.from_table({**table, "allow_outside": True}, project)).catalog.n_items == 6
