"""Maximum likelihood: trust-region Newton's method on the NumPy log-likelihood.

The ML fit gives point estimates, start values for sampling, and the reference checks
against published and library results. From each of several starts (for a multi-process
model first the processes' own single-process fits, cross terms at 0), a trust-region
Newton's method runs in plain Cholesky coordinates of the covariance blocks, with Fisher
scoring's expected information far from the maximum and the exact Hessian close to it
(:mod:`bayeslong.infer.newton`). A variance at zero is an interior point of those
coordinates, so a boundary maximum is reached like any other and checked by its
Karush-Kuhn-Tucker conditions. Nothing is compiled, so the first fit in a process costs
what the next does. Standard errors come from the observed information in the natural
parameters. A fit that does not converge says so (``converged=False``, a message naming
what happened and what to try, and a ``ConvergenceWarning``).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from bayeslong.arguments import seed_value, whole_number
from bayeslong.errors import (
    BayeslongError,
    BoundaryWarning,
    ConvergenceWarning,
    DataError,
    IdentificationError,
    SpecError,
)
from bayeslong.infer.likelihood import loglik_function, pattern_arrays
from bayeslong.infer.newton import hessian, maximise
from bayeslong.model.spec import Spec
from bayeslong.model.start import combine_processes, start_values
from bayeslong.model.structure import Structure, build_structure, structure_for
from bayeslong.model.transform import Cholesky
from bayeslong.threads import single_thread

__all__ = ["MLResult", "fit_ml", "hessian"]


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
        The best start reached a maximum: Newton decrement below 1e-8 at the exact
        Hessian, which is negative semi-definite there (in the Cholesky coordinates), and
        at a boundary the likelihood falls into the parameter space.
    boundary : tuple of str
        Variance parameters at (numerically) zero.
    message : str
        What happened, in words: which start won, whether the starts agree, and when the
        fit did not converge, why and what to try.
    starts : pandas.DataFrame
        Log-likelihood reached from each start, whether it converged, its iterations,
        Newton decrement and how it ended (to judge local optima).
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
        Most starts: for a multi-process model first the processes' own single-process
        fits (cross terms at 0), then the data-based start values, then jittered copies.
        Starting stops early once two starts reach the same best maximum (to 1e-6 in
        log-likelihood); ``MLResult.starts`` lists every start that ran.
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
        makes, or ``starts`` / ``seed`` are not whole numbers (at least 1 / 0), or the
        panel has categorical variables (maximum likelihood here is for continuous ones).

    Warns
    -----
    BoundaryWarning
        A variance sits at zero (the optimum is on the boundary; standard errors and the
        usual likelihood-ratio reference distributions do not apply there).
    ConvergenceWarning
        No start converged to a maximum; the message (also ``MLResult.message``) says what
        happened and what to try.
    """
    starts = whole_number(starts, "starts", where="fit_ml")
    seed = seed_value(seed, where="fit_ml")
    categories = getattr(panel, "categories", None)
    if categories:
        names = ", ".join(f"{k!r}" for k in categories)
        raise DataError(
            f"fit_ml: the panel declares categorical variables ({names}); maximum likelihood "
            "here treats every variable as continuous, which would read category codes as "
            "scores. Fit the model with bl.fit (latent responses with thresholds, compared by "
            "the per-unit marginal LOO), or, to treat the codes as scores on purpose, read the "
            "data again without categorical=.")
    with single_thread():
        return _fit_ml(spec, panel, starts=starts, seed=seed, check=check)


