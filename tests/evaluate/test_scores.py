"""Latent scores (bayeslong.evaluate.scores), the measurement part read by wave
(bayeslong.evaluate.measurement) and the predictive checks of fits with indicators.

References: the regression factor score E[eta | y] = mu_eta + Cov(eta, y) Sigma_y^-1
(y - mu_y) (Thomson 1936; Bartholomew & Knott 1999, Latent Variable Models and Factor
Analysis, section 3.7), computed here by hand with NumPy from the model's equations written
out wave by wave (not from the engine's matrices); the parameter values the data were
drawn from, placed by hand where the model's equations put them (the marker's loading 1 and
intercept 0); pandas for the observed statistics.
Data are simulated with ``bl.simulate`` and a fixed seed.
"""

from __future__ import annotations

import warnings

import arviz as az
import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import DataError
from bayeslong.evaluate.checks import ppc, replicate, trajectories
from bayeslong.evaluate.measurement import measurement_table, wave_measurement
from bayeslong.evaluate.plots import plot_latent_scores, plot_ppc, plot_trajectories
from bayeslong.evaluate.scores import latent_draws, latent_scores
from bayeslong.infer.laplace import ApproxFit, approximate_fit
from bayeslong.model.structure import build_structure, structure_for

T = 4
ITEMS = {"reading": ["enjoy", "choose", "persist"]}
# an autoregressive latent measured by three indicators (scalar invariance, the default):
# enjoy is the marker (loading 1, intercept 0)
TRUE = {"initial_mean": 2.0, "initial_var": 1.0, "intercept": 0.8, "lag": 0.6, "resid_var": 0.5,
        "loading[choose]": 0.8, "intercept[choose]": 0.5, "loading[persist]": 1.2,
        "intercept[persist]": -0.3}


def _value(name: str) -> float:
    if name in TRUE:
        return TRUE[name]
    if name.startswith("unique_var"):  # a different unique variance per indicator and wave
        item, wave = name[len("unique_var["):-1].split(",")
        return 0.3 + 0.1 * int(wave) + 0.05 * ITEMS["reading"].index(item)
    return 0.05  # unique_cov of the same indicator over waves


def _panel(n: int, seed: int, missing: float = 0.0):
    spec = bl.model("ar")
    names = build_structure(spec, outcomes=("reading",), n_waves=T,
                            indicators={"reading": tuple(ITEMS["reading"])}).names
    params = {p: _value(p) for p in names}
    df = bl.simulate(spec, params, n, T, seed=seed, outcomes=["reading"], indicators=ITEMS)
    rng = np.random.default_rng(seed + 1)
    for item in ITEMS["reading"]:  # indicator-specific gaps after wave 1
        df.loc[(rng.uniform(size=len(df)) < missing) & (df["wave"] > 1), item] = np.nan
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=ITEMS)
    return spec, panel, np.array([params[p] for p in names])


def _at(spec, panel, theta, draws):
    """A Fit-shaped object whose posterior sits at one theta (every draw the same)."""
    st = structure_for(spec, panel)
    post = {n: np.full((1, draws), v) for n, v in zip(st.names, theta)}
    return ApproxFit(spec=spec, panel=panel, structure=st, seed=0,
                     idata=az.from_dict(posterior=post), ml=None)


