"""Catalog, interactions and dataset loaders."""

from xrec.data.catalog import Catalog, CatalogSchema
from xrec.data.dataset import Dataset
from xrec.data.interactions import Interactions

__all__ = ["Catalog", "CatalogSchema", "Dataset", "Interactions"]
