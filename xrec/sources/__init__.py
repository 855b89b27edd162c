"""Sources: popularity, collaborative models, attribute and content similarity, your vectors and ranking."""

from xrec.sources.base import LowRankSource, Source, make_source, source_kinds
from xrec.sources.popularity import PopularitySource
from xrec.sources.collaborative import ALSSource, BPRSource, ItemKNNSource
from xrec.sources.attributes import AttributeSource
from xrec.sources.content import ImageSource, TextSource
from xrec.sources.cross_modal import CrossModalSource
from xrec.sources.early_fusion import EarlyFusionSource
from xrec.sources.mapped import MappedFactorsSource
from xrec.sources.ranking import RankingSource
from xrec.sources.vectors import VectorSource

__all__ = [
    "ALSSource",
    "AttributeSource",
    "BPRSource",
    "CrossModalSource",
    "EarlyFusionSource",
    "ImageSource",
    "ItemKNNSource",
    "LowRankSource",
    "MappedFactorsSource",
    "PopularitySource",
    "RankingSource",
    "TextSource",
    "VectorSource",
    "Source",
    "make_source",
    "source_kinds",
]
