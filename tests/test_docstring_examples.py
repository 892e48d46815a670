"""The ``>>>`` examples in kalmax's docstrings run as part of the suite.

Every module of the package is searched with ``doctest.DocTestFinder``; each
docstring that holds examples becomes one test case, named after the object
it documents. The examples see ``kx`` (kalmax), ``jax``, ``jnp`` and ``np``
already imported, as a reader would have them after the usual imports. A
docstring whose examples are all marked ``# doctest: +SKIP`` is reported as
skipped rather than passed.
"""

import doctest
import importlib
import io
import pathlib

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import kalmax

OPTIONS = doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE
GLOBALS = {"kx": kalmax, "jax": jax, "jnp": jnp, "np": np}


def _modules():
    """Every Python module of the package (found by file, so folders without an __init__.py count too)."""
    root = pathlib.Path(kalmax.__file__).parent
    for path in sorted(root.rglob("*.py")):
        parts = path.relative_to(root.parent).with_suffix("").parts
        if parts[-1] == "__main__":
            continue  # only starts the command
        if parts[-1] == "__init__":
            parts = parts[:-1]
        yield importlib.import_module(".".join(parts))


def _docstring_tests():
    # The finder leaves out objects imported from another module, so each
    # docstring is found once, under the module that defines it.
    finder = doctest.DocTestFinder(exclude_empty=True)
    tests = [t for module in _modules() for t in finder.find(module, module.__name__, globs=GLOBALS)]
    return sorted((t for t in tests if t.examples), key=lambda t: t.name)


TESTS = _docstring_tests()


def _all_skipped(test):
    return all(ex.options.get(doctest.SKIP, False) for ex in test.examples)


def test_examples_were_found():
    assert len(TESTS) >= 10, [t.name for t in TESTS]


@pytest.mark.parametrize("test", TESTS, ids=[t.name for t in TESTS])
def test_docstring_example(test):
    if _all_skipped(test):
        pytest.skip("every example in this docstring is marked +SKIP")
    report = io.StringIO()
    runner = doctest.DocTestRunner(optionflags=OPTIONS, verbose=False)
    test.globs = dict(GLOBALS)  # fresh names for every run; run() clears them afterwards
    result = runner.run(test, out=report.write, clear_globs=True)
    if result.failed:
        pytest.fail(f"{result.failed} of {result.attempted} examples failed:\n{report.getvalue()}", pytrace=False)
