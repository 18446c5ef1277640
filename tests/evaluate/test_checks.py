"""Tests of bayeslong.check (predictive checks, unit bands), the latent moments and bayeslong.plots.

Posteriors come from the normal approximation around the ML fit (bayeslong._approx); data
are simulated inside the tests with NumPy from the engine's implied moments.
"""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import DataError
from bayeslong.evaluate.checks import (
    conditional_normal,
    panel_statistics,
    ppc,
    replicate,
    trajectories,
)
from bayeslong.evaluate.plots import plot_compare, plot_ppc, plot_trajectories
from bayeslong.infer.laplace import ApproxFit, approximate_fit
from bayeslong.model.moments import moment_draws, moments_at
from bayeslong.model.structure import build_structure, structure_for

T = 5
LG_TRUE = dict(level_mean=10.0, slope_mean=1.0, level_var=4.0, level_slope_cov=0.3, slope_var=0.6,
               resid_var=1.5)
# strong curvature: wave means 10, 11.4, 11.6, 10.6, 8.4 (10 + 2t - 0.6t^2, hand-worked)
QUAD_TRUE = dict(level_mean=10.0, slope_mean=2.0, curve_mean=-0.6, level_var=4.0, slope_var=0.5,
                 curve_var=0.02, resid_var=1.0)


def _simulate(name, values, n, seed, *, missing=0.0):
    st = build_structure(bl.model(name), outcomes=["y"], n_waves=T)
    theta = np.array([values.get(p, 0.0) for p in st.names])
    c, _, sigma = moments_at(st, theta)
    rng = np.random.default_rng(seed)
    y = c + rng.standard_normal((n, T)) @ np.linalg.cholesky(sigma).T
    y[rng.random(y.shape) < missing] = np.nan
    y[np.isnan(y).all(axis=1), 0] = 1.0  # every unit keeps an observation
    return bl.Panel(units=tuple(range(100, 100 + n)), waves=tuple(range(2001, 2001 + T)),
                    outcomes=("score",), y=y[:, :, None]), theta


@pytest.fixture(scope="module")
def lg():
    panel, theta = _simulate("linear-growth", LG_TRUE, 300, seed=21, missing=0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.BoundaryWarning)
        fit = approximate_fit(bl.model("linear-growth"), panel, draws=200, chains=2, seed=1)
    return fit, theta


# --------------------------------------------------------------------------------------------
# Gaussian conditioning and the latent moments
# --------------------------------------------------------------------------------------------


def _naive_conditional(mu, S, b, xb):
    """Rasmussen & Williams (2006) eq. A.6, straight from the book with explicit inverses."""
    a = [i for i in range(len(mu)) if i not in b]
    Sbb_inv = np.linalg.inv(S[np.ix_(b, b)])
    m = mu[a] + S[np.ix_(a, b)] @ Sbb_inv @ (xb - mu[b])
    C = S[np.ix_(a, a)] - S[np.ix_(a, b)] @ Sbb_inv @ S[np.ix_(b, a)]
    return m, C


def test_conditional_normal_against_naive_formula():
    A = np.array([[2.0, 0.3, 0.0, 0.1, 0.5], [0.0, 1.0, 0.4, 0.0, 0.2], [0.1, 0.0, 1.5, 0.3, 0.0],
                  [0.0, 0.2, 0.0, 0.8, 0.1], [0.3, 0.0, 0.1, 0.0, 1.2]])
    S = A @ A.T + 0.5 * np.eye(5)  # hand-made positive definite covariance
    mu = np.array([1.0, -2.0, 0.5, 3.0, 0.0])
    given = np.array([False, True, False, True, True])
    xb = np.array([-1.0, 2.5, 0.7])
    m, C = conditional_normal(mu, S, given, xb)
    m_ref, C_ref = _naive_conditional(mu, S, [1, 3, 4], xb)
    np.testing.assert_allclose(m, m_ref, rtol=1e-12)  # float rounding only
    np.testing.assert_allclose(C, C_ref, rtol=1e-12)
    # leading axes broadcast: two draws and three units at once equal the one-by-one result
    mus = np.stack([mu, mu + 1.0])[:, None, :] + np.arange(3)[None, :, None]
    Ss = np.stack([S, 2.0 * S])[:, None]
    xbs = np.stack([xb, xb - 1.0, xb + 2.0])
    m2, C2 = conditional_normal(mus, Ss, given, xbs)
    for s in range(2):
        for i in range(3):
            mr, Cr = _naive_conditional(mus[s, i], Ss[s, 0], [1, 3, 4], xbs[i])
            np.testing.assert_allclose(m2[s, i], mr, rtol=1e-12)
            np.testing.assert_allclose(C2[s, 0], Cr, rtol=1e-12)


