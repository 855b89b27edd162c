"""Sources: popularity, collaborative models, attribute and content similarity."""

from xrec.sources.base import LowRankSource, Source, make_source, source_kinds
from xrec.sources.popularity import PopularitySource
from xrec.sources.collaborative import ALSSource, BPRSource, ItemKNNSource
from xrec.sources.attributes import AttributeSource
from xrec.sources.content import CrossModalSource, EarlyFusionSource, ImageSource, TextSource

__all__ = [
    "ALSSource",
    "AttributeSource",
    "BPRSource",
    "CrossModalSource",
    "EarlyFusionSource",
    "ImageSource",
    "ItemKNNSource",
    "LowRankSource",
    "PopularitySource",
    "TextSource",
    "Source",
    "make_source",
    "source_kinds",
]