def _by_hand(params: dict):
    """mu and covariance of eta (T) and y (3T, indicator-major), from the equations.

    eta_1 = initial_mean + zeta_1, Var initial_var; eta_t = intercept + lag eta_(t-1) + zeta_t,
    Var resid_var (t >= 2); y_jt = nu_j + lambda_j eta_t + e_jt with nu, lambda of the marker
    0 and 1; e of the same indicator covary over waves (unique_var on the diagonal,
    unique_cov off it).
    """
    mu = np.empty(T)
    phi = np.empty((T, T))
    mu[0], phi[0, 0] = params["initial_mean"], params["initial_var"]
    for t in range(1, T):
        mu[t] = params["intercept"] + params["lag"] * mu[t - 1]
        phi[t, t] = params["lag"] ** 2 * phi[t - 1, t - 1] + params["resid_var"]
        for s in range(t):  # Cov(eta_s, eta_t) = lag^(t-s) Var(eta_s)
            phi[s, t] = phi[t, s] = params["lag"] ** (t - s) * phi[s, s]
    nu = [0.0, params["intercept[choose]"], params["intercept[persist]"]]
    lam = [1.0, params["loading[choose]"], params["loading[persist]"]]
    L = np.vstack([lam[j] * np.eye(T) for j in range(3)])  # (3T, T)
    theta = np.zeros((3 * T, 3 * T))
    for j, item in enumerate(ITEMS["reading"]):
        for s in range(T):
            for t in range(T):
                theta[j * T + s, j * T + t] = (params[f"unique_var[{item},{t + 1}]"] if s == t
                                               else params[f"unique_cov[{item},{min(s, t) + 1},{max(s, t) + 1}]"])
    mu_y = np.repeat(nu, T) + L @ mu
    return mu, phi, mu_y, L @ phi @ L.T + theta, phi @ L.T


