"""Source file settings (vectors, ranking, cross_modal, early_fusion) stay inside the spec's
folder, like the ``[data]`` paths, unless ``data.allow_outside = true``; a file read from
outside never has its content quoted in an error."""

from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from xrec.data.dataset import Dataset
from xrec.data.catalog import Catalog
from xrec.data.interactions import Interactions
from xrec.errors import ConfigError, DataError
from xrec.experiment import build_sources, run_experiment
from xrec.spec import parse_spec

ITEMS = [f"i{j}" for j in range(6)]


def _files(folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    np.save(folder / "v.npy", np.eye(6, 3, dtype=np.float32))
    (folder / "ids.txt").write_text("\n".join(ITEMS) + "\n", encoding="utf-8")
    pd.DataFrame({"user": ["u0", "u1"], "item": ["i1", "i2"], "score": [1.0, 2.0]}).to_csv(folder / "r.csv", index=False)


def _spec(project: Path, sources: dict, allow_outside: bool = False):
    data = {"allow_outside": True} if allow_outside else {}
    # Six items in the tiny catalog: cut-offs must fit in it (a longer top-K list is refused).
    return parse_spec({"data": data, "sources": sources, "evaluate": {"ks": [3]}}, base_dir=project)


@pytest.fixture
def layout(tmp_path):
    """A project folder, a folder beside it, and the same files in both."""
    project, elsewhere = tmp_path / "project", tmp_path / "elsewhere"
    _files(project)
    _files(elsewhere)
    return project, elsewhere


def _cases(elsewhere: Path) -> list[tuple[dict, str]]:
    outside_npy = str(elsewhere / "v.npy")
    return [
        ({"kind": "vectors", "path": "../elsewhere/v.npy", "ids": "ids.txt"}, "sources.s.path"),
        ({"kind": "vectors", "path": "v.npy", "ids": "../elsewhere/ids.txt"}, "sources.s.ids"),
        ({"kind": "ranking", "path": str(elsewhere / "r.csv")}, "sources.s.path"),
        ({"kind": "cross_modal", "image_vectors": {"path": outside_npy, "ids": "ids.txt"}, "text_vectors": "v.npy"}, "sources.s.image_vectors.path"),
        ({"kind": "early_fusion", "vectors": {"a": {"path": "v.npy", "ids": "ids.txt"}, "b": "../elsewhere/v.npy"}}, "sources.s.vectors.b"),
    ]


def test_paths_leading_outside_are_refused_naming_the_field(layout) -> None:
    project, elsewhere = layout
    for table, field in _cases(elsewhere):
        spec = _spec(project, {"s": table})
        with pytest.raises(ConfigError, match="^" + re.escape(field) + r": .* leads outside the spec's folder .*data\.allow_outside = true"):
            build_sources(spec)
        # the opt-out of the [data] table covers source files too
        built = build_sources(_spec(project, {"s": table}, allow_outside=True))
        assert list(built) == ["s"]


def test_a_symbolic_link_out_of_the_folder_is_outside(layout) -> None:
    project, elsewhere = layout
    os.symlink(elsewhere / "r.csv", project / "linked.csv")
    os.symlink(elsewhere, project / "linked_folder")
    for path in ("linked.csv", "linked_folder/r.csv"):
        with pytest.raises(ConfigError, match=r"^sources\.current\.path: .*leads outside"):
            build_sources(_spec(project, {"current": {"kind": "ranking", "path": path}}))
    built = build_sources(_spec(project, {"current": {"kind": "ranking", "path": "linked.csv"}}, allow_outside=True))
    # Path.resolve follows the link (Python documentation, pathlib): the source reads the outside file
    assert Path(built["current"].path).resolve() == (elsewhere / "r.csv").resolve()


def test_inside_paths_are_unchanged(layout) -> None:
    project, _ = layout
    (project / "sub").mkdir()
    _files(project / "sub")
    sources = {
        "v": {"kind": "vectors", "path": "v.npy", "ids": "sub/../ids.txt"},
        "r": {"kind": "ranking", "path": str(project / "sub" / "r.csv")},
        "e": {"kind": "early_fusion", "vectors": {"a": {"path": "sub/v.npy", "ids": "sub/ids.txt"}}},
    }
    built = build_sources(_spec(project, sources))
    assert built["v"].path == str(project / "v.npy") and built["v"].ids == str(project / "sub/../ids.txt")
    assert built["r"].path == str(project / "sub" / "r.csv")
    assert built["e"].vectors == {"a": {"path": str(project / "sub/v.npy"), "ids": str(project / "sub/ids.txt")}}


def test_a_bad_file_from_outside_is_not_quoted(tmp_path) -> None:
    project, elsewhere = tmp_path / "project", tmp_path / "elsewhere"
    project.mkdir()
    elsewhere.mkdir()
    secret = "s3cr3t-line"
    (elsewhere / "r.csv").write_text(f"user,item,{secret}\nu0,i1,1\n", encoding="utf-8")
    catalog = Catalog.from_ids(ITEMS)
    events = pd.DataFrame({"user": [f"u{u}" for u in range(4) for _ in range(3)], "item": [ITEMS[(u + t) % 6] for u in range(4) for t in range(3)],
                           "timestamp": np.arange(12, dtype=float)})
    dataset = Dataset(catalog, Interactions.from_frame(events, catalog=catalog), name="tiny")
    sources = {"current": {"kind": "ranking", "path": "../elsewhere/r.csv"}}
    with pytest.raises(DataError) as err:
        run_experiment(_spec(project, sources, allow_outside=True), dataset=dataset)
    message = str(err.value)
    assert message.startswith("sources.current.path: ") and "details not shown" in message and secret not in message
    # the same file inside the folder: the reader names what it found (its column names)
    (project / "r.csv").write_text((elsewhere / "r.csv").read_text(encoding="utf-8"), encoding="utf-8")
    with pytest.raises(DataError, match=secret):
        run_experiment(_spec(project, {"current": {"kind": "ranking", "path": "r.csv"}}), dataset=dataset)


def test_a_blend_file_reads_its_recorded_paths_as_written(tmp_path, capsys) -> None:
    """Export records source files as absolute paths (checked against the spec when it ran);
    loading the blend file reads them as recorded, also a file outside that was allowed."""
    from xrec.blendfile import read_blend
    from xrec.cli import main
    from xrec.runtime import runtime_for_blend_file

    project, elsewhere = tmp_path / "project", tmp_path / "elsewhere"
    project.mkdir()
    elsewhere.mkdir()
    pd.DataFrame({"item": ITEMS}).to_csv(project / "items.csv", index=False)
    events = [(f"u{u}", ITEMS[(u + t) % 6], 1_700_000_000 + 60 * (3 * u + t)) for u in range(4) for t in range(3)]
    pd.DataFrame(events, columns=["user", "item", "timestamp"]).to_csv(project / "events.csv", index=False)
    ranking = [(f"u{u}", ITEMS[(u + 4 + j) % 6], float(3 - j)) for u in range(4) for j in range(3)]
    pd.DataFrame(ranking, columns=["user", "item", "score"]).to_csv(elsewhere / "current.csv", index=False)
    spec = project / "spec.toml"
    text = """
[data]
dataset = "files"
catalog = "items.csv"
interactions = "events.csv"
allow_outside = true
[split]
rule = "leave_last"
validation = false
[evaluate]
ks = [2]
primary = "mix"
[sources]
current = { kind = "ranking", path = "../elsewhere/current.csv" }
popularity = { kind = "popularity" }
[blends]
mix = { normalizer = "rank", weights = { current = 1.0, popularity = 0.2 } }
"""
    spec.write_text(text, encoding="utf-8")
    out = tmp_path / "blend.toml"
    assert main(["export", str(spec), "--scorer", "mix", "-o", str(out), "-q"]) == 0
    capsys.readouterr()
    recorded = read_blend(out).sources["current"].params["path"]
    assert Path(recorded).is_absolute() and Path(recorded).resolve() == (elsewhere / "current.csv").resolve()
    runtime = runtime_for_blend_file(out)
    assert len(runtime.recommend("u1", k=2)) == 2
    # without the opt-out the same spec is refused before anything is fitted
    spec.write_text(text.replace("allow_outside = true\n", ""), encoding="utf-8")
    assert main(["export", str(spec), "--scorer", "mix", "-o", str(tmp_path / "refused.toml"), "-q"]) != 0
    assert "sources.current.path" in capsys.readouterr().err and not (tmp_path / "refused.toml").exists()
