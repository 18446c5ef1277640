"""bayeslong: Bayesian estimation of longitudinal panel models that join growth and lag.

The public API, nothing else (see DESIGN section 5).
"""

import os as _os

# PyTensor looks for a BLAS to link its C code against and warns when a pip install has
# none; the matrices here are small, so NumPy's C-API fallback serves. Saying so up front
# keeps that warning from being the first thing a user reads. A user's own setting wins.
if "blas__ldflags" not in _os.environ.get("PYTENSOR_FLAGS", ""):
    _os.environ["PYTENSOR_FLAGS"] = ",".join(
        f for f in (_os.environ.get("PYTENSOR_FLAGS", ""), "blas__ldflags=") if f)

# --- classes ---------------------------------------------------------------------------
from bayeslong.data import Panel, Patterns
from bayeslong.spec import Spec
from bayeslong.ml import MLResult
from bayeslong.identify import Identification
from bayeslong.fit import Fit
from bayeslong.priors import Prior, PriorSet
from bayeslong.study import Study, StudyResults
from bayeslong.compare import ForecastScore
from bayeslong.simulate import Simulation
from bayeslong.batch import Task, TaskResult, BatchResult
from bayeslong.sensitivity import LagSensitivity

# --- functions -------------------------------------------------------------------------
from bayeslong.spec import catalog, model, load_model
from bayeslong.ml import fit_ml
from bayeslong.identify import identify
from bayeslong.fit import fit, load_fit
from bayeslong.build import build_model
from bayeslong.priors import prior_predictive
from bayeslong.study import load_study, run_study
from bayeslong.report import write_report
from bayeslong.compare import compare, explain_comparison, forecast_score, pareto_k
from bayeslong.check import ppc, replicate, trajectories
from bayeslong.plots import plot_compare, plot_ppc, plot_trajectories
from bayeslong.simulate import simulate
from bayeslong.batch import run_many
from bayeslong.sensitivity import lag_sensitivity, plan, power_scaling

# --- errors ----------------------------------------------------------------------------
from bayeslong.errors import (
    BayeslongError,
    BoundaryWarning,
    ConvergenceWarning,
    DataError,
    IdentificationError,
    SpecError,
)

__version__ = "0.1.0"

__all__ = [
    # classes
    "Panel",
    "Patterns",
    "Spec",
    "MLResult",
    "Identification",
    "Fit",
    "Prior",
    "PriorSet",
    "Study",
    "StudyResults",
    "ForecastScore",
    "Simulation",
    "Task",
    "TaskResult",
    "BatchResult",
    "LagSensitivity",
    # functions
    "catalog",
    "model",
    "load_model",
    "fit_ml",
    "identify",
    "fit",
    "load_fit",
    "build_model",
    "prior_predictive",
    "load_study",
    "run_study",
    "write_report",
    "compare",
    "explain_comparison",
    "forecast_score",
    "pareto_k",
    "ppc",
    "replicate",
    "trajectories",
    "plot_compare",
    "plot_ppc",
    "plot_trajectories",
    "simulate",
    "run_many",
    "lag_sensitivity",
    "plan",
    "power_scaling",
    # errors
    "BayeslongError",
    "BoundaryWarning",
    "ConvergenceWarning",
    "DataError",
    "IdentificationError",
    "SpecError",
]
