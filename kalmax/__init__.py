"""kalmax: a differentiable linear-Gaussian state-space smoothing layer for JAX."""

from ._src.likelihood import log_likelihood as log_likelihood
from ._src.model import StateSpace as StateSpace
from ._src.noise import DiagonalNoise as DiagonalNoise
from ._src.noise import ScalarNoise as ScalarNoise
from ._src.smoothing import Smoothed as Smoothed
from ._src.smoothing import holdout_sums as holdout_sums
from ._src.smoothing import prediction_error as prediction_error
from ._src.smoothing import smooth as smooth
from ._src.validation import condition_estimate as condition_estimate
from ._src.validation import validate as validate
from ._src.exporting import kernel_export_checks as kernel_export_checks

# Filtering, forecasting and posterior sampling.
from ._src.filtering import Filtered as Filtered
from ._src.filtering import filter_states as filter_states
from ._src.forecasting import Forecast as Forecast
from ._src.forecasting import forecast as forecast
from ._src.sampling import sample_states as sample_states

# Learning layer: held-out splits, parameterisations, proximal steps, fitting, EM.
from ._src.em import em as em
from ._src.checkpoint import FitState as FitState
from ._src.checkpoint import load_fit_state as load_fit_state
from ._src.checkpoint import save_fit_state as save_fit_state
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

# Continuous-time models on irregular timestamps, and the model file of the `kalmax` command.
from ._src.continuous import ContinuousModel as ContinuousModel
from ._src.continuous import constant_acceleration as constant_acceleration
from ._src.continuous import constant_velocity as constant_velocity
from ._src.continuous import damped_oscillator as damped_oscillator
from ._src.continuous import discretize as discretize
from ._src.continuous import local_linear_trend as local_linear_trend
from ._src.continuous import random_walk as random_walk
from ._src.tools.errors import ModelFileError as ModelFileError
from ._src.tools.model_file import load_model as load_model
from ._src.tools.model_file import save_model as save_model
from ._src.tools.spec import ModelSpec as ModelSpec

# Composed models: a sum of components (level, trend, seasonal, cycle, oscillator, regression).
from ._src.components import Component as Component
from ._src.components import ComposedModel as ComposedModel
from ._src.components import compose_components as compose_components
from ._src.components import cycle_component as cycle_component
from ._src.components import level_component as level_component
from ._src.components import oscillator_component as oscillator_component
from ._src.components import regression_component as regression_component
from ._src.components import seasonal_component as seasonal_component
from ._src.components import trend_component as trend_component

# Scale: data-parallel helpers over a device mesh (the solver backends are in _src/backends).
from ._src.sharding import DataParallelLoss as DataParallelLoss
from ._src.sharding import batch_mesh as batch_mesh
from ._src.sharding import data_parallel as data_parallel
from ._src.sharding import pad_batch as pad_batch
from ._src.sharding import pad_to_mesh as pad_to_mesh
from ._src.sharding import replicate as replicate
from ._src.sharding import shard_batch as shard_batch

# Nonlinear and robust models: iterated smoothing with implicit gradients.
from ._src.laplace import laplace_log_likelihood as laplace_log_likelihood
from ._src.nonlinear import NonlinearSmoothed as NonlinearSmoothed
from ._src.nonlinear import smooth_nonlinear as smooth_nonlinear
from ._src.nonlinear_model import NonlinearModel as NonlinearModel
from ._src.nonlinear_model import linearize as linearize
from ._src.robust import HuberLoss as HuberLoss
from ._src.robust import SquaredLoss as SquaredLoss
from ._src.robust import StudentTLoss as StudentTLoss

from ._src.version import __version__ as __version__
