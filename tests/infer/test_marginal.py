"""Per-unit marginal log-likelihood of categorical models: the latents integrated out.

Expected values come from naive integrals written here: Gauss-Hermite quadrature of the
random-intercept probit (Butler & Moffitt 1982, Econometrica 50(3), 761-764) and plain
Monte Carlo over the latent responses' normal distribution (10^6 draws, its own standard
error). The model's moments (c, D, Sigma of the latent responses) are taken from the
engine, whose own tests hold them to scipy.stats.multivariate_normal.
"""

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.special import expit
from scipy.stats import norm

import bayeslong as bl
from bayeslong.infer.marginal import unit_marginal_loglik
from bayeslong.model.moments import moments_at
from bayeslong.model.thresholds import categorical_structure


def test_random_intercept_probit_matches_gauss_hermite():
    spec = bl.model("random-effects")
    params = {"level_mean": 0.3, "level_var": 0.8, "effect[x]": 0.5}
    panel = bl.Simulation(spec=spec, params=params, n_units=60, n_waves=5, seed=3,
                          covariates={"x": ("normal", 0, 1)}, categorical={"y": "binary"}).panel()
    cat = categorical_structure(spec, panel)
    theta = cat.full_theta([params[n] for n in cat.names])
    ours = unit_marginal_loglik(cat, panel, theta, np.empty(0))[0]
    # naive Gauss-Hermite: p_i = int prod_t Phi((2 y_it - 1)(mu + b x_it + u)) N(u; 0, s2) du
    nodes, weights = np.polynomial.hermite.hermgauss(80)
    u = np.sqrt(2 * params["level_var"]) * nodes
    y, x = panel.y[:, :, 0], panel.x[:, :, 0]
    naive = []
    for i in range(panel.n_units):
        index = params["level_mean"] + params["effect[x]"] * x[i][None, :] + u[:, None]
        p = norm.cdf(np.where(y[i] == 1, 1.0, -1.0)[None, :] * index).prod(axis=1)
        naive.append(np.log(weights @ p / np.sqrt(np.pi)))
    np.testing.assert_allclose(ours, naive, atol=1e-4)


ALT = {"level_mean": 0.2, "slope_mean": 0.1, "lag": 0.4, "initial_mean": -0.1, "level_var": 0.5,
       "slope_var": 0.05, "level_slope_cov": 0.02, "initial_var": 1.0, "initial_level_cov": 0.3,
       "initial_slope_cov": 0.0, "resid_var": 0.5}


def _brute_force(cat, panel, theta, tau, units, draws=1_000_000, seed=0, link="probit"):
    """log P(y_i) by Monte Carlo over the latent responses, and its standard error."""
    c, D, Sigma = moments_at(cat.structure, theta)
    err = cat.error_variance
    root = np.linalg.cholesky(Sigma - err * np.eye(len(Sigma)) + 1e-12 * np.eye(len(Sigma)))
    cuts = cat.cut_values(tau)["y"]
    ys, w = panel.outcome_matrix(), panel.covariate_matrix()
    rng = np.random.default_rng(seed)
    out = []
    for i in units:
        seen = ~np.isnan(ys[i])
        k = ys[i][seen].astype(int)
        lo, hi = cuts[np.arange(len(seen))[seen], k], cuts[np.arange(len(seen))[seen], k + 1]
        x = (c + D @ w[i])[seen] + rng.standard_normal((draws, len(root))) @ root[seen].T
        if link == "probit":  # eps normal: P(lo < x + eps <= hi | x)
            p = (norm.cdf(hi - x) - norm.cdf(lo - x)).prod(axis=1)
        else:
            p = (expit(hi - x) - expit(lo - x)).prod(axis=1)
        out.append((np.log(p.mean()), p.std() / np.sqrt(draws) / p.mean()))
    return np.array(out)


