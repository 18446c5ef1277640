"""Latent scores: the posterior of each unit's latent eta[k,t] given its observed data.

Given the parameters theta, a unit's latents and outcomes are jointly normal given its
covariates w (:func:`bayeslong.moments.latent_moments`), so eta given y is normal with

    E[eta | y, w]   = mu_eta + Cov(eta, y) Sigma_y^-1 (y - mu_y)
    Cov[eta | y, w] = Phi - Cov(eta, y) Sigma_y^-1 Cov(y, eta)

over the unit's observed entries of y (:func:`bayeslong.check.conditional_normal`). At a
fixed theta the mean is the regression factor score (Thomson 1936; Bartholomew & Knott
1999, section 3.7). Across posterior draws theta_s the latent's posterior is the mixture of
these normals: one eta is drawn from each draw's conditional, which carries the
uncertainty of the parameters into the scores as well as that of the unit's own latent.

References
----------
Thomson, G. H. (1936). The Factorial Analysis of Human Ability. University of London Press.
Bartholomew, D. J. & Knott, M. (1999). Latent Variable Models and Factor Analysis, 2nd ed.,
section 3.7. Arnold.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from bayeslong.errors import DataError
from bayeslong.evaluate.checks import (
    check_fit,
    conditional_normal,
    latent_joint,
    observed_owners,
    select_draws,
    unit_positions,
)
from bayeslong.model.moments import moment_draws


def _check_level(interval) -> float:
    if isinstance(interval, bool) or not isinstance(interval, (int, float)) or not 0 < interval < 1:
        raise DataError(f"`interval` of latent_scores must be a number between 0 and 1, e.g. 0.9 "
                        f"for the central 90% interval; got {interval!r}.")
    return float(interval)


def _conditional_latents(fit, positions, draws: int, seed):
    """Conditional means and covariances of every selected unit's etas, per draw.

    Units are grouped by their pattern of observed entries: one solve per pattern and draw.
    Returns ``mean`` (S, n, E), ``cov`` (S, n, E, E) and the generator (for the draws).
    """
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 2:
        raise DataError(f"`draws` in latent_scores must be an integer of at least 2; got {draws!r}.")
    rng = np.random.default_rng(seed)
    panel = fit.panel
    mom = moment_draws(fit.structure, select_draws(fit, int(draws), rng))
    ys = panel.outcome_matrix()[positions]
    mean, cov = latent_joint(fit.structure, mom, panel.covariate_matrix()[positions])
    Y = ys.shape[1]
    E = mean.shape[-1] - Y
    S, n = mean.shape[0], len(positions)
    out_mean, out_cov = np.empty((S, n, E)), np.empty((S, n, E, E))
    seen = ~np.isnan(ys)
    patterns, which = np.unique(seen, axis=0, return_inverse=True)
    for p, pattern in enumerate(patterns):
        rows = np.flatnonzero(which.ravel() == p)
        keep = np.r_[np.ones(E, bool), pattern]
        given = np.r_[np.zeros(E, bool), pattern[pattern]]
        m, c = conditional_normal(mean[:, rows][:, :, keep], cov[:, None][:, :, keep][:, :, :, keep],
                                  given, ys[rows][:, pattern][None])
        out_mean[:, rows] = m
        out_cov[:, rows] = c
    return out_mean, out_cov, rng


def latent_draws(fit, units=None, *, draws: int = 200, seed=0) -> np.ndarray:
    """Draw each unit's latent trajectory from its posterior, one draw per parameter draw.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit`.
    units : label or sequence of labels, optional
        Unit labels (as in ``panel.units``); every unit by default.
    draws : int, default 200
        Posterior draws of theta used (all if the fit has fewer).
    seed : int or numpy.random.Generator

    Returns
    -------
    numpy.ndarray, shape (S, n, K, T)
        eta[k,t] of each selected unit (in the order asked), process k and wave t.

    Notes
    -----
    eta_s = m_s + R_s z with R_s R_s' = Cov[eta | y, theta_s] (symmetric square root, so a
    conditional variance of zero, as for a process observed without error, is no problem).
    """
    check_fit(fit, "latent_draws")
    positions = _all_units(fit.panel, units)
    mean, cov, rng = _conditional_latents(fit, positions, draws, seed)
    eta = _draw(mean, cov, rng)
    K, T = len(fit.panel.outcomes), fit.panel.n_waves
    return eta.reshape(eta.shape[0], len(positions), K, T)


def _draw(mean, cov, rng) -> np.ndarray:
    """One draw from each N(mean, cov), by the symmetric square root of cov (see latent_draws)."""
    values, vectors = np.linalg.eigh(cov)
    root = vectors * np.sqrt(np.clip(values, 0.0, None))[..., None, :]
    return mean + np.einsum("snab,snb->sna", root, rng.standard_normal(mean.shape))


def _all_units(panel, units):
    return list(range(panel.n_units)) if units is None else unit_positions(panel, units)


def latent_scores(fit, units=None, *, draws: int = 200, interval: float = 0.9, seed=0) -> pd.DataFrame:
    """Posterior summary of each unit's latent eta[k,t]: a tidy table.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit`.
    units : label or sequence of labels, optional
        Unit labels; every unit by default.
    draws : int, default 200
        Posterior draws of theta used.
    interval : float, default 0.9
        Probability of the central interval (``lower``, ``upper``).
    seed : int

    Returns
    -------
    pandas.DataFrame
        One row per unit, process and wave: ``unit``, ``process``, ``wave``, ``mean``
        (the average over draws of the conditional mean E[eta | y, theta_s]: the posterior
        mean without the noise of the draws), ``sd`` (posterior SD: the average conditional
        variance plus the variance of the conditional means over draws), ``lower`` and
        ``upper`` (quantiles of the drawn etas) and ``n_observed`` (the unit's observed
        indicator values at that wave and process).

    Notes
    -----
    See the module notes. At a single theta the ``mean`` is the regression factor score
    E[eta | y] = mu_eta + Cov(eta, y) Sigma_y^-1 (y - mu_y) of Thomson (1936). A unit
    missing at a wave still gets a score there: it is predicted from its other waves, and
    its interval is wider.
    """
    check_fit(fit, "latent_scores")
    level = _check_level(interval)
    panel = fit.panel
    positions = _all_units(panel, units)
    mean, cov, rng = _conditional_latents(fit, positions, draws, seed)
    eta = _draw(mean, cov, rng)
    var = np.diagonal(cov, axis1=-2, axis2=-1).mean(axis=0) + mean.var(axis=0)
    lower, upper = np.quantile(eta, [(1 - level) / 2, (1 + level) / 2], axis=0)
    K, T = len(panel.outcomes), panel.n_waves
    seen = ~np.isnan(panel.y[positions])  # (n, T, J)
    counts = {p: np.zeros((len(positions), T), int) for p in panel.outcomes}
    for j, (process, _) in enumerate(observed_owners(panel)):
        counts[process] += seen[:, :, j]
    rows = []
    for a, pos in enumerate(positions):
        for k, process in enumerate(panel.outcomes):
            for t, wave in enumerate(panel.waves):
                e = k * T + t
                rows.append({"unit": panel.units[pos], "process": process, "wave": wave,
                             "mean": float(mean[:, a, e].mean()), "sd": float(np.sqrt(var[a, e])),
                             "lower": float(lower[a, e]), "upper": float(upper[a, e]),
                             "n_observed": int(counts[process][a, t])})
    table = pd.DataFrame(rows)
    table["wave"] = pd.Series([r["wave"] for r in rows], dtype=object)
    table.attrs.update({"model": fit.spec.name, "interval": level,
                        "draws": int(min(draws, len(fit.theta_draws()))),
                        "processes": K})
    return table
