"""Shared fixtures."""
from __future__ import annotations

import pytest


@pytest.fixture(scope="session")
def dask_local_client():
    """One Dask LocalCluster (2 worker processes) for the whole session: starting one costs
    seconds, so tests that need Dask share it."""
    pytest.importorskip("distributed")
    from jointfmu.sweep import dask_client

    with dask_client(None, 2) as client:
        yield client