def _fit_ml(spec: Spec, panel, *, starts: int, seed: int, check: bool) -> MLResult:
    structure = structure_for(spec, panel)
    if "deviation" in structure.kinds:
        raise SpecError(
            f"model '{spec.name}' has invariance='approximate': each wave's loading and "
            "intercept is a common value plus a deviation, and only the deviations' small prior "
            "tells the two apart, so there is no maximum likelihood estimate. Fit it with "
            "bl.fit (Bayesian), or by maximum likelihood with invariance='scalar' (exact), or "
            "with release={'loading': [...], 'intercept': [...]} for indicators that differ "
            "by wave (partial invariance)")
    if check:
        _check_identified(spec, panel, structure)
    f = loglik_function(structure)
    data = pattern_arrays(panel.patterns())
    tr = Cholesky(structure)
    runs = []
    for label, theta_start in _candidates(structure, panel, tr, starts, seed):
        run = maximise(structure, f, tr.from_natural(theta_start), data, tr)
        run["start"] = label
        runs.append(run)
        # two converged starts on the best maximum settle it; more would only repeat it
        top = max(r["loglik"] for r in runs)
        if sum(r["converged"] and r["loglik"] >= top - 1e-6 for r in runs) >= 2:
            break
    best = max(runs, key=lambda r: r["loglik"])
    theta = best["theta"]
    loglik, grad = f(theta, *data)
    loglik = float(loglik)
    names = list(structure.names)
    boundary = _boundary(structure, theta, panel)
    kkt = _kkt_violations(structure, theta, grad, panel) if boundary else []
    converged = bool(best["converged"] and np.isfinite(loglik) and not kkt)
    message = _message(best, runs, boundary, kkt, converged)
    if boundary:
        warnings.warn(
            f"model '{spec.name}': the optimum is on the boundary, {', '.join(boundary)} "
            "estimated at zero (or a covariance block is singular). Standard errors for these "
            "are not valid; consider a model without that variance, or more data.",
            BoundaryWarning, stacklevel=4)
    if not converged:
        warnings.warn(f"model '{spec.name}' by maximum likelihood: {message}",
                      ConvergenceWarning, stacklevel=4)
    # a converged run ends on the exact Hessian (central differences) of this very point
    H = best["hessian"] if best["hessian"] is not None else hessian(f, theta, data)
    se = _standard_errors(H)
    starts_table = pd.DataFrame({"start": [r["start"] for r in runs],
                                 "loglik": [r["loglik"] for r in runs],
                                 "converged": [r["converged"] for r in runs],
                                 "iterations": [r["iterations"] for r in runs],
                                 "decrement": [r["decrement"] for r in runs],
                                 "ended": [r["reason"] for r in runs]})
    return MLResult(spec=spec, loglik=loglik, params=pd.Series(theta, index=names, name="estimate"),
                    se=pd.Series(se, index=names, name="se"), n_params=len(names),
                    n_units=panel.n_units, converged=converged, boundary=tuple(boundary),
                    message=message, starts=starts_table)


def _candidates(structure: Structure, panel, tr: Cholesky, starts: int, seed: int):
    """Yield ``(label, theta)`` start points, best first, at most ``starts`` of them.

    Lazily: a later start is built (the nested fits cost a little) only when needed.
    """
    base = start_values(structure, panel)
    made = 0
    if structure.spec.processes > 1:
        nested = _nested_start(structure, panel, base)
        if nested is not None:
            made += 1
            yield "nested single-process fits", nested
    if made < starts:
        made += 1
        yield "data-based", base
    rng = np.random.default_rng(seed)
    u0 = tr.from_natural(base)
    lag_slots = [i for i, k in enumerate(structure.kinds) if k == "lag"]
    diag = np.array([s for _, rows, cols, slots in tr.blocks for s in slots[rows == cols]], dtype=int)
    while made < starts:
        made += 1
        u = u0 + rng.normal(0.0, 0.3, size=u0.shape) * np.maximum(np.abs(u0), 0.1)
        u[lag_slots] = rng.uniform(-0.2, 0.8, size=len(lag_slots))
        u[diag] = np.abs(u[diag])  # the factor's column signs are free: keep pivots positive
        yield f"jittered {made - 1 - (structure.spec.processes > 1)}", tr.to_natural(u)


def _nested_start(structure: Structure, panel, base: np.ndarray):
    """Start values from each process's single-process fit (None when one is not available).

    Each outcome is fitted alone by the same model with ``processes = 1``; see
    :func:`bayeslong.model.start.combine_processes` for how the joint start is built.
    """
    try:
        single = structure.spec.replace(processes=1)
    except BayeslongError:
        return None
    fits = {}
    for k, name in enumerate(structure.outcomes):
        y = panel.y[:, :, k:k + 1]
        keep = ~np.isnan(y).all(axis=(1, 2))
        try:
            sub = type(panel)(units=tuple(u for u, kk in zip(panel.units, keep) if kk),
                              waves=panel.waves, outcomes=(name,),
                              time_varying=panel.time_varying,
                              time_invariant=panel.time_invariant,
                              y=y[keep], x=panel.x[keep], z=panel.z[keep])
            s1 = build_structure(single, outcomes=[name], n_waves=structure.n_waves,
                                 time_varying=panel.time_varying,
                                 time_invariant=panel.time_invariant)
            tr1 = Cholesky(s1)
        except (BayeslongError, NotImplementedError):
            return None
        run = maximise(s1, loglik_function(s1), tr1.from_natural(start_values(s1, sub)),
                       pattern_arrays(sub.patterns()), tr1)
        if not np.isfinite(run["loglik"]):
            return None
        fits[name] = dict(zip(s1.names, run["theta"]))
    return combine_processes(structure, fits, base)