@pytest.mark.parametrize("categories,link", [(2, "probit"), (3, "probit"), (3, "logit")])
def test_multi_wave_terms_match_brute_force_monte_carlo(categories, link):
    spec = bl.model("alt", residuals="equal", link=link)
    params = dict(ALT, **({"threshold[y,2]": 0.8} if categories == 3 else {}))
    panel = bl.Simulation(spec=spec, params=params, n_units=30, n_waves=4, seed=7,
                          categorical={"y": categories}, missing={"intermittent": 0.1}).panel()
    cat = categorical_structure(spec, panel)
    theta = cat.full_theta([params[n] for n in cat.names[:len(cat.names) - len(cat.thresholds)]])
    tau = np.array([params[n] for n in cat.thresholds])
    units = [0, 1, 2, 3, 4]
    ours, err = unit_marginal_loglik(cat, panel, theta, tau, points=1024, replicates=8,
                                     return_error=True)
    naive = _brute_force(cat, panel, theta, tau, units, link=link)
    both = np.sqrt(naive[:, 1] ** 2 + err[0, units] ** 2)
    assert np.all(np.abs(ours[0, units] - naive[:, 0]) < 4 * both), (ours[0, units], naive)


def test_mixed_continuous_and_categorical_indicators_match_brute_force():
    spec = bl.model("alt", residuals="equal", unique_covariance="none")
    params = dict(ALT, **{"loading": 0.8, "intercept[b]": 0.1, "intercept[c]": -0.2,
                          "unique_var": 0.4, "threshold[c,2]": 0.7})
    sim = bl.Simulation(spec=spec, params=params, n_units=20, n_waves=3, seed=2,
                        indicators={"y": ["a", "b", "c"]}, categorical={"c": 3})
    panel = sim.panel()
    cat = categorical_structure(spec, panel)
    names = [n for n in cat.names if n not in cat.thresholds]
    theta = cat.full_theta(sim.theta()[[cat.structure.names.index(n) for n in names]])
    tau = np.array([0.7])
    ours = unit_marginal_loglik(cat, panel, theta, tau, points=1024, replicates=8)[0]
    # naive: joint normal density of the continuous entries times Monte Carlo over the
    # categorical responses given them (Gaussian conditioning written out)
    c, D, S = moments_at(cat.structure, theta)
    ys = panel.outcome_matrix()
    rows = cat.rows["c"]
    cont = np.setdiff1d(np.arange(len(c)), rows)
    rng = np.random.default_rng(1)
    cuts = cat.cut_values(tau)["c"]
    for i in range(3):
        from scipy.stats import multivariate_normal

        dens = multivariate_normal(c[cont], S[np.ix_(cont, cont)]).logpdf(ys[i, cont])
        A = S[np.ix_(rows, cont)] @ np.linalg.inv(S[np.ix_(cont, cont)])
        m = c[rows] + A @ (ys[i, cont] - c[cont])
        V = S[np.ix_(rows, rows)] - A @ S[np.ix_(cont, rows)]
        z = rng.multivariate_normal(m, V, size=1_000_000)
        k = ys[i, rows].astype(int)
        inside = np.all((z > cuts[np.arange(3), k]) & (z <= cuts[np.arange(3), k + 1]), axis=1)
        p = inside.mean()
        se = np.sqrt(p * (1 - p) / 1e6) / p
        assert abs(ours[i] - (dens + np.log(p))) < 4 * se + 1e-3


def test_compare_refuses_categorical_against_continuous_treatment():
    import arviz as az
    import xarray as xr

    spec = bl.model("random-effects")
    df = bl.simulate(spec, {"level_mean": 0.0, "level_var": 1.0}, 20, 3, seed=1,
                     categorical={"y": "binary"})
    categorical = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y"],
                                     categorical={"y": "binary"})
    continuous = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y"])

    def fake(panel):
        ll = xr.Dataset({"y": (("chain", "draw", "unit"), np.zeros((1, 10, panel.n_units)))})
        return SimpleNamespace(idata=az.InferenceData(log_likelihood=ll), panel=panel)

    with pytest.raises(bl.DataError, match=r"fits 'probit' and 'normal' treat 'y' differently: as "
                       r"categorical in 'probit' .*log probabilities of categories.*log "
                       r"densities of values .* cannot be compared"):
        bl.compare({"probit": fake(categorical), "normal": fake(continuous)})
