"""Catalog, interactions and dataset loaders."""

from xrec.data.catalog import Catalog, CatalogSchema
from xrec.data.dataset import Dataset
from xrec.data.interactions import Interactions
from xrec.data.movielens import load_movielens

__all__ = ["Catalog", "CatalogSchema", "Dataset", "Interactions", "load_movielens"]
