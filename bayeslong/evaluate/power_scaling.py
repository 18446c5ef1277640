"""Prior and likelihood power-scaling sensitivity of a fit (Kallioinen et al. 2024).

:func:`power_scaling` measures, without refitting, how fast the posterior of each parameter
moves when the prior or the likelihood is raised to a power near 1; :func:`log_prior_draws`
gives the log prior density of each draw it needs, for continuous and categorical fits
alike (docs/comparison.md, "Lag sensitivity" and "Lag sensitivity with categorical
variables"). :func:`bayeslong.lag_sensitivity` reports it as its power-scaling axis.

References
----------
Kallioinen, N., Paananen, T., Bürkner, P.-C., & Vehtari, A. (2024). Detecting and diagnosing
prior and likelihood sensitivity with power-scaling. Statistics and Computing 34, 57.
doi:10.1007/s11222-023-10366-5
Lewandowski, D., Kurowicka, D. & Joe, H. (2009). Generating random correlation matrices
based on vines and extended onion method. Journal of Multivariate Analysis 100(9),
1989-2001.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from bayeslong.errors import SpecError
from bayeslong.evaluate.checks import check_fit
from bayeslong.infer import pooling as pool_terms
from bayeslong.infer.batch import fit_defaults, summarise_draws

#: Power-scaling sensitivity at or above this value is flagged (Kallioinen et al. 2024,
#: section 4: the threshold they use and recommend as a rule of thumb).
PSENS_THRESHOLD = 0.05


def log_prior_draws(fit) -> np.ndarray:
    """Log prior density of each posterior draw, shape (chains, draws).

    Used when ``fit.idata`` has no ``log_prior`` group. The density is that of the fit's
    own prior set, in the variables the priors are placed on: each ``value`` prior at the
    parameter, each variance's prior at its standard deviation, and each covariance
    block's LKJ(eta) correlation prior through its kernel (eta - 1) log det C
    (Lewandowski, Kurowicka & Joe 2009, eq. 16), and the pooling of the residual log-SDs
    over waves (:func:`bayeslong.infer.pooling.log_density`; part of the prior, so it is
    scaled with it). Densities come from the PyMC
    distributions of :func:`bayeslong.priors.family_dist`; constants do not matter because
    power-scaling weights are normalised.

    A categorical fit (``fit.categorical``) has the whole prior of its model: the prior set
    without the parameters the categorical model fixes (they have none), plus each
    threshold's gap prior at the gap to the threshold below it
    (:func:`bayeslong.infer.categorical.gap_log_prior_terms`, the same gaps the model is
    built from).

    Raises
    ------
    SpecError
        A prior was given as a PyMC factory (its density is not known here).
    """
    import pymc as pm

    from bayeslong.infer.priors import family_dist

    prior_set = _prior_set_of(fit)
    structure = fit.structure
    post = fit.idata.posterior
    shape = (post.sizes["chain"], post.sizes["draw"])
    theta = fit.theta_draws()  # (S, P)
    cat = getattr(fit, "categorical", None)
    pinned = cat.pinned if cat is not None else {}
    terms = []
    for i, p in enumerate(prior_set.priors):
        if structure.names[i] in pinned:  # fixed by the categorical model: no prior
            continue
        if p.family == "callable":
            raise SpecError(f"the prior of {p.parameter!r} is a PyMC factory, whose density is not "
                            "known outside the model; power-scaling needs (family, *args) priors "
                            "or a log_prior group in fit.idata")
        if p.target == "correlation":
            continue
        x = theta[:, i] if p.target == "value" else np.sqrt(np.clip(theta[:, i], 0.0, None))
        cls, kwargs = family_dist(p.family, p.args)
        terms.append(pm.logp(cls.dist(**kwargs), x))
    if cat is not None:
        from bayeslong.infer.categorical import gap_log_prior_terms

        terms += gap_log_prior_terms(cat, fit.gaps, post)
    # one graph, one compile for all terms
    total = np.asarray(pm.math.sum(pm.math.stack(terms), axis=0).eval(), dtype=float) if terms \
        else np.zeros(theta.shape[0])
    for b in prior_set.blocks:
        idx = structure.blocks[b].index
        S = theta[:, idx]  # (S, q, q) covariance of the block at each draw
        sd = np.sqrt(np.einsum("sii->si", S))
        C = S / (sd[:, :, None] * sd[:, None, :])
        total += (prior_set.lkj_eta(b) - 1.0) * np.linalg.slogdet(C)[1]
    with np.errstate(divide="ignore"):  # a variance draw of 0: -inf, as in the model
        total += pool_terms.log_density(prior_set.pooling, theta)
    return total.reshape(shape)


def _prior_set_of(fit):
    for attr in ("prior_set", "_prior_set"):
        ps = getattr(fit, attr, None)
        if ps is not None and hasattr(ps, "priors"):
            return ps
    from bayeslong.infer.priors import resolve_priors

    user = getattr(fit, "user_priors", None)
    return resolve_priors(fit.structure, fit.panel, user if isinstance(user, dict) else None)


def power_scaling(fit, *, delta: float = 0.01) -> pd.DataFrame:
    """Prior and likelihood power-scaling sensitivity of every parameter of a fit.

    Parameters
    ----------
    fit : Fit
        Needs ``idata.posterior`` (one variable per parameter) and the per-unit
        ``log_likelihood``; the log prior comes from a ``log_prior`` group when present,
        else from :func:`log_prior_draws`.
    delta : float, default 0.01
        The power is varied to 1/(1+delta) and 1+delta.

    Returns
    -------
    pandas.DataFrame
        Index: parameter. Columns ``prior`` and ``likelihood`` (the sensitivities),
        ``diagnosis``: ``prior-data conflict`` when both reach 0.05, ``strong prior / weak
        likelihood`` when only the prior does, else empty.

    Notes
    -----
    The sensitivity is the derivative, by finite differences in log2(alpha), of the
    cumulative Jensen-Shannon distance between the posterior and the posterior with the
    prior (or likelihood) raised to the power alpha, the latter approximated by Pareto
    smoothed importance weights w ∝ p^(alpha - 1) (Kallioinen et al. 2024, sections 2-3).
    Computed by :func:`arviz.psens` on the whole prior and the whole likelihood (ArviZ
    0.23's ``psens`` ignores its ``coords`` and ``component_coords`` arguments, so they
    are not used here; the tests check its numbers against a re-implementation).

    A categorical fit stores the per-unit marginal log-likelihood on at most
    ``loglik_draws`` draws, thinned evenly within each chain (``attrs["thin"]`` of its
    log-likelihood group; infer/categorical.py). Its sensitivities are computed on exactly
    those draws, the posterior restricted to them, with the whole prior of the fit: the
    structure's priors and the thresholds' gap priors (:func:`log_prior_draws`). Its rows
    are the estimated parameters and the thresholds (``categorical.names``); the number of
    draws used is ``attrs["draws"]`` of the table.
    """
    import arviz as az
    import xarray as xr

    check_fit(fit, "power_scaling", needs=("structure", "idata"))
    idata = fit.idata
    names = _estimated(fit)
    if "log_prior" in idata.groups():
        data = idata
    else:
        post = idata.posterior
        lp = xr.Dataset({"prior": (("chain", "draw"), log_prior_draws(fit))},
                        coords={"chain": post["chain"], "draw": post["draw"]})
        ll = idata.log_likelihood
        if ll.sizes["draw"] != post.sizes["draw"]:  # a categorical fit's thinned draws
            post, lp = post.sel(draw=ll["draw"].values), lp.sel(draw=ll["draw"].values)
        data = az.InferenceData(posterior=post[names], log_likelihood=ll, log_prior=lp)
    def values(result) -> list[float]:
        # one variable comes back as a DataArray, several as a Dataset
        if isinstance(result, xr.DataArray):
            return [float(result)]
        return [float(result[n]) for n in names]

    prior = values(az.psens(data, component="prior", var_names=names, delta=delta))
    like = values(az.psens(data, component="likelihood", var_names=names, delta=delta))
    table = pd.DataFrame({"prior": prior, "likelihood": like}, index=names)
    table.index.name = "parameter"
    table.attrs["draws"] = int(data.posterior.sizes["chain"] * data.posterior.sizes["draw"])
    p, lk = table["prior"] >= PSENS_THRESHOLD, table["likelihood"] >= PSENS_THRESHOLD
    table["diagnosis"] = np.where(p & lk, "prior-data conflict",
                                  np.where(p, "strong prior / weak likelihood", ""))
    return table


def _estimated(fit) -> list[str]:
    """The fit's estimated parameters in its posterior: every structure parameter, or for a
    categorical fit those it does not fix and its thresholds (``categorical.names``)."""
    cat = getattr(fit, "categorical", None)
    names = cat.names if cat is not None else fit.structure.names
    return [n for n in names if n in fit.idata.posterior]


def fit_with_power_scaling(spec, panel, *, delta: float = 0.01, **fit_kwargs) -> dict:
    """Fit, then summarise every parameter with its power-scaling sensitivities (a batch task).

    Returns ``{"summary": table, "info": info}`` as :func:`bayeslong.batch.run_task` expects:
    the posterior summary of :func:`bayeslong.batch.summarise_draws` joined with the
    ``prior``/``likelihood``/``diagnosis`` columns of :func:`power_scaling`. The fit is
    :func:`bayeslong.fit`'s, so a panel with categorical variables gets a categorical fit.
    """
    from bayeslong.infer.fitting import fit as fit_fn

    fit_defaults(fit_fn, fit_kwargs)
    return power_scaling_summary(fit_fn(spec, panel, **fit_kwargs), delta=delta)


def power_scaling_summary(fit, *, delta: float = 0.01) -> dict:
    """Posterior summary of every parameter of ``fit`` joined with its power-scaling columns."""
    table, info = summarise_draws(fit.idata, _estimated(fit))
    try:
        ps = power_scaling(fit, delta=delta)
        table = table.join(ps.rename(columns={"prior": "psens_prior",
                                              "likelihood": "psens_likelihood"}))
        if getattr(fit, "categorical", None) is not None:  # on its thinned draws only
            info["power_scaling_draws"] = ps.attrs["draws"]
    except SpecError as err:
        info["power_scaling"] = str(err)
    return {"summary": table, "info": info}
