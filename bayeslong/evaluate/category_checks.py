"""Posterior predictive checks of categorical variables: category shares and transitions.

A fit with categorical variables (:class:`bayeslong.infer.categorical.CategoricalFit`)
implies, at every posterior draw (theta_s, tau_s), the distribution of each unit's latent
responses given its covariates, y*_i | w_i ~ N(c_s + D_s w_i, Sigma_s) with the responses'
errors in Sigma_s (model/thresholds.py), and its categories are the intervals between the
thresholds into which y* falls (docs/model-family.md, "Categorical indicators"). Replicated
panels are drawn from it, one per selected draw, for new units with the data's covariates
and the data's missing entries, as :func:`bayeslong.evaluate.checks.replicate` does for
continuous outcomes (Gelman, Meng & Stern 1996). Under the logit the normal part of y* (the
latents' contribution) is drawn from its implied normal and the error from the logistic.

Two statistics are set against their replicated distributions:

- the share of each category at each wave, over the units observed there;
- the transition table between consecutive waves: the number of units in category a at
  wave t-1 and b at wave t, over the units observed at both, and its diagonal summed (the
  units that stayed in their category); they show whether the model carries the right
  amount of stability and movement.

References
----------
Lancaster, H. O. (1961). Significance tests in discrete distributions. Journal of the
American Statistical Association 56(294), 223-234. doi:10.1080/01621459.1961.10482105
Gelman, A., Meng, X.-L., & Stern, H. (1996). Posterior predictive assessment of model fitness
via realized discrepancies. Statistica Sinica 6(4), 733-760.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from bayeslong.errors import DataError
from bayeslong.evaluate.checks import QUANTILES
from bayeslong.model.moments import moment_draws, unit_means
from bayeslong.model.thresholds import categorize


def _check_categorical_fit(fit, where: str) -> None:
    cat = getattr(fit, "categorical", None)
    if cat is None or not hasattr(fit, "threshold_draws"):
        raise DataError(f"{where} needs a fit of a panel with categorical variables (bl.fit on "
                        "a panel declared with categorical=...); for continuous outcomes use "
                        "bl.ppc")


def _draw_rows(n_draws: int, draws: int, rng) -> np.ndarray:
    if isinstance(draws, bool) or not isinstance(draws, (int, np.integer)) or draws < 2:
        raise DataError(f"`draws` must be an integer of at least 2; got {draws!r}.")
    if draws >= n_draws:
        return np.arange(n_draws)
    return np.sort(rng.choice(n_draws, size=int(draws), replace=False))


def replicate_categories(fit, *, draws: int = 200, seed=0) -> np.ndarray:
    """Draw replicated panels of a fit with categorical variables.

    Parameters
    ----------
    fit : CategoricalFit
    draws : int, default 200
        Posterior draws used, one replicated panel each (all if the fit has fewer).
    seed : int or numpy.random.Generator

    Returns
    -------
    numpy.ndarray, shape (S, N, T, J)
        In the layout of ``panel.y``: category positions 0..C-1 for categorical variables,
        values for continuous ones; NaN exactly where the data are missing.
    """
    _check_categorical_fit(fit, "replicate_categories")
    rng = np.random.default_rng(seed)
    cat, panel = fit.categorical, fit.panel
    thetas = np.asarray(fit.theta_draws(), dtype=float)
    rows = _draw_rows(len(thetas), draws, rng)
    thetas, tau = thetas[rows], np.asarray(fit.threshold_draws(), dtype=float)[rows]
    mom = moment_draws(cat.structure, thetas)
    mean = unit_means(mom, panel.covariate_matrix())  # (S, N, Y)
    S, N, Y = mean.shape
    is_cat = np.zeros(Y, dtype=bool)
    for v in cat.variables:
        is_cat[cat.rows[v]] = True
    # the normal part: Sigma less the responses' errors, which are drawn from the link
    V = mom["Sigma"] - cat.error_variance * np.diag(is_cat.astype(float))[None]
    vals, vecs = np.linalg.eigh(0.5 * (V + np.swapaxes(V, 1, 2)))
    root = vecs * np.sqrt(np.clip(vals, 0.0, None))[:, None, :]
    y = mean + np.einsum("syk,snk->sny", root, rng.standard_normal((S, N, Y)))
    for v, cuts in cat.cut_values(tau).items():  # cuts (S, T, C+1)
        r = cat.rows[v]
        eps = (rng.standard_normal((S, N, len(r))) if cat.link == "probit"
               else rng.logistic(size=(S, N, len(r))))
        y[:, :, r] = categorize(y[:, :, r] + eps, cuts[:, None])
    y = np.where(np.isnan(panel.outcome_matrix())[None], np.nan, y)
    J, T = len(panel.observed_names), panel.n_waves
    return y.reshape(S, N, J, T).transpose(0, 1, 3, 2)


def category_shares(y: np.ndarray, n_categories: int) -> np.ndarray:
    """Share of each category at each wave over the units observed there.

    ``y`` (..., N, T) holds positions 0..C-1 (NaN where missing); returns (..., T, C).
    """
    y = np.asarray(y, dtype=float)
    seen = ~np.isnan(y)
    counts = np.stack([(y == c).sum(axis=-2) for c in range(n_categories)], axis=-1)
    return counts / seen.sum(axis=-2)[..., None]


def transition_counts(y: np.ndarray, n_categories: int) -> np.ndarray:
    """Units in category a at wave t-1 and b at wave t, over the units observed at both.

    ``y`` (..., N, T) holds positions 0..C-1 (NaN where missing); returns
    (..., T-1, C, C), entry [t-1, a, b] for the waves t-1 and t (t = 2..T).
    """
    y = np.asarray(y, dtype=float)
    a, b = y[..., :-1], y[..., 1:]
    out = np.empty(y.shape[:-2] + (y.shape[-1] - 1, n_categories, n_categories))
    for i in range(n_categories):
        for j in range(n_categories):
            out[..., i, j] = ((a == i) & (b == j)).sum(axis=-2)
    return out


def _row(observed: float, reps: np.ndarray, **labels) -> dict:
    q = np.quantile(reps, QUANTILES)
    # mid-p: shares and counts are discrete, and ties at the observed value would push
    # P(T_rep >= T_obs) to 1 for a count at the floor of its range (Lancaster 1961)
    p = float(np.mean(reps > observed) + 0.5 * np.mean(reps == observed))
    return {**labels, "observed": float(observed), "rep_mean": float(reps.mean()),
            "rep_q05": q[0], "rep_q25": q[1], "rep_q75": q[3], "rep_q95": q[4],
            "p_value": p, "flag": bool(p < 0.05 or p > 0.95)}


def category_ppc(fit, *, draws: int = 200, seed=0) -> dict[str, pd.DataFrame]:
    """Posterior predictive checks of category shares per wave and of wave-to-wave transitions.

    Parameters
    ----------
    fit : CategoricalFit
    draws : int, default 200
        Replicated panels (one per posterior draw).
    seed : int

    Returns
    -------
    dict of pandas.DataFrame
        ``shares``: one row per categorical variable, wave and category: ``variable``,
        ``wave`` (the data's label), ``category`` (the category's code or label),
        ``observed`` (share among the units observed at that wave), ``rep_mean``,
        ``rep_q05``, ``rep_q25``, ``rep_q75``, ``rep_q95`` (quantiles of the replicated
        share), ``p_value`` = P(share_rep > share_obs) + P(share_rep = share_obs) / 2 (the
        mid-p value of a discrete statistic) and ``flag`` (p < 0.05 or > 0.95).
        ``transitions``: one row per variable, pair of consecutive waves and pair of
        categories: ``variable``, ``from_wave``, ``wave``, ``from``, ``to``, ``observed``
        (count of units), the same replicated columns, ``p_value`` and ``flag``.
        ``stayed``: per variable and pair of consecutive waves, the number of units in the
        same category at both (the diagonal of the transition table), with the same columns.

    Notes
    -----
    Replicates keep the data's missing entries, so each share or count is over the same
    units in the data and in every replicate. Predictive p-values pile up near 0.5 under a
    true model (Gelman, Meng & Stern 1996): a flag is a signal, its absence no proof of fit.
    With many cells (C x C per pair of waves), some fall in the outer tails by chance.
    """
    _check_categorical_fit(fit, "category_ppc")
    panel, cat = fit.panel, fit.categorical
    rep = replicate_categories(fit, draws=draws, seed=seed)
    names = list(panel.observed_names)
    waves = list(panel.waves)
    shares, moves, stays = [], [], []
    for v in cat.variables:
        j, C = names.index(v), cat.n_categories[v]
        labels = list(panel.categories[v])
        obs_s, rep_s = category_shares(panel.y[:, :, j], C), category_shares(rep[..., j], C)
        obs_t, rep_t = transition_counts(panel.y[:, :, j], C), transition_counts(rep[..., j], C)
        for t, wave in enumerate(waves):
            for c in range(C):
                if np.isfinite(obs_s[t, c]):
                    shares.append(_row(obs_s[t, c], rep_s[:, t, c], variable=v, wave=wave,
                                       category=labels[c]))
        for t in range(1, len(waves)):
            stays.append(_row(np.trace(obs_t[t - 1]), np.trace(rep_t[:, t - 1], axis1=1, axis2=2),
                              variable=v, from_wave=waves[t - 1], wave=waves[t]))
            for a in range(C):
                for b in range(C):
                    moves.append(_row(obs_t[t - 1, a, b], rep_t[:, t - 1, a, b], variable=v,
                                      from_wave=waves[t - 1], wave=waves[t], **{
                                          "from": labels[a], "to": labels[b]}))
    out = {"shares": pd.DataFrame(shares), "transitions": pd.DataFrame(moves),
           "stayed": pd.DataFrame(stays)}
    n = int(min(draws, len(fit.theta_draws())))
    for table in out.values():
        for col in ("wave", "from_wave", "category", "from", "to"):  # keep the data's labels
            if col in table.columns:
                table[col] = table[col].astype(object)
        table.attrs.update({"model": fit.spec.name, "draws": n})
    return out
