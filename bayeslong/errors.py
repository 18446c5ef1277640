"""Exceptions and warnings raised by bayeslong.

Every class is also a built-in exception, so ``except ValueError`` keeps working
in user code (as scikit-learn's ``InvalidParameterError(ValueError, TypeError)``).
"""


class BayeslongError(Exception):
    """Base class of every error bayeslong raises on purpose."""


class DataError(BayeslongError, ValueError):
    """The panel data cannot be used as given (names the column, row, unit or wave)."""


class SpecError(BayeslongError, ValueError):
    """A model description, option or prior is not valid (lists the valid choices)."""


class IdentificationError(BayeslongError, ValueError):
    """The model is not locally identified on this panel (names the parameters)."""


class ConvergenceWarning(UserWarning):
    """A fit did not converge by the stated criterion (names the parameter and threshold)."""


class BoundaryWarning(UserWarning):
    """A maximum-likelihood optimum sits on the boundary of the parameter space."""