def test_latent_moments_against_numpy_matrix_formulas():
    # dual change has every matrix in play: B (lag and constant change), Lam, Psi and Theta
    st = build_structure(bl.model("dual-change"), outcomes=["y"], n_waves=4, time_invariant=["z"])
    rng = np.random.default_rng(0)
    thetas = rng.uniform(0.1, 0.6, size=(3, st.n_params))
    got = moment_draws(st, thetas)
    for s, theta in enumerate(thetas):
        B, Psi, Lam = st.fill(theta, "B"), st.fill(theta, "Psi"), st.fill(theta, "Lam")
        a, G, nu, Th = st.fill(theta, "a"), st.fill(theta, "G"), st.fill(theta, "nu"), st.fill(theta, "Theta")
        inv = np.linalg.inv(np.eye(len(B)) - B)
        Phi = inv @ Psi @ inv.T  # docs/engine.md: Cov[eta] = (I-B)^-1 Psi (I-B)^-T
        np.testing.assert_allclose(got["alpha"][s], inv @ a, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got["Gamma"][s], inv @ G, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got["Phi"][s], Phi, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got["cross"][s], Phi @ Lam.T, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got["Sigma"][s], Lam @ Phi @ Lam.T + Th, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got["c"][s], nu + Lam @ inv @ a, rtol=1e-10, atol=1e-12)


# --------------------------------------------------------------------------------------------
# replicated panels and statistics
# --------------------------------------------------------------------------------------------


def test_panel_statistics_against_pandas():
    rng = np.random.default_rng(3)
    y = rng.normal(size=(40, 4, 2))
    y[rng.random(y.shape) < 0.2] = np.nan
    got = panel_statistics(y)
    for k in range(2):
        df = pd.DataFrame(y[:, :, k])
        # references: pandas skips NaN (mean, std ddof 1) and uses pairwise-complete rows (corr)
        np.testing.assert_allclose(got["mean"][:, k], df.mean().to_numpy(), rtol=1e-12)
        np.testing.assert_allclose(got["sd"][:, k], df.std().to_numpy(), rtol=1e-12)
        ref_cor = [df[t - 1].corr(df[t]) for t in range(1, 4)]
        np.testing.assert_allclose(got["lag1_cor"][:, k], ref_cor, rtol=1e-12)
        ups = [row[~np.isnan(row)][-1] > row[~np.isnan(row)][0] for row in y[:, :, k] if (~np.isnan(row)).sum() >= 2]
        assert got["rising"][k] == pytest.approx(np.mean(ups))  # a plain loop over units


def test_replicates_keep_missingness_and_follow_the_implied_moments(lg):
    fit, theta = lg
    # a posterior concentrated at the true theta: replicates must have the implied covariance
    post = {n: np.full((1, 400), v) for n, v in zip(fit.structure.names, theta)}
    fixed = ApproxFit(spec=fit.spec, panel=fit.panel, structure=fit.structure, seed=0,
                      idata=az.from_dict(posterior=post), ml=None)
    reps = replicate(fixed, draws=400, seed=7)
    assert reps.shape == (400, 300, T, 1)
    np.testing.assert_array_equal(np.isnan(reps[5]), np.isnan(fit.panel.y))
    c, _, sigma = moments_at(fit.structure, theta)
    flat = reps[:, :, :, 0].reshape(-1, T)
    flat = flat[~np.isnan(flat).any(axis=1)]  # about 0.9^5 * 120000 = 71000 complete rows
    # Monte Carlo tolerances: SE of a mean ~ sqrt(25 / 71000) = 0.02; of a covariance entry ~ 0.1
    np.testing.assert_allclose(flat.mean(axis=0), c, atol=0.08)
    np.testing.assert_allclose(np.cov(flat.T), sigma, atol=0.4)


