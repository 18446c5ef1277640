"""Posterior predictive trajectory checks: replicated panels, statistics, p-values, unit bands.

A fitted model implies, at every posterior draw theta_s, the distribution of each unit's
outcomes given its covariates, y_i | w_i ~ N(c_s + D_s w_i, Sigma_s)
(:func:`bayeslong.moments.implied_moments`). Replicated panels are drawn from it, one per
selected draw, with the data's covariates and the data's missing entries, and summary
statistics of the replicates are set against the same statistics of the data
(Gelman, Meng & Stern 1996; Gabry et al. 2019).

Individual trajectories use Gaussian conditioning on the same moments: the outcome band of a
unit at wave t is the distribution of y_t given the unit's observed entries at the other
waves; the latent band is the distribution of the latent eta_t given all the unit's observed
entries, from the joint of (eta, y) (:func:`bayeslong.moments.latent_moments`).

References
----------
Gelman, A., Meng, X.-L., & Stern, H. (1996). Posterior predictive assessment of model fitness
via realized discrepancies. Statistica Sinica 6(4), 733-760.
Gabry, J., Simpson, D., Vehtari, A., Betancourt, M., & Gelman, A. (2019). Visualization in
Bayesian workflow. JRSS A 182(2), 389-402. doi:10.1111/rssa.12378
Rasmussen, C. E., & Williams, C. K. I. (2006). Gaussian Processes for Machine Learning,
appendix A.2, eq. A.6. MIT Press (the conditional normal).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from bayeslong.errors import DataError
from bayeslong.model.moments import moment_draws, unit_means

#: Statistics computed by :func:`ppc`, in table order.
STATISTICS = ("mean", "sd", "lag1_cor", "rising")

#: Quantiles reported for replicated statistics and unit bands (the 50% and 90% central bands).
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)


# --------------------------------------------------------------------------------------------
# Gaussian conditioning
# --------------------------------------------------------------------------------------------


def conditional_normal(mean, cov, given, values):
    """Mean and covariance of the other entries of a normal vector given some of its entries.

    Parameters
    ----------
    mean : array_like, shape (..., J)
    cov : array_like, shape (..., J, J)
    given : array_like of bool, shape (J,)
        Entries conditioned on (b); the others (a) are returned.
    values : array_like, shape (..., n_given)
        Values of the given entries, in their order.

    Returns
    -------
    mean_a : numpy.ndarray, shape (..., J - n_given)
    cov_a : numpy.ndarray, shape (..., J - n_given, J - n_given)

    Notes
    -----
    For x = (x_a, x_b) ~ N(mu, S) (Rasmussen & Williams 2006, eq. A.6):

        x_a | x_b ~ N(mu_a + S_ab S_bb^-1 (x_b - mu_b),  S_aa - S_ab S_bb^-1 S_ba)

    Leading axes broadcast (draws, units). With nothing given the marginal is returned.
    """
    mean = np.asarray(mean, dtype=float)
    cov = np.asarray(cov, dtype=float)
    given = np.asarray(given, dtype=bool)
    rest = ~given
    mu_a, mu_b = mean[..., rest], mean[..., given]
    s_aa = cov[..., rest, :][..., :, rest]
    if not given.any():
        return mu_a, s_aa
    s_ab = cov[..., rest, :][..., :, given]
    s_bb = cov[..., given, :][..., :, given]
    # K' = S_bb^-1 S_ba, one solve per leading index
    gain_t = np.linalg.solve(s_bb, np.swapaxes(s_ab, -1, -2))
    resid = np.asarray(values, dtype=float) - mu_b
    mean_a = mu_a + np.einsum("...ba,...b->...a", gain_t, resid)
    cov_a = s_aa - s_ab @ gain_t
    return mean_a, 0.5 * (cov_a + np.swapaxes(cov_a, -1, -2))


# --------------------------------------------------------------------------------------------
# access to a fit
# --------------------------------------------------------------------------------------------


_FIT_PARTS = ("spec", "panel", "structure", "idata", "theta_draws")


def check_fit(fit, where: str, needs: tuple = _FIT_PARTS) -> None:
    """Raise a DataError naming ``where`` unless ``fit`` has what a fit of bl.fit has."""
    missing = [a for a in needs if not hasattr(fit, a)]
    if missing:
        raise DataError(
            f"{where} needs a fit made by bl.fit (with .spec, .panel, .structure, .idata and "
            f".theta_draws()); got a {type(fit).__name__} without {', '.join(missing)}."
        )


def observed_owners(panel) -> list[tuple]:
    """``(process, observed variable)`` for each column of ``panel.y``, in its order."""
    return [(process, name) for process, group in panel.indicators.items() for name in group]


def _check_draws(draws, where: str) -> int:
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 2:
        raise DataError(f"`draws` in {where} must be an integer of at least 2; got {draws!r}.")
    return int(draws)


def select_draws(fit, draws: int, seed) -> np.ndarray:
    """Rows of ``fit.theta_draws()``: ``draws`` of them at random without replacement (all if fewer)."""
    thetas = np.asarray(fit.theta_draws(), dtype=float)
    if draws >= len(thetas):
        return thetas
    rng = np.random.default_rng(seed)
    return thetas[np.sort(rng.choice(len(thetas), size=draws, replace=False))]


# --------------------------------------------------------------------------------------------
# replicated panels and their statistics
# --------------------------------------------------------------------------------------------


def replicate(fit, *, draws: int = 200, seed=0) -> np.ndarray:
    """Draw replicated panels from the posterior predictive distribution.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit`.
    draws : int, default 200
        Number of posterior draws used, one replicated panel each (all draws if the fit has
        fewer).
    seed : int or numpy.random.Generator
        Seed of the draw selection and the replicated noise.

    Returns
    -------
    numpy.ndarray, shape (S, N, T, J)
        Replicated outcomes in the layout of ``panel.y`` (J observed variables: the
        processes, or the indicators of processes measured by several); NaN exactly where
        the data are missing; the data's covariates.

    Notes
    -----
    y_rep[s, i] = c_s + D_s w_i + L_s z_si with L_s L_s' = Sigma_s and z_si ~ N(0, I),
    all draws and units in one batched computation.
    """
    check_fit(fit, "replicate")
    draws = _check_draws(draws, "replicate")
    rng = np.random.default_rng(seed)
    panel = fit.panel
    thetas = select_draws(fit, draws, rng)
    mom = moment_draws(fit.structure, thetas)
    mean = unit_means(mom, panel.covariate_matrix())  # (S, N, Y)
    chol = np.linalg.cholesky(mom["Sigma"])  # (S, Y, Y)
    noise = rng.standard_normal(mean.shape)
    y = mean + np.einsum("syz,snz->sny", chol, noise)
    y = np.where(np.isnan(panel.outcome_matrix())[None], np.nan, y)
    S, N = y.shape[:2]
    J, T = len(panel.observed_names), panel.n_waves
    return y.reshape(S, N, J, T).transpose(0, 1, 3, 2)


def panel_statistics(y: np.ndarray) -> dict[str, np.ndarray]:
    """Summary statistics of outcome arrays with NaN for missing entries.

    Parameters
    ----------
    y : numpy.ndarray, shape (..., N, T, K)

    Returns
    -------
    dict
        ``mean`` and ``sd`` (ddof 1) per wave and process, shape (..., T, K), over the units
        observed there; ``lag1_cor`` (..., T-1, K): Pearson correlation of waves t-1 and t
        (t = 2..T) over the units observed at both; ``rising`` (..., K): share of units, among
        those observed at two waves or more, whose last observed value exceeds their first.
    """
    y = np.asarray(y, dtype=float)
    seen = ~np.isnan(y)
    n = seen.sum(axis=-3)
    filled = np.where(seen, y, 0.0)
    mean = filled.sum(axis=-3) / n
    dev = np.where(seen, y - np.expand_dims(mean, -3), 0.0)
    sd = np.sqrt((dev**2).sum(axis=-3) / (n - 1))

    a, b = y[..., :-1, :], y[..., 1:, :]
    both = ~np.isnan(a) & ~np.isnan(b)
    nb = both.sum(axis=-3)
    ma = np.where(both, a, 0.0).sum(axis=-3) / nb
    mb = np.where(both, b, 0.0).sum(axis=-3) / nb
    da = np.where(both, a - np.expand_dims(ma, -3), 0.0)
    db = np.where(both, b - np.expand_dims(mb, -3), 0.0)
    cor = (da * db).sum(axis=-3) / np.sqrt((da**2).sum(axis=-3) * (db**2).sum(axis=-3))

    T = y.shape[-2]
    first = np.argmax(seen, axis=-2)  # (..., N, K)
    last = T - 1 - np.argmax(seen[..., ::-1, :], axis=-2)
    y_first = np.take_along_axis(filled, first[..., None, :], axis=-2)[..., 0, :]
    y_last = np.take_along_axis(filled, last[..., None, :], axis=-2)[..., 0, :]
    valid = seen.sum(axis=-2) >= 2
    rising = ((y_last > y_first) & valid).sum(axis=-2) / valid.sum(axis=-2)
    return {"mean": mean, "sd": sd, "lag1_cor": cor, "rising": rising}


def ppc(fit, *, draws: int = 200, seed=0) -> pd.DataFrame:
    """Posterior predictive checks of trajectory statistics, with p-values.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit`.
    draws : int, default 200
        Replicated panels (one per posterior draw).
    seed : int
        Seed of the draw selection and the replicated noise.

    Returns
    -------
    pandas.DataFrame
        One row per statistic, observed variable and wave: ``statistic`` (mean, sd,
        lag1_cor, rising), ``process``, ``indicator`` (the observed variable: the process
        itself when it is observed directly, else each of its indicators in turn), ``wave``
        (the data's wave label; for lag1_cor the later wave of the
        pair; None for rising, which spans all waves), ``observed``, ``rep_mean``,
        ``rep_q05``, ``rep_q25``, ``rep_q75``, ``rep_q95`` (quantiles of the replicated
        statistic), ``p_value`` = P(T_rep >= T_obs) over replicates and ``flag`` (True when
        p_value < 0.05 or > 0.95).

    Notes
    -----
    Posterior predictive p-values are not uniform under a true model: they pile up near
    0.5 (Gelman, Meng & Stern 1996), so a flag is strong evidence of misfit in that
    statistic, while the absence of flags does not show that the model is right.
    Replicates keep the data's missing entries, so a statistic is computed over the same
    units in the data and in every replicate.
    """
    check_fit(fit, "ppc")
    draws = _check_draws(draws, "ppc")
    panel = fit.panel
    obs = panel_statistics(panel.y)
    rep = panel_statistics(replicate(fit, draws=draws, seed=seed))
    waves = list(panel.waves)
    rows = []
    for stat in STATISTICS:
        o, r = obs[stat], rep[stat]
        if stat == "rising":
            o, r = o[None], r[:, None]
            labels = [None]
        elif stat == "lag1_cor":
            labels = waves[1:]
        else:
            labels = waves
        for k, (process, name) in enumerate(observed_owners(panel)):
            for t, wave in enumerate(labels):
                value, reps = float(o[t, k]), r[:, t, k]
                reps = reps[np.isfinite(reps)]
                if not np.isfinite(value) or reps.size == 0:
                    continue
                q = np.quantile(reps, QUANTILES)
                p = float(np.mean(reps >= value))
                rows.append({"statistic": stat, "process": process, "indicator": name,
                             "wave": wave, "observed": value,
                             "rep_mean": float(reps.mean()), "rep_q05": q[0], "rep_q25": q[1],
                             "rep_q75": q[3], "rep_q95": q[4], "p_value": p,
                             "flag": bool(p < 0.05 or p > 0.95)})
    table = pd.DataFrame(rows)
    table["wave"] = pd.Series([r["wave"] for r in rows], dtype=object)  # keep the data's labels
    table.attrs.update({"model": fit.spec.name, "draws": int(min(draws, len(fit.theta_draws())))})
    return table


# --------------------------------------------------------------------------------------------
# individual trajectories
# --------------------------------------------------------------------------------------------


def unit_positions(panel, units) -> list[int]:
    """Row positions of unit labels in the panel (the first 12 for None); an unknown label is refused."""
    if units is None:
        return list(range(min(12, panel.n_units)))
    units = [units] if np.isscalar(units) else list(units)
    index = {u: i for i, u in enumerate(panel.units)}
    out = []
    for u in units:
        if u not in index:
            shown = ", ".join(repr(v) for v in panel.units[:5])
            raise DataError(
                f"unit {u!r} is not in the fitted panel (units are e.g. {shown}); pass unit "
                "labels as they appear in `panel.units`."
            )
        out.append(index[u])
    return out


def latent_joint(structure, mom: dict, covariates: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Joint mean and covariance of (eta, y) per draw and unit, the etas in latent order.

    Parameters
    ----------
    structure : Structure
    mom : dict
        From :func:`bayeslong.model.moments.moment_draws`.
    covariates : numpy.ndarray, shape (n, W)

    Returns
    -------
    mean : numpy.ndarray, shape (S, n, E + Y)
        ``E[eta_t | w]`` of the E wave latents ``eta[k,t]`` (process-major, wave minor;
        growth factors left out), then ``E[y | w]``.
    cov : numpy.ndarray, shape (S, E + Y, E + Y)
        ``[[Phi_ee, Phi_e. Lam'], [Lam Phi_.e, Sigma]]`` (:func:`bayeslong.moments.latent_moments`).
    """
    eta = np.array([i for i, name in enumerate(structure.latents) if name.startswith("eta")])
    mean_eta = unit_means(mom, covariates, "latent")[:, :, eta]
    mean = np.concatenate([mean_eta, unit_means(mom, covariates)], axis=2)
    cross = mom["cross"][:, eta, :]
    cov = np.block([[mom["Phi"][:, eta][:, :, eta], cross], [np.swapaxes(cross, 1, 2), mom["Sigma"]]])
    return mean, cov


