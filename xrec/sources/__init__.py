"""Sources: popularity, collaborative models, attribute and content similarity."""

from xrec.sources.base import LowRankSource, Source, make_source, source_kinds

__all__ = ["LowRankSource", "Source", "make_source", "source_kinds"]
