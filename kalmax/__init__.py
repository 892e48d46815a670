"""kalmax: a differentiable linear-Gaussian state-space smoothing layer for JAX."""

from ._src.model import StateSpace as StateSpace
from ._src.smoothing import Smoothed as Smoothed
from ._src.smoothing import holdout_sums as holdout_sums
from ._src.smoothing import prediction_error as prediction_error
from ._src.smoothing import smooth as smooth
from ._src.validation import validate as validate

__version__ = "0.1.0"