def test_ppc_true_model_is_not_flagged(lg):
    fit, _ = lg
    table = ppc(fit, draws=200, seed=0)
    assert set(table["statistic"]) == {"mean", "sd", "lag1_cor", "rising"}
    assert list(table.loc[table["statistic"] == "mean", "wave"]) == [2001, 2002, 2003, 2004, 2005]
    # the data come from the fitted model: no p-value beyond 0.01 / 0.99 (seeded data and draws)
    assert table["p_value"].between(0.01, 0.99).all(), table
    # observed statistics are those of the data (reference: pandas, skipping NaN)
    obs = pd.DataFrame(fit.panel.y[:, :, 0]).mean().to_numpy()
    np.testing.assert_allclose(table.loc[table["statistic"] == "mean", "observed"], obs)


def test_ppc_flags_wave_means_of_a_linear_model_on_curved_data():
    panel, _ = _simulate("quadratic-growth", QUAD_TRUE, 300, seed=22)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.BoundaryWarning)
        fit = approximate_fit(bl.model("linear-growth"), panel, draws=200, chains=2, seed=2)
    table = ppc(fit, draws=200, seed=0)
    means = table[table["statistic"] == "mean"]
    # a straight line through an inverted U misses the middle and the ends: several waves flagged
    assert means["flag"].sum() >= 3, means
    mid = means.set_index("wave").loc[2003]
    assert mid["p_value"] < 0.05  # the peak sits above the line


# --------------------------------------------------------------------------------------------
# individual trajectories
# --------------------------------------------------------------------------------------------


def test_latent_band_collapses_on_observed_waves_when_y_equals_eta(lg):
    fit, _ = lg
    units = [u for u, row in zip(fit.panel.units, fit.panel.y[:, :, 0]) if np.isnan(row).any()][:3]
    bands = trajectories(fit, units, kind="latent", draws=100, seed=1)
    seen = bands["observed"].notna()
    # y = eta (Lam = I, Theta = 0): given y, eta is y exactly at observed waves (closed form)
    np.testing.assert_allclose(bands.loc[seen, "q05"], bands.loc[seen, "observed"], atol=1e-6)
    np.testing.assert_allclose(bands.loc[seen, "q95"], bands.loc[seen, "observed"], atol=1e-6)
    assert (bands.loc[~seen, "q95"] - bands.loc[~seen, "q05"] > 0.5).all()


def test_outcome_band_is_the_leave_one_wave_out_conditional(lg):
    fit, _ = lg
    unit = fit.panel.units[0]
    bands = trajectories(fit, [unit], draws=400, seed=2).set_index("wave")
    thetas = fit.theta_draws()
    # reference at the posterior mean: y_t | y_(-t) by the naive R&W A.6 formula; the mixture
    # mean over draws agrees within posterior spread (tolerance 0.15 on an outcome SD of ~3)
    c, _, sigma = moments_at(fit.structure, thetas.mean(axis=0))
    row = fit.panel.y[0, :, 0]
    for t, wave in enumerate(fit.panel.waves):
        b = [j for j in range(T) if j != t and not np.isnan(row[j])]
        m, C = _naive_conditional(c, sigma, b, row[b])
        a = [j for j in range(T) if j not in b]
        assert bands.loc[wave, "mean"] == pytest.approx(m[a.index(t)], abs=0.15)
    # calibration of the 90% bands over 80 units (data from the fitted model): binomial SD of
    # the coverage over ~360 observed entries is 0.016; 0.84..0.96 allows for within-unit dependence
    many = trajectories(fit, list(fit.panel.units[:80]), draws=400, seed=3)
    seen = many["observed"].notna()
    inside = (many["observed"] >= many["q05"]) & (many["observed"] <= many["q95"])
    assert 0.84 <= inside[seen].mean() <= 0.96


def test_trajectory_errors_name_the_problem(lg):
    fit, _ = lg
    with pytest.raises(DataError, match="unit 'nobody' is not in the fitted panel"):
        trajectories(fit, ["nobody"])
    with pytest.raises(DataError, match="`kind` in trajectories must be 'outcome' or 'latent'"):
        trajectories(fit, kind="growth")
    with pytest.raises(DataError, match="`draws` in ppc must be an integer of at least 2"):
        ppc(fit, draws=1)
    with pytest.raises(DataError, match="needs a fit made by bl.fit"):
        ppc(object())


# --------------------------------------------------------------------------------------------
# plots
# --------------------------------------------------------------------------------------------


