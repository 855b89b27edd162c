"""xrec: prototype cross-modal recommenders and prove offline which blend wins."""

from xrec.data import Catalog, CatalogSchema, Dataset, Interactions
from xrec.errors import ConfigError, DataError, FingerprintMismatch, XrecError
from xrec.fold import Fold
from xrec.sources import LowRankSource, Source, make_source, source_kinds

__version__ = "0.1.0"

__all__ = [
    "Catalog",
    "CatalogSchema",
    "ConfigError",
    "DataError",
    "Dataset",
    "FingerprintMismatch",
    "Fold",
    "Interactions",
    "LowRankSource",
    "Source",
    "XrecError",
    "make_source",
    "source_kinds",
]


def load_ipython_extension(ipython) -> None:
    """``%load_ext xrec``: rich HTML display of scorecards and comparisons (see :mod:`xrec.notebook.display`)."""
    from xrec.notebook.display import load_ipython_extension as _load

    _load(ipython)


def unload_ipython_extension(ipython) -> None:
    """``%unload_ext xrec``: remove the display formatters again."""
    from xrec.notebook.display import unload_ipython_extension as _unload

    _unload(ipython)
