"""Fixtures shared by several test modules."""

from __future__ import annotations

import pytest


@pytest.fixture(scope="module")
def ray_session():
    """One local Ray instance with 2 CPUs per test module that uses it; its workers do not
    share the test's sys.path."""
    ray = pytest.importorskip("ray")
    ray.init(num_cpus=2, include_dashboard=False)
    yield ray
    ray.shutdown()