def trajectories(fit, units=None, *, kind: str = "outcome", draws: int = 200, seed=0) -> pd.DataFrame:
    """Conditional predictive bands of individual units' trajectories.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit`.
    units : label or sequence of labels, optional
        Unit labels (as in ``panel.units``); the first 12 units by default.
    kind : {"outcome", "latent"}
        ``outcome``: at each wave t, the distribution of the unit's y_t given its observed
        entries at the other waves (all processes), i.e. what the model predicts for that
        wave from the rest of the unit's trajectory. ``latent``: the distribution of the
        latent eta_t given all the unit's observed entries. With one indicator per wave and
        no measurement error (y = eta, the default) the latent band collapses onto the
        observed values and is informative only at missing waves; in the within form
        (RI-CLPM) eta_t is the unit's deviation from its own mean.
    draws : int, default 200
        Posterior draws; one value is drawn from each draw's conditional normal, so the
        bands are quantiles of the posterior predictive mixture.
    seed : int

    Returns
    -------
    pandas.DataFrame
        One row per unit, observed variable (``outcome``) or process (``latent``) and wave:
        ``unit``, ``process``, ``indicator`` (the observed variable; for ``latent`` the
        process), ``wave``, ``observed`` (NaN if missing, and for the latent of a process
        measured by several indicators), ``mean`` (the mixture mean) and quantiles
        ``q05``, ``q25``, ``q50``, ``q75``, ``q95``.

    Notes
    -----
    Joint normality of (eta, y) given w with Cov[eta, y] = Phi Lam'
    (:func:`bayeslong.moments.latent_moments`) and :func:`conditional_normal`.
    """
    check_fit(fit, "trajectories")
    if kind not in ("outcome", "latent"):
        raise DataError(f"`kind` in trajectories must be 'outcome' or 'latent'; got {kind!r}.")
    draws = _check_draws(draws, "trajectories")
    panel, structure = fit.panel, fit.structure
    positions = unit_positions(panel, units)
    rng = np.random.default_rng(seed)
    mom = moment_draws(structure, select_draws(fit, draws, rng))
    ys = panel.outcome_matrix()[positions]
    w = panel.covariate_matrix()[positions]
    T = panel.n_waves
    owners = observed_owners(panel)
    Y = len(owners) * T
    if kind == "latent":
        mean, cov = latent_joint(structure, mom, w)
        n_eta = mean.shape[-1] - Y
        wave_of = np.tile(np.arange(T), n_eta // T)
        labels = [(process, process) for process in panel.outcomes]
        # the latent is the observed score itself only for a process observed directly
        column = [owners.index((p, p)) if panel.indicators[p] == (p,) else None
                  for p in panel.outcomes]
    else:
        mean, cov = unit_means(mom, w), mom["Sigma"]
        wave_of = np.tile(np.arange(T), len(owners))
        labels = owners
        column = list(range(len(owners)))
    rows = []
    for j, pos in enumerate(positions):
        seen = ~np.isnan(ys[j])
        for t in range(T):
            if kind == "latent":  # joint of (eta, y): eta_t given every observed y
                target = np.r_[wave_of == t, np.zeros(Y, bool)]
                given = np.r_[np.zeros(n_eta, bool), seen]
                values = ys[j][seen]
            else:  # y_t given the observed entries of the other waves
                target = wave_of == t
                given = seen & (wave_of != t)
                values = ys[j][given]
            keep = target | given
            m, c = conditional_normal(mean[:, j][:, keep], cov[:, keep][:, :, keep], given[keep], values)
            sd = np.sqrt(np.clip(np.diagonal(c, axis1=-2, axis2=-1), 0.0, None))
            sample = m + sd * rng.standard_normal(m.shape)  # (S, K): marginals per variable
            q = np.quantile(sample, QUANTILES, axis=0)
            for k, (process, name) in enumerate(labels):
                observed = np.nan if column[k] is None else ys[j][column[k] * T + t]
                rows.append({"unit": panel.units[pos], "process": process, "indicator": name,
                             "wave": panel.waves[t], "observed": observed,
                             "mean": float(m[:, k].mean()), "q05": q[0, k], "q25": q[1, k],
                             "q50": q[2, k], "q75": q[3, k], "q95": q[4, k]})
    table = pd.DataFrame(rows)
    table.attrs.update({"model": fit.spec.name, "kind": kind})
    return table