def test_latent_scores_are_the_regression_factor_scores():
    spec, panel, theta = _panel(40, seed=3, missing=0.25)
    params = dict(zip(structure_for(spec, panel).names, theta))
    fit = _at(spec, panel, theta, draws=400)
    table = latent_scores(fit, draws=400, seed=1)
    assert len(table) == panel.n_units * T
    mu, phi, mu_y, sigma, cross = _by_hand(params)
    ys = panel.outcome_matrix()
    z = 1.6448536269514722  # scipy.stats.norm.ppf(0.95)
    for i, unit in enumerate(panel.units):
        seen = ~np.isnan(ys[i])
        # Thomson (1936) regression score over the unit's observed entries
        gain = cross[:, seen] @ np.linalg.inv(sigma[np.ix_(seen, seen)])
        score = mu + gain @ (ys[i, seen] - mu_y[seen])
        sd = np.sqrt(np.diag(phi - gain @ cross[:, seen].T))
        got = table[table["unit"] == unit]
        # one theta, closed form on both sides: agreement to rounding
        np.testing.assert_allclose(got["mean"], score, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(got["sd"], sd, rtol=1e-9, atol=1e-12)
        # 5% and 95% quantiles of 400 normal draws: SE about 0.11 SD; 0.45 SD is four SEs
        np.testing.assert_allclose(got["lower"], score - z * sd, atol=0.45 * sd.max())
        np.testing.assert_allclose(got["upper"], score + z * sd, atol=0.45 * sd.max())
        # observed counts per wave, by pandas on the indicator columns
        frame = pd.DataFrame(panel.y[i], columns=list(panel.observed_names))
        assert list(got["n_observed"]) == list(frame.notna().sum(axis=1))


def test_latent_draws_follow_the_conditional_covariance():
    spec, panel, theta = _panel(12, seed=4)
    params = dict(zip(structure_for(spec, panel).names, theta))
    fit = _at(spec, panel, theta, draws=4000)
    eta = latent_draws(fit, [panel.units[0]], draws=4000, seed=2)
    assert eta.shape == (4000, 1, 1, T)
    mu, phi, mu_y, sigma, cross = _by_hand(params)
    gain = cross @ np.linalg.inv(sigma)
    cond = phi - gain @ cross.T
    # 4000 draws: SE of a covariance entry about sqrt(2/4000) * 0.5 = 0.011; 0.05 is over 4 SEs
    np.testing.assert_allclose(np.cov(eta[:, 0, 0].T), cond, atol=0.05)
    np.testing.assert_allclose(eta[:, 0, 0].mean(axis=0),
                               mu + gain @ (panel.outcome_matrix()[0] - mu_y), atol=0.05)


def test_latent_score_errors_name_the_problem():
    spec, panel, theta = _panel(12, seed=4)
    fit = _at(spec, panel, theta, draws=10)
    with pytest.raises(DataError, match="`interval` of latent_scores must be a number between 0 and 1"):
        latent_scores(fit, interval=90)
    with pytest.raises(DataError, match="unit 'nobody' is not in the fitted panel"):
        latent_scores(fit, ["nobody"])
    with pytest.raises(DataError, match="needs a fit made by bl.fit"):
        latent_draws(object())


@pytest.fixture(scope="module")
def approx():
    spec, panel, theta = _panel(200, seed=5, missing=0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.BoundaryWarning)
        return approximate_fit(spec, panel, draws=150, chains=2, seed=1)


def test_ppc_reports_each_indicator_and_wave(approx):
    fit = approx
    reps = replicate(fit, draws=20, seed=0)
    assert reps.shape == (20, 200, T, 3)
    np.testing.assert_array_equal(np.isnan(reps[0]), np.isnan(fit.panel.y))
    table = ppc(fit, draws=200, seed=0)
    means = table[table["statistic"] == "mean"]
    assert list(dict.fromkeys(means["indicator"])) == ITEMS["reading"]
    assert set(means["process"]) == {"reading"}
    # observed wave means and lag-1 correlations per indicator, by pandas (skipping NaN)
    frame = fit.panel.to_long()
    for item in ITEMS["reading"]:
        expected = frame.groupby("wave")[item].mean().to_numpy()
        np.testing.assert_allclose(means.loc[means["indicator"] == item, "observed"], expected)
        wide = frame.pivot(index="unit", columns="wave", values=item)
        cors = [wide[t - 1].corr(wide[t]) for t in range(2, T + 1)]
        got = table[(table["statistic"] == "lag1_cor") & (table["indicator"] == item)]
        np.testing.assert_allclose(got["observed"], cors)
    # data from the fitted model: no p-value beyond 0.01 / 0.99 (seeded data and draws)
    assert table["p_value"].between(0.01, 0.99).all(), table[~table["p_value"].between(0.01, 0.99)]
    fig = plot_ppc(table, statistics=("mean", "lag1_cor"))
    labels = [ax.get_ylabel() for ax in fig.axes]
    assert "reading / choose:\nwave mean" in labels


def test_trajectories_with_indicators(approx):
    fit = approx
    unit = fit.panel.units[0]
    out = trajectories(fit, [unit], draws=50, seed=1)
    assert len(out) == 3 * T and list(dict.fromkeys(out["indicator"])) == ITEMS["reading"]
    latent = trajectories(fit, [unit], kind="latent", draws=50, seed=1)
    # one latent per wave; it is measured with error, so nothing observed stands for it
    assert len(latent) == T and latent["observed"].isna().all()
    scores = latent_scores(fit, [unit], draws=50, seed=1)
    # both are the posterior of eta_t given the unit's data: means agree within the
    # posterior spread of 50 draws (tolerance: a fifth of the latent's posterior SD)
    np.testing.assert_allclose(latent["mean"], scores["mean"], atol=0.2 * scores["sd"].max())
    # the outcome bands are drawn per indicator
    fig = plot_trajectories(out)
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert legend[::2] == [f"{item}: predicted" for item in ITEMS["reading"]]


def test_plot_latent_scores_shows_latents_beside_their_indicators(approx, tmp_path):
    fit = approx
    fig = plot_latent_scores(fit, max_units=4, draws=40)
    assert sum(ax.get_visible() for ax in fig.axes) == 4
    assert fig.axes[0].get_title() == "unit 1: reading"
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert legend == ["reading (latent), 90% interval", "reading (latent), posterior mean",
                      "enjoy (on the marker's scale)", "choose (on the marker's scale)",
                      "persist (on the marker's scale)"]
    fig.savefig(tmp_path / "scores.png", dpi=80)
    assert (tmp_path / "scores.png").read_bytes()[:4] == b"\x89PNG"


@pytest.mark.filterwarnings("ignore::bayeslong.ConvergenceWarning")
def test_checks_and_scores_on_a_small_bayesian_fit(tmp_path):
    from bayeslong.infer.sampling import load_fit

    spec, panel, _ = _panel(60, seed=6, missing=0.1)
    fit = bl.fit(spec, panel, draws=100, tune=150, chains=2, seed=3, progressbar=False)
    # a saved fit keeps its indicators: the panel and the draws come back as they were
    loaded = load_fit(fit.save(tmp_path / "fit.nc"))
    assert loaded.panel == panel and loaded.structure.names == fit.structure.names
    np.testing.assert_array_equal(loaded.theta_draws(), fit.theta_draws())
    fit = loaded
    table = ppc(fit, draws=100, seed=0)
    # 3 indicators x (4 means + 4 SDs + 3 lag-1 correlations + 1 share rising)
    assert len(table) == 3 * (T + T + (T - 1) + 1)
    assert table["p_value"].between(0.0, 1.0).all()
    scores = latent_scores(fit, draws=100, seed=0)
    assert len(scores) == 60 * T
    assert (scores["lower"] < scores["mean"]).all() and (scores["mean"] < scores["upper"]).all()
    # a unit missing every indicator at a wave is predicted from its other waves: its
    # interval there is wider than at its observed waves (closed form: the conditional
    # variance given fewer indicators is larger)
    # a unit with fewer indicators observed at a wave is less certain of its latent there
    # (closed form: the conditional variance given fewer indicators is larger); wave 3 only,
    # as the unique variances differ by wave
    at3 = scores[scores["wave"] == 3]
    fewer, full = at3["n_observed"] < 3, at3["n_observed"] == 3
    assert fewer.sum() >= 5, at3["n_observed"].value_counts()
    assert at3.loc[fewer, "sd"].mean() > at3.loc[full, "sd"].mean()


# --------------------------------------------------------------------------------------------
# the measurement part by wave
# --------------------------------------------------------------------------------------------


def test_wave_measurement_places_each_value_at_its_indicator_and_wave():
    spec, panel, theta = _panel(30, seed=3)
    fit = _at(spec, panel, theta, draws=5)
    table = measurement_table(fit)
    assert len(table) == 3 * T and list(dict.fromkeys(table["indicator"])) == ITEMS["reading"]
    for _, row in table.iterrows():
        item, wave = row["indicator"], row["wave"]
        loading = 1.0 if item == "enjoy" else TRUE[f"loading[{item}]"]
        intercept = 0.0 if item == "enjoy" else TRUE[f"intercept[{item}]"]
        # values placed in the matrices and read back: exact up to rounding
        assert row["loading"] == pytest.approx(loading, abs=1e-12)
        assert row["intercept"] == pytest.approx(intercept, abs=1e-12)
        assert row["unique_var"] == pytest.approx(_value(f"unique_var[{item},{wave}]"), abs=1e-12)
        assert row["loading fixed"]  # every draw is the same theta here


def test_wave_measurement_marks_the_marker_fixed_and_gives_intervals():
    spec, panel, theta = _panel(30, seed=3)
    st = structure_for(spec, panel)
    rng = np.random.default_rng(0)
    draws = theta + 0.01 * rng.standard_normal((50, len(theta)))  # jittered draws
    table = wave_measurement(st, panel, draws, interval=0.8)
    marker = table[table["indicator"] == "enjoy"]
    assert marker["loading fixed"].all() and marker["intercept fixed"].all()
    other = table[table["indicator"] == "choose"]
    assert not other["loading fixed"].any()
    assert (other["loading lower"] < other["loading"]).all()
    assert (other["loading"] < other["loading upper"]).all()
    with pytest.raises(DataError, match="`interval` must be between 0 and 1"):
        wave_measurement(st, panel, theta, interval=80)
