"""Shared test fixtures.

x64 is switched on for the whole suite: the reference comparisons are made in
float64. Float32 tests pass explicit float32 arrays, and kalmax keeps the
dtype of its inputs.
"""

import os
import sys
import zlib

import jax
import numpy as np
import pytest

jax.config.update("jax_enable_x64", True)
sys.path.insert(0, os.path.dirname(__file__))


@pytest.fixture
def rng(request):
    """A seeded NumPy generator; the seed is printed so a failure can be replayed."""
    # crc32, not hash(): str hashes are salted per process.
    seed = int(os.environ.get("KALMAX_TEST_SEED", "0")) + zlib.crc32(request.node.name.encode()) % 10_000
    print(f"[seed] {request.node.name}: {seed}")
    return np.random.default_rng(seed)