def test_plots_are_figures_with_readable_labels(lg, tmp_path):
    fit, _ = lg
    fig = plot_ppc(fit, statistics=("mean", "sd", "lag1_cor"), draws=50)
    labels = [ax.get_ylabel() for ax in fig.axes]
    assert "score: wave mean" in labels and "score: wave SD" in labels
    ticks = [t.get_text() for t in fig.axes[0].get_xticklabels()]
    assert ticks == ["2001", "2002", "2003", "2004", "2005"]
    fig.savefig(tmp_path / "ppc.png", dpi=80)
    fig.savefig(tmp_path / "ppc.svg")
    assert (tmp_path / "ppc.png").read_bytes()[:4] == b"\x89PNG"
    assert b"<svg" in (tmp_path / "ppc.svg").read_bytes()[:400]

    fig = plot_trajectories(fit, max_units=6, draws=50)
    assert sum(ax.get_visible() for ax in fig.axes) == 6
    assert fig.axes[0].get_title() == "unit 100"
    fig.savefig(tmp_path / "units.png", dpi=80)

    table = pd.DataFrame({"elpd_loo": [-10.0, -14.0], "se": [2.0, 2.5], "elpd_diff": [0.0, 4.0],
                          "dse": [0.0, 1.5]}, index=["a", "b"])
    fig = plot_compare(table)
    ax = fig.axes[0]
    at = dict(zip([t.get_text() for t in ax.get_yticklabels()], ax.get_yticks()))
    assert at["a"] > at["b"]  # the best model on top
    fig.savefig(tmp_path / "compare.svg")
    with pytest.raises(DataError, match="lacks the column"):
        plot_compare(table.drop(columns="dse"))


# --------------------------------------------------------------------------------------------
# real posterior draws
# --------------------------------------------------------------------------------------------


def test_ppc_and_bands_on_real_nuts_draws():
    from bayeslong.infer.sampling import fit as run_fit

    panel, _ = _simulate("linear-growth", LG_TRUE, 120, seed=23, missing=0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.ConvergenceWarning)  # tiny run; convergence is not the point
        fit = run_fit(bl.model("linear-growth"), panel, draws=150, tune=150, chains=2, seed=2,
                      progressbar=False, sampler="pymc")
    table = ppc(fit, draws=200, seed=0)
    # data from the fitted model: no extreme p-value (seeded), as with the approximate posterior
    assert table["p_value"].between(0.01, 0.99).all(), table
    bands = trajectories(fit, list(panel.units[:60]), draws=300, seed=3)
    seen = bands["observed"].notna()
    inside = (bands["observed"] >= bands["q05"]) & (bands["observed"] <= bands["q95"])
    # 90% bands over ~270 observed entries: binomial SD 0.018; 0.82..0.97 allows for
    # dependence within units and the short run
    assert 0.82 <= inside[seen].mean() <= 0.97


def test_replicates_use_each_units_covariates():
    # a posterior concentrated at one theta; y depends on a time-varying x with effect 2
    rng = np.random.default_rng(5)
    n = 20
    x = rng.normal(size=(n, T, 1))
    panel = bl.Panel(units=tuple(range(n)), waves=tuple(range(T)), outcomes=("y",), time_varying=("x",),
                     y=rng.normal(size=(n, T, 1)), x=x)
    spec = bl.model("linear-growth")
    st = structure_for(spec, panel)
    values = dict(LG_TRUE, **{"effect[x]": 2.0})
    theta = np.array([values[p] for p in st.names])
    post = {p: np.full((1, 3000), v) for p, v in zip(st.names, theta)}
    fixed = ApproxFit(spec=spec, panel=panel, structure=st, seed=0, idata=az.from_dict(posterior=post), ml=None)
    reps = replicate(fixed, draws=3000, seed=1)[:, :, :, 0]
    c, D, sigma = moments_at(st, theta)
    expected = c + panel.covariate_matrix() @ D.T  # E[y_i | w_i] = c + D w_i (docs/engine.md)
    # Monte Carlo tolerance: 4 SE of a mean of 3000 draws, SE = sqrt(diag Sigma / 3000)
    tol = 4 * np.sqrt(np.diag(sigma) / 3000)
    assert (np.abs(reps.mean(axis=0) - expected) < tol).all()
