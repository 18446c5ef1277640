"""bayeslong: Bayesian estimation of longitudinal panel models that join growth and lag.

The public API, nothing else (docs/architecture.md).
"""

import os as _os

# PyTensor looks for a BLAS to link its C code against and warns when a pip install has
# none; the matrices here are small, so NumPy's C-API fallback serves. Saying so up front
# keeps that warning from being the first thing a user reads. A user's own setting wins.
if "blas__ldflags" not in _os.environ.get("PYTENSOR_FLAGS", ""):
    _os.environ["PYTENSOR_FLAGS"] = ",".join(
        f for f in (_os.environ.get("PYTENSOR_FLAGS", ""), "blas__ldflags=") if f)

# The data, model and maximum-likelihood side is imported at once; it needs NumPy, pandas
# and SciPy only. Everything that needs PyMC or ArviZ (several seconds to import) loads on
# first use, so `bayeslong models`, `check-data`, `identify` and `fit_ml` start quickly.
from bayeslong.data import Panel, Patterns
from bayeslong.infer.ml import MLResult, fit_ml
from bayeslong.model.identification import Identification, identify
from bayeslong.model.spec import Spec, catalog, load_model, model

_LAZY = {
    "Fit": "infer.sampling", "fit": "infer.fitting", "load_fit": "infer.fitting",
    "CategoricalFit": "infer.categorical",
    "Prior": "infer.priors", "PriorSet": "infer.priors", "prior_predictive": "infer.priors",
    "build_model": "infer.pymc_model",
    "Task": "infer.batch", "TaskResult": "infer.batch", "BatchResult": "infer.batch",
    "run_many": "infer.batch",
    "Simulation": "model.simulation", "simulate": "model.simulation",
    "compare_invariance": "infer.invariance",
    "ForecastScore": "evaluate.comparison", "compare": "evaluate.comparison",
    "explain_comparison": "evaluate.comparison", "forecast_score": "evaluate.comparison",
    "pareto_k": "evaluate.comparison",
    "LagSensitivity": "evaluate.sensitivity", "lag_sensitivity": "evaluate.sensitivity",
    "power_scaling": "evaluate.power_scaling", "plan": "evaluate.planning",
    "ppc": "evaluate.checks", "replicate": "evaluate.checks", "trajectories": "evaluate.checks",
    "plot_compare": "evaluate.plots", "plot_ppc": "evaluate.plots",
    "plot_trajectories": "evaluate.plots", "plot_latent_scores": "evaluate.plots",
    "latent_scores": "evaluate.scores", "latent_draws": "evaluate.scores",
    "category_ppc": "evaluate.category_checks", "plot_category_shares": "evaluate.plots",
    "Study": "workflow.study_file", "load_study": "workflow.study_file",
    "StudyResults": "workflow.results", "run_study": "workflow.runner",
    "write_report": "workflow.report",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f"bayeslong.{_LAZY[name]}"), name)
        globals()[name] = value  # later look-ups skip this hook
        return value
    raise AttributeError(f"module 'bayeslong' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


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
    "compare_invariance",
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
    "latent_scores",
    "latent_draws",
    "category_ppc",
    "plot_category_shares",
    "plot_compare",
    "plot_ppc",
    "plot_trajectories",
    "plot_latent_scores",
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
