"""Fixtures shared by test modules (the root conftest.py holds the session settings)."""

from __future__ import annotations

import pytest


@pytest.fixture(scope="session")
def dask_client():
    """One 2-process Dask LocalCluster for every test that asks for it (it starts in a few seconds)."""
    pytest.importorskip("distributed")
    from xrec.cluster import open_client

    with open_client(workers=2) as client:
        yield client
