"""bayeslong: Bayesian estimation of longitudinal panel models that join growth and lag.

The public API, nothing else (see DESIGN section 5).
"""

import os as _os
import sys as _sys
import types as _types

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
from bayeslong.spec import Spec, catalog, model, load_model
from bayeslong.ml import MLResult, fit_ml
from bayeslong.identify import Identification, identify

_LAZY = {
    "Fit": "fit", "fit": "fit", "load_fit": "fit",
    "Prior": "priors", "PriorSet": "priors", "prior_predictive": "priors",
    "Study": "study", "StudyResults": "study", "load_study": "study", "run_study": "study",
    "ForecastScore": "compare", "compare": "compare", "explain_comparison": "compare",
    "forecast_score": "compare", "pareto_k": "compare",
    "Simulation": "simulate", "simulate": "simulate",
    "Task": "batch", "TaskResult": "batch", "BatchResult": "batch", "run_many": "batch",
    "LagSensitivity": "sensitivity", "lag_sensitivity": "sensitivity", "plan": "sensitivity",
    "power_scaling": "sensitivity",
    "build_model": "build",
    "write_report": "report",
    "ppc": "check", "replicate": "check", "trajectories": "check",
    "plot_compare": "plots", "plot_ppc": "plots", "plot_trajectories": "plots",
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


class _Package(_types.ModuleType):
    # Importing a submodule sets it as an attribute of the package; for `fit`, `compare`
    # and `simulate` that would hide the function of the same name (bl.fit would become
    # the module). Such module attributes are not stored; the function loads on first use.
    def __setattr__(self, name, value):
        if name in _LAZY and isinstance(value, _types.ModuleType):
            return
        super().__setattr__(name, value)


_sys.modules[__name__].__class__ = _Package


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
