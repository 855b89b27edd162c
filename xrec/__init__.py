"""xrec: prototype cross-modal recommenders and prove offline which blend wins.

The main names are re-exported here; each subpackage documents its own:
``xrec.data`` (catalog, interactions, loaders), ``xrec.split``, ``xrec.sources``,
``xrec.encoders``, ``xrec.blend``, ``xrec.evaluate``, ``xrec.blendfile``, ``xrec.runtime``,
``xrec.bundle`` (blend file + learned artifacts, served without refitting), ``xrec.serve``
(the HTTP service), ``xrec.explore`` (search the catalog across pictures and words), ``xrec.notebook``.
"""

from xrec.blend import Blend, CombMNZ, CombSum, ReciprocalRankFusion
from xrec.blendfile import read_blend, reseal_blend, save_blend
from xrec.bundle import Bundle, load_bundle, save_bundle
from xrec.data import Catalog, CatalogSchema, Dataset, Interactions, load_movielens, read_catalog, read_interactions
from xrec.data.demo import load_demo_shop
from xrec.errors import ConfigError, DataError, FingerprintMismatch, NotFittedError, XrecError
# The evaluate() function is not re-exported: the name is the xrec.evaluate subpackage.
from xrec.evaluate import Comparison, FullRanking, SampledNegatives, Scorecard, compare
from xrec.explore import CatalogExplorer
from xrec.fold import Fold
from xrec.runtime import BlendRuntime, load_blend
from xrec.sources import LowRankSource, Source, make_source, source_kinds
from xrec.split import SplitResult, split_dataset

__version__ = "0.1.0"

__all__ = [
    "Blend",
    "BlendRuntime",
    "Bundle",
    "Catalog",
    "CatalogExplorer",
    "CatalogSchema",
    "CombMNZ",
    "CombSum",
    "Comparison",
    "ConfigError",
    "DataError",
    "Dataset",
    "FingerprintMismatch",
    "NotFittedError",
    "Fold",
    "FullRanking",
    "Interactions",
    "LowRankSource",
    "ReciprocalRankFusion",
    "SampledNegatives",
    "Scorecard",
    "Source",
    "SplitResult",
    "XrecError",
    "compare",
    "load_blend",
    "load_bundle",
    "load_demo_shop",
    "load_movielens",
    "make_source",
    "read_blend",
    "read_catalog",
    "read_interactions",
    "reseal_blend",
    "save_blend",
    "save_bundle",
    "source_kinds",
    "split_dataset",
]


def load_ipython_extension(ipython) -> None:
    """``%load_ext xrec``: rich HTML display of scorecards and comparisons (see :mod:`xrec.notebook.display`)."""
    from xrec.notebook.display import load_ipython_extension as _load

    _load(ipython)


def unload_ipython_extension(ipython) -> None:
    """``%unload_ext xrec``: remove the display formatters again."""
    from xrec.notebook.display import unload_ipython_extension as _unload

    _unload(ipython)
