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

# --- functions -------------------------------------------------------------------------
from bayeslong.spec import catalog, model, load_model
from bayeslong.ml import fit_ml
from bayeslong.identify import identify

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
    # functions
    "catalog",
    "model",
    "load_model",
    "fit_ml",
    "identify",
    # errors
    "BayeslongError",
    "BoundaryWarning",
    "ConvergenceWarning",
    "DataError",
    "IdentificationError",
    "SpecError",
]
