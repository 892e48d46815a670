"""The portable pure-JAX backend (``method="scan"``): sequential block Cholesky.

The factorisation and its solves are ``blocktri.py`` (derivations there);
this backend runs them through the common checked forward pass. It works on
every platform and is kept forever: it is the oracle every other backend is
tested against.
"""

from __future__ import annotations

from .. import blocktri
from .base import Backend, checked_solve


def forward(model, y, w):
    """(x (T, n), blocktri.BlockFactor): assemble, factor, solve, refine."""
    x, factor, _ = checked_solve(model, y, w, blocktri.factor_solve, blocktri.solve)
    return x, factor


SCAN = Backend(forward=forward, adjoint=blocktri.solve, logdet=blocktri.logdet,
               band_tangent=blocktri.selected_inverse_tangent)
