"""Load the demo shop: an invented shop of stickers, enamel pins and embroidered patches.

The files live in ``demo_shop/`` at the repository root and are made by
``demo_shop/generate_catalog.py`` and ``demo_shop/simulate_shoppers.py``.
Hidden facts planted in the data (which colourway, theme, price band or
community drove each purchase) are kept under ``demo_shop/truth/`` and are
never part of the catalog; :func:`demo_shop_truth` returns them so a report can
say what each signal should have found.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

import xrec
from xrec.data.catalog import Catalog
from xrec.data.dataset import Dataset
from xrec.data.interactions import Interactions
from xrec.errors import DataError

CATALOG_FILE = "catalog.csv"
INTERACTIONS_FILE = "interactions.csv"
TRUTH_FOLDER = "truth"

CATEGORICAL = ("product_type", "theme_group", "size")
NUMERIC = ("price",)
TEXT = ("name", "description")
IMAGE = "image"


def _find_folder(folder: str | Path | None) -> Path:
    if folder is not None:
        path = Path(folder)
        if not path.is_dir():
            raise DataError(f"demo shop folder {str(path)!r} does not exist")
        return path
    candidates = [Path(xrec.__file__).resolve().parents[1] / "demo_shop", Path.cwd() / "demo_shop"]
    for path in candidates:
        if (path / CATALOG_FILE).is_file():
            return path
    raise DataError(
        "demo shop folder not found; looked in "
        + ", ".join(repr(str(p)) for p in candidates)
        + ". Pass folder=... or rebuild it with demo_shop/generate_catalog.py and demo_shop/simulate_shoppers.py"
    )


def _need(path: Path) -> Path:
    if not path.is_file():
        raise DataError(f"demo shop file {str(path)!r} is missing; rebuild with the scripts in demo_shop/ (see its README.md)")
    return path


def load_demo_shop(folder: str | Path | None = None, *, check_images: bool = True) -> Dataset:
    """The demo shop as a :class:`~xrec.data.Dataset`.

    Parameters
    ----------
    folder
        The demo shop folder; by default ``demo_shop/`` at the repository root,
        else ``demo_shop/`` under the working directory.
    check_images
        Verify that every image file exists (about a thousand small files).

    Returns
    -------
    Dataset
        Catalog with categorical ``product_type``, ``theme_group``, ``size``; numeric
        ``price``; text ``name``, ``description``; image column ``image`` relative to
        ``folder``. Interactions are purchases (weight 1) with Unix-second timestamps.

    Raises
    ------
    DataError
        When the folder or one of its files is missing or malformed.
    """
    root = _find_folder(folder).resolve()
    frame = pd.read_csv(_need(root / CATALOG_FILE), dtype={"item_id": str, "price": "float64"}, keep_default_na=False)
    catalog = Catalog.from_frame(
        frame,
        item_col="item_id",
        categorical=CATEGORICAL,
        numeric=NUMERIC,
        text=TEXT,
        image=IMAGE,
        image_root=root,
        check_images=check_images,
    )
    purchases = pd.read_csv(_need(root / INTERACTIONS_FILE), dtype={"shopper_id": str, "item_id": str})
    interactions = Interactions.from_frame(
        purchases, user_col="shopper_id", item_col="item_id", time_col="timestamp", catalog=catalog
    )
    return Dataset(catalog=catalog, interactions=interactions, name="demo_shop")


def demo_shop_truth(folder: str | Path | None = None) -> dict:
    """The hidden facts behind the demo shop, for explaining results (never for fitting).

    Returns
    -------
    dict
        ``"items"``: per item colourway, tone, theme (emoji subgroup), price band,
        product type, size and emoji; ``"shoppers"``: each shopper's taste kinds,
        mixture weights and targets; ``"purchases"``: the taste kind behind each
        purchase (``look`` = image, ``theme`` = text, ``spec`` = attributes,
        ``circle`` = community, ``noise``); ``"params"``: the simulation settings,
        community item sets, item release timestamps and observed shares; ``"catalog_params"``: the catalog
        generator's settings.

    Raises
    ------
    DataError
        When the folder or a truth file is missing.
    """
    truth = _find_folder(folder).resolve() / TRUTH_FOLDER
    return {
        "items": pd.read_csv(_need(truth / "items_latent.csv"), dtype={"item_id": str}, keep_default_na=False),
        "shoppers": pd.read_csv(_need(truth / "shoppers_latent.csv"), dtype=str, keep_default_na=False),
        "purchases": pd.read_csv(_need(truth / "purchases_latent.csv"), dtype=str),
        "params": json.loads(_need(truth / "shopper_params.json").read_text(encoding="utf-8")),
        "catalog_params": json.loads(_need(truth / "catalog_params.json").read_text(encoding="utf-8")),
    }
