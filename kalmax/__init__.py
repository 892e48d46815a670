"""kalmax: a differentiable linear-Gaussian state-space smoothing layer for JAX."""

from ._src.likelihood import log_likelihood as log_likelihood
from ._src.model import StateSpace as StateSpace
from ._src.smoothing import Smoothed as Smoothed
from ._src.smoothing import holdout_sums as holdout_sums
from ._src.smoothing import prediction_error as prediction_error
from ._src.smoothing import smooth as smooth
from ._src.validation import validate as validate

# Learning layer: held-out splits, parameterisations, proximal steps, fitting, EM.
from ._src.em import em as em
from ._src.fitting import FitResult as FitResult
from ._src.fitting import FitStep as FitStep
from ._src.fitting import fit as fit
from ._src.fitting import parameter_covariance as parameter_covariance
from ._src.fitting import standard_errors as standard_errors
from ._src.params import Bounded as Bounded
from ._src.params import CholeskyCov as CholeskyCov
from ._src.params import DiagonalCov as DiagonalCov
from ._src.params import FreeEntries as FreeEntries
from ._src.params import Identity as Identity
from ._src.params import LogScale as LogScale
from ._src.params import Parameterization as Parameterization
from ._src.params import Positive as Positive
from ._src.prox import project_box as project_box
from ._src.prox import project_fixed as project_fixed
from ._src.prox import prox_l1 as prox_l1
from ._src.prox import prox_nuclear as prox_nuclear
from ._src.prox import prox_ridge as prox_ridge
from ._src.splits import batch_prediction_error as batch_prediction_error
from ._src.splits import holdout_blocks as holdout_blocks
from ._src.splits import holdout_entries as holdout_entries
from ._src.splits import holdout_folds as holdout_folds
from ._src.splits import pad_series as pad_series

__version__ = "0.1.0"
