"""Catalog, interactions and dataset loaders.

Your own files: :func:`read_catalog` and :func:`read_interactions` (CSV or Parquet, by
extension); a spec's ``[data]`` table: :class:`DataLocation` and :func:`load_dataset`.
"""

from xrec.data.catalog import Catalog, CatalogSchema
from xrec.data.dataset import Dataset
from xrec.data.files import read_catalog, read_interactions
from xrec.data.interactions import Interactions
from xrec.data.location import DataLocation, load_dataset
from xrec.data.movielens import load_movielens

__all__ = [
    "Catalog",
    "CatalogSchema",
    "DataLocation",
    "Dataset",
    "Interactions",
    "load_dataset",
    "load_movielens",
    "read_catalog",
    "read_interactions",
]
