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


@pytest.fixture(autouse=True, scope="module")
def _release_compiled_code():
    """Drop JAX's compiled executables after each test module.

    Every executable keeps a few memory mappings of generated code, and the
    suite compiles thousands of them in one process: without this the count
    passes Linux's default limit of 65,530 mappings per process
    (vm.max_map_count) and the next compilation crashes (measured: 48,000
    mappings after 450 of ~600 tests, then a segmentation fault inside XLA's
    compiler). Modules share almost no jitted functions, so nothing useful
    is lost.
    """
    yield
    jax.clear_caches()
    import gc

    gc.collect()


@pytest.fixture
def temporary_backend():
    """``temporary_backend(name, backend)`` registers a solver backend for this test only.

    Registered backends are global: one added at import time by a test file
    would change what other files' backend-parametrised tests collect. This
    removes (or restores) the entry when the test ends.
    """
    import contextlib

    from kalmax._src.backends import registry

    with contextlib.ExitStack() as stack:
        yield lambda name, backend: stack.enter_context(registry.temporary(name, backend))
