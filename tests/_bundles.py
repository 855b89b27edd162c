"""A small dataset and bundle with every kind of filterable column, shared by the bundle, filter and service tests.

Test inputs only, never references for the checks.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from xrec.blend import Blend
from xrec.bundle import save_bundle
from xrec.data.catalog import Catalog
from xrec.data.dataset import Dataset
from xrec.data.interactions import Interactions
from xrec.sources import make_source
from xrec.split import split_dataset

COLOURS = ["red", "blue", "green", "black"]
TAGS = ["a", "b", "c", "d", "e"]


def small_dataset(n_items: int = 60, n_users: int = 50, seed: int = 0) -> Dataset:
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "item": [f"i{j:02d}" for j in range(n_items)],
        "colour": rng.choice(COLOURS, n_items),
        "tags": ["|".join(rng.choice(TAGS, rng.integers(0, 4), replace=False)) for _ in range(n_items)],
        "price": np.round(rng.uniform(1, 100, n_items), 2),
    })
    catalog = Catalog.from_frame(frame, categorical=["colour"], multilabel=["tags"], numeric=["price"])
    rows = [(f"u{u}", f"i{j:02d}", float(t)) for u in range(n_users) for t, j in enumerate(rng.choice(n_items, rng.integers(3, 10), replace=False))]
    inter = Interactions.from_frame(pd.DataFrame(rows, columns=["user", "item", "timestamp"]), catalog=catalog)
    return Dataset(catalog, inter, name="small")


def small_bundle(dataset: Dataset, path: Path, *, als_weight: float = 1.0, evidence: dict | None = None) -> Path:
    """Write a popularity + ALS + item-kNN blend of ``dataset`` (leave-last split) as a bundle at ``path``."""
    split = split_dataset(dataset, "leave_last", seed=0)
    sources = {
        "pop": make_source("popularity").fit(split.test),
        "als": make_source("als", factors=4, iterations=3).fit(split.test),
        "knn": make_source("item_knn", neighbors=10).fit(split.test),
    }
    blend = Blend(sources, {"pop": 0.3, "als": als_weight, "knn": 0.5}).fit(split.test)
    return save_bundle(path, blend, dataset=dataset, split_settings=split.settings, fold="test", evidence=evidence)
