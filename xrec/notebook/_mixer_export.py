"""Writing the weight mixer's blend: path checks that speak of the path the user typed, and
the ``[dataset.load]`` hints that let ``xrec recommend`` find the data again."""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from xrec.errors import ConfigError


def checked_path(typed: str | os.PathLike, *, bundle: bool) -> Path:
    """The file (or bundle folder) to write for the text ``typed``, its parent folders created.

    Raises :class:`ConfigError` naming ``typed`` when it is empty, names a folder (a blend
    file needs a file name), or its folder cannot be created.
    """
    text = os.fspath(typed)
    shown = repr(text)
    if not text.strip():
        raise ConfigError("blend file: type a file path, e.g. blend.toml")
    path = Path(text).expanduser()
    if bundle:
        path = path.with_suffix("") if path.suffix == ".toml" else path
        if path.exists() and not path.is_dir():
            raise ConfigError(f"blend file: {shown} names an existing file; a bundle is a folder (type a new name)")
    elif text.endswith(("/", os.sep)) or path.is_dir():
        raise ConfigError(f"blend file: {shown} is a folder; type a file name inside it, e.g. {str(path / 'blend.toml')!r}")
    parent = path.parent
    if not parent.is_dir():
        try:
            parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise ConfigError(f"blend file: cannot create the folder for {shown}: {exc.strerror or exc}") from None
    return path


def data_hints(dataset: Any, location: Any) -> dict[str, Any] | None:
    """The ``[dataset.load]`` table for the blend file, or ``None`` when nothing says where the data lives.

    ``location`` is a :class:`~xrec.data.location.DataLocation`, a ``[data]``-style mapping
    (relative paths read from the working folder) or ``None``; with ``None``, the demo shop
    (:func:`xrec.data.demo.load_demo_shop`) is recognised by name and its folder recorded.
    """
    from xrec.data.location import DataLocation

    if location is None:
        root = getattr(getattr(dataset, "catalog", None), "image_root", None)
        if getattr(dataset, "name", None) == "demo_shop" and root is not None:
            return {"dataset": "demo_shop", "folder": str(Path(root).resolve())}
        return None
    if isinstance(location, Mapping):
        location = DataLocation.from_table(location, Path.cwd(), where="data_location")
    if not isinstance(location, DataLocation):
        raise ConfigError(f"data_location must be a DataLocation, a [data]-style table or None, got {type(location).__name__}")
    return location.to_hints()


def written_or_error(write: Any, path: Path, typed: str) -> Path:
    """Run ``write(path)``; an OS error is reported with the path the user typed (not a temporary file's name)."""
    try:
        return write(path)
    except IsADirectoryError:
        raise ConfigError(f"blend file: {typed!r} is a folder; type a file name inside it") from None
    except OSError as exc:
        raise ConfigError(f"blend file: cannot write {typed!r}: {exc.strerror or exc}") from None


def write_blend(
    blend: Any, dataset: Any, split_settings: Mapping[str, Any], typed: str, *, bundle: bool, evidence: Mapping[str, Any], hints: Mapping[str, Any] | None
) -> Path:
    """Write ``blend`` as a blend file (or a bundle folder) at the path the user ``typed``."""
    from xrec.blendfile import save_blend
    from xrec.bundle import save_bundle

    target = checked_path(typed, bundle=bundle)
    save = save_bundle if bundle else save_blend
    return written_or_error(
        lambda p: save(p, blend, dataset=dataset, split_settings=split_settings, evidence=dict(evidence), dataset_load=hints), target, typed
    )


def baseline_record(name: str, pinned_weights: Mapping[str, float] | None, pinned_normalizer: str | None) -> dict[str, Any]:
    """Evidence keys naming the baseline: its name, or a pinned blend's normalizer and weights spelled out."""
    if pinned_weights is None:
        return {"baseline": name}
    spelled = ", ".join(f"{n} {float(v):.2f}" for n, v in pinned_weights.items())
    return {"baseline": f"pinned blend ({pinned_normalizer}: {spelled})", "baseline_weights": dict(pinned_weights), "baseline_normalizer": pinned_normalizer}
