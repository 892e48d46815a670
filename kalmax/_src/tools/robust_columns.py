"""``--robust COL=KIND:VALUE``: robust measurement losses on chosen columns of the command line.

The smoother then minimises the robust objective of ``nonlinear_model.py``
(``kx.smooth_nonlinear`` with the linear :class:`StateSpace` of the model
file), with a Huber or Student-t loss on the whitened residuals of the named
columns. One loss object serves all columns: its parameter is a (p,) vector
broadcast against the residual's last axis (``robust.py`` evaluates ρ and the
IRLS weights entrywise). Columns not named get ``UNROBUST``: Huber with a
threshold no whitened residual reaches is exactly the squared loss; a
Student-t with ν = ``UNROBUST`` differs from it by a relative z²/ν ≈ 10⁻¹³
for any realistic residual. Hence one kind per run: a Student-t column and a
Huber column cannot be mixed in one loss.

The residual of column i is whitened by the measurement noise; the CLI's
models have a diagonal R, so z_i is column i's residual in units of its noise
standard deviation, and VALUE is read in those units (Huber threshold) or is
the degrees of freedom (Student-t).

Uncertainty: the interval columns come from the covariance of the
iteratively reweighted linear problem at the robust solution (its fixed
point), an approximation: it treats the IRLS weights as known.
"""

from __future__ import annotations

import math
from typing import NamedTuple, Optional, Sequence, Tuple

import numpy as np

from .errors import UsageError

KINDS = {"huber": "threshold in noise standard deviations, > 0 (e.g. 2.5)",
         "student": "degrees of freedom, > 0 (e.g. 4)"}
UNROBUST = 1e13  # the parameter of the columns not named (module docstring)


class RobustColumns(NamedTuple):
    kind: str  # "huber" or "student"
    values: Tuple[Tuple[str, float], ...]  # (column, parameter) in the order given

    def loss(self, columns: Sequence[str], dtype=np.float64):
        """The loss for the model's measurement columns (``columns``, in model order)."""
        from .. import robust

        given = dict(self.values)
        param = np.array([given.get(c, UNROBUST) for c in columns], dtype)
        return robust.HuberLoss(param) if self.kind == "huber" else robust.StudentTLoss(param)

    def describe(self) -> str:
        return ", ".join(f"{c} ({self.kind} {v:g})" for c, v in self.values)


def parse(texts: Optional[Sequence[str]], columns: Optional[Sequence[str]]) -> Optional[RobustColumns]:
    """``--robust`` values → :class:`RobustColumns` (None without the option); errors name --robust.

    ``columns``: the model's measurement columns; None checks the syntax only
    (``kalmax fit`` before the model is known).
    """
    if not texts:
        return None
    kind, values = None, []
    for text in texts:
        col, eq, rest = text.partition("=")
        name, colon, value = rest.partition(":")
        name = name.strip().lower()
        if not eq or not colon or not col:
            raise UsageError(f"--robust {text}: expected COL=KIND:VALUE, e.g. --robust COL=huber:2.5 "
                             f"(kinds: {', '.join(KINDS)}).")
        if name not in KINDS:
            raise UsageError(f"--robust {text}: unknown loss {name!r}; use one of: "
                             + "; ".join(f"{k} ({v})" for k, v in KINDS.items()) + ".")
        if columns is not None and col not in columns:
            raise UsageError(f"--robust {text}: {col!r} is not a measured column of the model "
                             f"({', '.join(columns)}).")
        try:
            v = float(value)
        except ValueError:
            raise UsageError(f"--robust {text}: {value!r} is not a number ({name}: {KINDS[name]}).") from None
        if not (v > 0 and math.isfinite(v)):
            raise UsageError(f"--robust {text}: the {name} parameter must be a finite number > 0; got {value}.")
        if kind is not None and name != kind:
            raise UsageError(f"--robust {text}: one loss kind per run, and an earlier --robust uses {kind} "
                             "(a Huber and a Student-t column cannot share one smoother).")
        if col in dict(values):
            raise UsageError(f"--robust {text}: column {col!r} is given twice.")
        kind = name
        values.append((col, v))
    return RobustColumns(kind, tuple(values))
