"""Shared fixtures for the core-engine tests."""

from __future__ import annotations

import os
import zlib

import numpy as np
import pytest
import rollscan
from hypothesis import HealthCheck, settings

# Debug builds on two shared cores are slow and uneven: no per-example deadline.
settings.register_profile(
    "rollscan",
    deadline=None,
    max_examples=60,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile("thorough", parent=settings.get_profile("rollscan"), max_examples=500)
# HYPOTHESIS_PROFILE=thorough for a longer local hunt
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "rollscan"))


@pytest.fixture
def rng(request):
    """A generator seeded from the test's name: reproducible, distinct per test."""
    seed = zlib.crc32(request.node.nodeid.encode())
    return np.random.default_rng(seed)


@pytest.fixture
def restore_threads():
    """Put the pool size back after a test that changes it."""
    before = rollscan.get_num_threads()
    yield before
    rollscan.set_num_threads(before)


@pytest.fixture(scope="session")
def client():
    """One local Dask cluster of 2 worker processes for every Dask test (started once)."""
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
    )
    cl = distributed.Client(cluster, set_as_default=False)
    yield cl
    cl.close()
    cluster.close()
