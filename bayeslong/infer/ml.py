"""Maximum likelihood: Fisher scoring (and SciPy's L-BFGS-B) on the NumPy log-likelihood.

The ML fit gives point estimates, start values for sampling, and the reference checks
against published and library results. From each of several starts, Fisher scoring
(expected information from the exact moment Jacobian, steps halved to keep covariance
blocks positive definite) runs first; where it stalls, L-BFGS-B in an unconstrained space
(log-Cholesky covariance blocks) takes its place. Nothing is compiled, so the first fit in
a process costs what the next does. Standard errors come from the observed information in
the natural parameters.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import optimize

from bayeslong.arguments import seed_value, whole_number
from bayeslong.errors import BoundaryWarning, IdentificationError
from bayeslong.infer.likelihood import (
    loglik_function,
    loglik_grad_information,
    pattern_arrays,
)
from bayeslong.model.spec import Spec
from bayeslong.model.start import start_values
from bayeslong.model.structure import Structure, structure_for
from bayeslong.model.transform import Unconstrained
from bayeslong.threads import single_thread


@dataclass(frozen=True, kw_only=True, eq=False)
class MLResult:
    """Result of :func:`fit_ml`.

    Attributes
    ----------
    spec : Spec
    loglik : float
        Maximised log-likelihood (conditional on the covariates).
    params : pandas.Series
        Estimates, indexed by parameter name.
    se : pandas.Series
        Standard errors from the inverse observed information (NaN where it is singular).
    n_params, n_units : int
    aic, bic : float
        -2 loglik + 2 n_params; -2 loglik + n_params log(n_units).
    converged : bool
    boundary : tuple of str
        Variance parameters at (numerically) zero.
    starts : pandas.DataFrame
        Log-likelihood reached from each start (to judge local optima).
    """

    spec: Spec
    loglik: float
    params: pd.Series
    se: pd.Series
    n_params: int
    n_units: int
    converged: bool
    boundary: tuple = ()
    message: str = ""
    starts: pd.DataFrame = field(default_factory=pd.DataFrame)

    @property
    def aic(self) -> float:
        return -2.0 * self.loglik + 2.0 * self.n_params

    @property
    def bic(self) -> float:
        return -2.0 * self.loglik + self.n_params * np.log(self.n_units)

    def summary(self) -> pd.DataFrame:
        """Estimates with standard errors and z values."""
        return pd.DataFrame({"estimate": self.params, "se": self.se, "z": self.params / self.se})

    def __repr__(self) -> str:
        return (f"MLResult({self.spec}, loglik={self.loglik:.6f}, n_params={self.n_params}, "
                f"aic={self.aic:.3f}, bic={self.bic:.3f}, converged={self.converged})")


def _check_identified(spec, panel, structure):
    from bayeslong.model.identification import identify

    result = identify(spec, panel)
    if not result.identified:
        raise IdentificationError(
            f"model '{spec.name}' is not identified on this panel: the parameters "
            + ", ".join(result.deficient)
            + " cannot be told apart by the implied means and covariances. "
            + result.advice
        )


def fit_ml(spec: Spec, panel, *, starts: int = 4, seed: int = 0, check: bool = True) -> MLResult:
    """Fit ``spec`` to ``panel`` by maximum likelihood.

    Parameters
    ----------
    spec : Spec
    panel : Panel
    starts : int, default 4
        Most starts: the data-based start values plus up to ``starts - 1`` jittered ones.
        Starting stops early once two starts reach the same best maximum (to 1e-9
        relative); ``MLResult.starts`` lists every start that ran.
    seed : int
        Seed of the jitter.
    check : bool, default True
        Check local identification first (:func:`bayeslong.identify`).

    Returns
    -------
    MLResult

    Raises
    ------
    IdentificationError
        The model is not locally identified; the message names the parameters.
    SpecError, DataError
        ``spec`` or ``panel`` is not what :func:`bayeslong.model` or ``Panel.from_long``
        makes, or ``starts`` / ``seed`` are not whole numbers (at least 1 / 0).

    Warns
    -----
    BoundaryWarning
        A variance sits at zero (the optimum is on the boundary; standard errors and the
        usual likelihood-ratio reference distributions do not apply there).
    """
    starts = whole_number(starts, "starts", where="fit_ml")
    seed = seed_value(seed, where="fit_ml")
    with single_thread():
        return _fit_ml(spec, panel, starts=starts, seed=seed, check=check)


def _fit_ml(spec: Spec, panel, *, starts: int, seed: int, check: bool) -> MLResult:
    structure = structure_for(spec, panel)
    if check:
        _check_identified(spec, panel, structure)
    f = loglik_function(structure)
    data = pattern_arrays(panel.patterns())
    n = float(panel.n_units)
    tr = Unconstrained(structure)

    def objective(u):
        theta = tr.to_natural(u)
        try:
            ll, g = f(theta, *data)
        except (np.linalg.LinAlgError, ValueError):
            return np.inf, np.zeros_like(u)
        if not np.isfinite(ll):
            return np.inf, np.zeros_like(u)
        return -ll / n, -tr.grad_to_u(u, g) / n

    rng = np.random.default_rng(seed)
    u0 = tr.from_natural(start_values(structure, panel))
    lag_slots = [i for i, k in enumerate(structure.kinds) if k == "lag"]
    candidates = [u0]
    for s in range(1, starts):
        u = u0 + rng.normal(0.0, 0.3, size=u0.shape) * np.maximum(np.abs(u0), 0.1)
        u[lag_slots] = rng.uniform(-0.2, 0.8, size=len(lag_slots))
        candidates.append(u)
    runs = []
    for u in candidates:
        # Fisher scoring first: a handful of cheap iterations from a sensible start. Far
        # from the optimum its expected information can be a poor guide (measured: a
        # cross-lagged model on gapminder crawled for 100 iterations); then L-BFGS in the
        # unconstrained space runs from the same start, and the better end point counts.
        theta, ll, ok = _scoring(structure, tr.to_natural(u), data)
        method = "scoring"
        if not ok:
            res = optimize.minimize(objective, u, jac=True, method="L-BFGS-B",
                                    options={"maxiter": 20000, "maxfun": 40000, "ftol": 1e-14,
                                             "gtol": 1e-9, "maxcor": 30})
            if np.isfinite(res.fun) and -res.fun * n >= (ll if np.isfinite(ll) else -np.inf):
                theta, ll, ok = tr.to_natural(res.x), -res.fun * n, bool(res.success)
                method = "L-BFGS-B (scoring stalled)"
        runs.append({"theta": theta, "loglik": ll, "converged": ok, "method": method})
        # two starts that agree on the best maximum settle it; the rest would only repeat it
        found = sorted((-r["loglik"] for r in runs if np.isfinite(r["loglik"])))
        if len(found) >= 2 and abs(found[1] - found[0]) <= 1e-9 * max(1.0, abs(found[0])):
            break
    best = max(runs, key=lambda r: r["loglik"] if np.isfinite(r["loglik"]) else -np.inf)
    theta, hessian = _newton_polish(f, best["theta"], data, structure)
    loglik, grad = f(theta, *data)
    loglik = float(loglik)
    # the same criterion whichever optimiser finished: a small gradient per unit in the
    # unconstrained space
    converged = bool(np.isfinite(loglik)
                     and np.max(np.abs(tr.grad_to_u(tr.from_natural(theta), grad))) / n < 1e-3)
    names = list(structure.names)
    boundary = _boundary(structure, theta, panel)
    if boundary:
        warnings.warn(
            f"model '{spec.name}': the optimum is on the boundary, {', '.join(boundary)} "
            "estimated at zero (or a covariance block is singular). Standard errors for these "
            "are not valid; consider a model without that variance, or more data.",
            BoundaryWarning, stacklevel=4)
    se = _standard_errors(hessian)
    starts_table = pd.DataFrame({"start": range(len(runs)),
                                 "loglik": [r["loglik"] for r in runs],
                                 "converged": [r["converged"] for r in runs],
                                 "method": [r["method"] for r in runs]})
    return MLResult(spec=spec, loglik=loglik, params=pd.Series(theta, index=names, name="estimate"),
                    se=pd.Series(se, index=names, name="se"), n_params=len(names),
                    n_units=panel.n_units, converged=converged, boundary=tuple(boundary),
                    message=f"best start: {best['method']}", starts=starts_table)


def _scoring(structure: Structure, theta: np.ndarray, data, max_iter: int = 30):
    """Fisher scoring with step halving, in the natural parameters.

    theta <- theta + t I(theta)^-1 g(theta), with I the expected information
    (:func:`bayeslong.likelihood.expected_information`) and t halved until the step stays
    admissible (positive definite covariance blocks) and does not lower the
    log-likelihood. Converged when the predicted gain g' I^-1 g falls below 1e-10.
    Returns ``(theta, loglik, converged)``; a stalled run returns where it stopped, for
    a quasi-Newton optimiser to continue.

    Reference: Lee, S.-Y. & Jennrich, R. I. (1979). A study of algorithms for covariance
    structure analysis with specific comparisons using factor analysis. Psychometrika
    44(1), 99-113.
    """
    def evaluate(th):
        if not _admissible(structure, th):
            return -np.inf, None, None
        with np.errstate(all="ignore"):
            return loglik_grad_information(structure, th, *data)

    ll, g, info = evaluate(theta)
    if g is None:
        return theta, -np.inf, False
    for _ in range(max_iter):
        try:
            step = np.linalg.solve(info, g)
        except np.linalg.LinAlgError:
            return theta, ll, False
        gain = float(g @ step)
        if not np.isfinite(gain) or gain < 0:
            return theta, ll, False
        if gain < 1e-10:
            return theta, ll, True
        t = 1.0
        while True:
            ll_new, g_new, info_new = evaluate(theta + t * step)
            if g_new is not None and ll_new >= ll - 1e-12 * abs(ll):
                break
            t *= 0.5
            if t < 1e-8:
                return theta, ll, False
        theta, ll, g, info = theta + t * step, ll_new, g_new, info_new
    return theta, ll, False


def _boundary(structure: Structure, theta: np.ndarray, panel) -> list[str]:
    scale = float(np.nanvar(panel.y))
    out = []
    for b in structure.blocks:
        S = b.matrix(theta)
        for r in range(len(S)):
            # conditional variance of the block's r-th variable given the others before it
            sub = S[: r + 1, : r + 1]
            w = np.linalg.eigvalsh(sub)
            if w.min() < 1e-7 * scale:
                out.append(structure.names[b.index[r, r]])
                break
    return out


def hessian(f, theta, data, grad=None) -> np.ndarray:
    """Hessian of the log-likelihood by differences of the analytic gradient.

    Central differences by default; given the gradient at ``theta``, forward differences
    (half the evaluations; relative error about 1e-5, ample for standard errors, which
    match statsmodels' analytic ones to 1e-5 on sleepstudy, see tests/test_ml.py).
    """
    p = len(theta)
    H = np.zeros((p, p))
    for i in range(p):
        h = 1e-5 * max(abs(theta[i]), 1e-2)
        e = np.zeros(p)
        e[i] = h
        if grad is None:
            H[:, i] = (f(theta + e, *data)[1] - f(theta - e, *data)[1]) / (2 * h)
        else:
            H[:, i] = (f(theta + e, *data)[1] - grad) / h
    return 0.5 * (H + H.T)


def _admissible(structure: Structure, theta: np.ndarray) -> bool:
    return all(np.linalg.eigvalsh(b.matrix(theta)).min() > 0 for b in structure.blocks)


def _newton_polish(f, theta, data, structure, steps: int = 6):
    """A few Newton steps in the natural parameters from the quasi-Newton optimum.

    Quasi-Newton stops at a gradient tolerance; near a regular interior maximum Newton
    steps gain the last digits that reference checks need. The steps reuse the Hessian of
    the starting point (each step still contracts the error by a large factor so close to
    the optimum); the Hessian is taken afresh at the final point for the standard errors
    unless the steps moved the estimates by less than 1e-7 (relative).
    A step is kept only when it raises the log-likelihood and stays admissible.
    """
    start = theta
    ll, g = f(theta, *data)
    H = hessian(f, theta, data, grad=g)
    for _ in range(steps):
        try:
            step = np.linalg.solve(H, g)
        except np.linalg.LinAlgError:
            break
        new = theta - step
        if not _admissible(structure, new):
            break
        ll_new, g_new = f(new, *data)
        if not np.isfinite(ll_new) or ll_new < ll - 1e-10:
            break
        theta, ll, g = new, ll_new, g_new
        if np.max(np.abs(step)) < 1e-12 * max(1.0, np.max(np.abs(theta))):
            break
    # a Hessian taken a hair away serves the standard errors as well as a new one
    if np.max(np.abs(theta - start)) > 1e-7 * max(1.0, np.max(np.abs(theta))):
        H = hessian(f, theta, data, grad=g)
    return theta, H


def _standard_errors(H: np.ndarray) -> np.ndarray:
    """Square roots of the diagonal of the inverse observed information (NaN where singular)."""
    try:
        cov = np.linalg.inv(-H)
    except np.linalg.LinAlgError:
        return np.full(len(H), np.nan)
    d = np.diag(cov)
    return np.sqrt(np.where(d > 0, d, np.nan))
