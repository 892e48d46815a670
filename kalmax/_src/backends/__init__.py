"""Solver backends of the smoothing primitive, and the one place that registers them.

One file per backend (``scan.py``, ``cpu.py``, ``cyclic_reduction.py``,
``recompute.py``, ``covariance_form.py``); ``base.py`` says what a backend is and holds the checked
forward pass they share; ``registry.py`` is the table, and imports none of
them. To add a backend: write its file, then register it below.
"""

from . import registry
from .covariance_form import COVARIANCE
from .cpu import CPU, LOAD_ERROR
from .cyclic_reduction import PARALLEL
from .recompute import RECOMPUTE
from .scan import SCAN
from .base import Unavailable

registry.register("scan", SCAN)
registry.register("parallel", PARALLEL)
registry.register("scan-recompute", RECOMPUTE)
# Not a solver of the normal equations: the textbook filter, for models beyond them.
registry.register("covariance", COVARIANCE)
# The compiled kernel only where its library loaded; otherwise the reason is kept.
registry.register("cpu", CPU if LOAD_ERROR is None else Unavailable(LOAD_ERROR))
