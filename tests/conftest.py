"""Test configuration: hypothesis profiles and sparse invariant checks.

Profiles: "ci" (default; derandomized, no database, no deadline) and "long" (random, more
examples). Choose with HYPOTHESIS_PROFILE=long.
"""

import os

import pytest
import torch
from hypothesis import HealthCheck, settings

settings.register_profile(
    "ci", derandomize=True, database=None, deadline=None, max_examples=30,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
settings.register_profile(
    "long", deadline=None, max_examples=500,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))

# The test graphs are tiny: one thread is faster than two for them, and it keeps the suite's
# time steady when other processes share the machine (measured here: a 2-thread product on a
# tiny graph could take milliseconds under load against microseconds on one thread).
torch.set_num_threads(1)


@pytest.fixture(autouse=True)
def _single_thread():
    """Keep every test single-threaded, even after a test changed the setting."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.fixture(autouse=True)
def _sparse_invariants():
    """Turn on torch's sparse invariant checks for every test (PyTorch sparse docs)."""
    with torch.sparse.check_sparse_tensor_invariants():
        yield