def _message(best, runs, boundary, kkt, converged) -> str:
    """What happened, in words: which start won, whether the starts agree, what to try."""
    ended = [r for r in runs if np.isfinite(r["loglik"])]
    same = sum(r["loglik"] >= best["loglik"] - 1e-6 for r in ended)
    lower = [r for r in ended if r["loglik"] < best["loglik"] - 1e-6]
    if converged:
        text = (f"converged from the {best['start']} start in {best['iterations']} iterations "
                f"(Newton decrement {best['decrement']:.1e}); {same} of {len(runs)} start(s) "
                "reached this maximum")
        if lower:
            gap = best["loglik"] - min(r["loglik"] for r in lower)
            text += (f"; {len(lower)} ended up to {gap:.4g} log-likelihood units lower "
                     "(local maxima or stalls)")
        if boundary:
            text += ("; boundary optimum: " + ", ".join(boundary) + " at zero, with the "
                     "likelihood falling into the parameter space there (a genuine boundary "
                     "maximum, not a stall)")
        return text
    if kkt:
        return ("not converged: " + ", ".join(boundary) + " stopped at zero although the "
                "likelihood rises into the parameter space there (" + "; ".join(kkt) + "). "
                "Try more starts (starts=10) or a simpler model.")
    return (f"not converged: {best['reason']} (best of {len(runs)} start(s), the "
            f"{best['start']} one, after {best['iterations']} iterations; Newton decrement "
            f"{best['decrement']:.2g}). Try more starts (starts=10), a simpler model (fewer "
            "free variances or covariances, e.g. residuals='equal'), or dropping a variance "
            "that heads to zero" + (f" ({', '.join(boundary)})" if boundary else "") + ".")


def _kkt_violations(structure: Structure, theta, grad, panel) -> list[str]:
    """Boundary blocks where the likelihood still rises into the positive semi-definite cone.

    At a maximum on the boundary of {S : S positive semi-definite}, the derivative of the
    log-likelihood towards S + e v v' must be <= 0 for every null vector v of S, i.e. the
    gradient G = dl/dS is negative semi-definite on the null space (the Karush-Kuhn-Tucker
    conditions for a semi-definite constraint; Vandenberghe, L. & Boyd, S. 1996,
    Semidefinite programming, SIAM Review 38(1), 49-95).
    """
    out = []
    scale = float(np.nanvar(panel.y))
    for b in structure.blocks:
        S = b.matrix(theta)  # fixed zeros of a block stay zero
        q = len(S)
        w, v = np.linalg.eigh(S)
        null = v[:, w < 1e-7 * max(scale, 1e-300)]
        if null.shape[1] == 0:
            continue
        G = np.where(b.index >= 0, grad[b.index], 0.0) * np.where(np.eye(q, dtype=bool), 1.0, 0.5)
        rise = float(np.linalg.eigvalsh(null.T @ G @ null).max())
        # on the scale of the data: a rise below 1e-6 per unit over the variance is rounding
        if rise > 1e-6 * panel.n_units / max(scale, 1e-300):
            out.append(f"derivative {rise:.3g} into the block of {structure.names[b.index[0, 0]]}")
    return out


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


def _standard_errors(H: np.ndarray) -> np.ndarray:
    """Square roots of the diagonal of the inverse observed information (NaN where singular)."""
    try:
        cov = np.linalg.inv(-H)
    except np.linalg.LinAlgError:
        return np.full(len(H), np.nan)
    d = np.diag(cov)
    return np.sqrt(np.where(d > 0, d, np.nan))
