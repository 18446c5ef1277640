"""Simulation from the structural equations against the implied moments and missingness rates.

`bl.simulate` solves eta = a + B eta + G w + zeta by substitution and never calls
`bayeslong.moments`, so the sample moments of a large simulated panel are an independent
check of the moment formulas in `moments.implied_moments` (and the other way round).
"""

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.model.moments import moments_at
from bayeslong.model.simulation import Simulation, simulate

N_BIG = 200_000  # NumPy-only, about a second per panel; SEs below are then ~0.2% of a variance

ALT = dict(level_mean=2.0, slope_mean=0.5, lag=0.3, initial_mean=1.0, level_var=1.0,
           level_slope_cov=0.1, slope_var=0.2, initial_level_cov=0.3, initial_slope_cov=0.05,
           initial_var=1.5, resid_var=0.5)
CLPM = {"intercept[y1]": 1.0, "intercept[y2]": -0.5, "lag[y1<-y1]": 0.5, "lag[y1<-y2]": 0.2,
        "lag[y2<-y1]": -0.1, "lag[y2<-y2]": 0.4, "initial_mean[y1]": 0.0,
        "initial_mean[y2]": 1.0, "initial_var[y1]": 1.0, "initial_cov[y1,y2]": 0.3,
        "initial_var[y2]": 2.0, "resid_var[y1]": 0.8, "resid_cov[y1,y2]": 0.2,
        "resid_var[y2]": 0.6}
RICLPM = {"intercept[y1]": 1.0, "intercept[y2]": 2.0, "lag[y1<-y1]": 0.4, "lag[y1<-y2]": 0.15,
          "lag[y2<-y1]": 0.1, "lag[y2<-y2]": 0.3, "level_var[y1]": 1.0, "level_cov[y1,y2]": 0.4,
          "level_var[y2]": 1.5, "initial_var[y1]": 0.7, "initial_cov[y1,y2]": 0.1,
          "initial_var[y2]": 0.9, "resid_var[y1]": 0.5, "resid_cov[y1,y2]": 0.1,
          "resid_var[y2]": 0.6}
DUAL = dict(level_mean=3.0, slope_mean=1.0, proportional_change=-0.2, level_var=1.0,
            level_slope_cov=0.2, slope_var=0.3, resid_var=0.4)
ALT_X = {**ALT, "effect[x]": 0.4, "level_effect[z]": 0.5, "slope_effect[z]": -0.2,
         "initial_effect[x]": 0.3, "initial_effect[z]": 1.0}

ALT_ENDOGENOUS = {**{k: v for k, v in ALT.items() if not k.startswith("initial")},
                  "lag": 0.6, "initial_on_level": 0.8, "initial_on_slope": 0.2,
                  "initial_intercept": 0.5, "initial_var": 0.7}

CASES = [
    pytest.param("alt", {}, ALT, {}, {}, id="alt"),
    pytest.param("alt", {"initial": "endogenous"}, ALT_ENDOGENOUS, {}, {}, id="alt-endogenous"),
    pytest.param("clpm", {}, CLPM, {}, {}, id="clpm"),
    pytest.param("ri-clpm", {}, RICLPM, {}, {}, id="ri-clpm"),
    pytest.param("dual-change", {}, DUAL, {}, {}, id="dual-change"),
    pytest.param("alt", {}, ALT_X, {"x": ("normal", 1.0, 2.0)}, {"z": ("bernoulli", 0.4)},
                 id="alt-covariates"),
]


@pytest.mark.parametrize("name, options, params, xs, zs", CASES)
def test_large_panel_reproduces_implied_moments(name, options, params, xs, zs):
    spec = bl.model(name, **options)
    T = 4
    sim = Simulation(spec=spec, params=params, n_units=N_BIG, n_waves=T, seed=11,
                     covariates=xs, time_invariant=zs)
    df = sim.data()
    K = len(sim.outcomes)
    Y = np.concatenate([df[o].to_numpy().reshape(N_BIG, T) for o in sim.outcomes], axis=1)
    W = np.concatenate([df[x].to_numpy().reshape(N_BIG, T) for x in xs]
                       + [df[z].to_numpy().reshape(N_BIG, T)[:, :1] for z in zs], axis=1) \
        if xs or zs else np.zeros((N_BIG, 0))
    c, D, Sigma = moments_at(sim.structure, sim.theta())
    assert Sigma.shape == (K * T, K * T)
    # Residuals given the covariates: y - c - D w has mean 0 and covariance Sigma when
    # c, D and Sigma are all right (a wrong D leaves D_err Cov(w) D_err' in the covariance).
    R = Y - c - W @ D.T
    n = N_BIG
    # Sampling error of a normal sample (normal theory, e.g. Anderson 2003, Thm 3.4.4):
    #   SE(mean_i) = sqrt(Sigma_ii / N);  SE(cov_ij) = sqrt((Sigma_ii Sigma_jj + Sigma_ij^2) / N)
    # 5 SE keeps the chance of a false alarm over these <= 100 entries below 1e-4.
    se_mean = np.sqrt(np.diag(Sigma) / n)
    np.testing.assert_array_less(np.abs(R.mean(axis=0)), 5 * se_mean)
    S = np.cov(R, rowvar=False)
    d = np.diag(Sigma)
    se_cov = np.sqrt((np.outer(d, d) + Sigma ** 2) / n)
    np.testing.assert_array_less(np.abs(S - Sigma), 5 * se_cov)
    if xs or zs:
        # the covariates matter in this case: D is far from 0 relative to its SE
        assert np.abs(D).max() > 0.3


def test_missingness_rates_come_out_as_asked():
    d, p, N, T = 0.1, 0.05, 40_000, 5
    df = simulate(bl.model("ar"), {"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0,
                                   "initial_var": 1.0, "resid_var": 1.0},
                  N, T, seed=3, missing={"dropout": d, "intermittent": p})
    seen = ~np.isnan(df["y"].to_numpy().reshape(N, T))
    assert seen[:, 0].all()  # wave 1 never removed: every unit keeps an observation
    # worked by hand: P(observed at t) = (1 - d)^(t-1) (1 - p) for t >= 2
    expected = np.array([1.0] + [(1 - d) ** (t - 1) * (1 - p) for t in range(2, T + 1)])
    se = np.sqrt(expected * (1 - expected) / N) + 1e-12  # binomial SE of a share
    np.testing.assert_array_less(np.abs(seen.mean(axis=0) - expected), 5 * se)
    assert df.shape == (N * T, 3)  # rows kept, outcomes set to missing


def test_dropout_alone_is_monotone():
    N, T = 5_000, 6
    df = simulate(bl.model("ar"), {"intercept": 0.0, "lag": 0.5, "initial_mean": 0.0,
                                   "initial_var": 1.0, "resid_var": 1.0},
                  N, T, seed=4, missing={"dropout": 0.2})
    seen = ~np.isnan(df["y"].to_numpy().reshape(N, T))
    # monotone: once missing, missing at every later wave (seen never goes 0 -> 1)
    assert not (np.diff(seen.astype(int), axis=1) > 0).any()
    # by hand: the share still observed at the last wave is 0.8^5 = 0.32768
    assert abs(seen[:, -1].mean() - 0.8 ** 5) < 5 * np.sqrt(0.32768 * 0.67232 / N)


def test_same_seed_same_panel_and_panel_reads_it():
    args = (bl.model("alt"), {**ALT, "effect[x]": 0.2, "initial_effect[x]": 0.1}, 30, 5)
    a = simulate(*args, seed=7, covariates={"x": ("uniform", 0, 1)})
    b = simulate(*args, seed=7, covariates={"x": ("uniform", 0, 1)})
    c = simulate(*args, seed=8, covariates={"x": ("uniform", 0, 1)})
    assert a.equals(b) and not a.equals(c)
    panel = bl.Panel.from_long(a, unit="unit", wave="wave", outcomes=["y"], time_varying=["x"])
    assert (panel.n_units, panel.n_waves) == (30, 5)


def test_wave_free_name_sets_every_wave():
    spec = bl.model("alt", lag="time-varying")
    sim = Simulation(spec=spec, params=ALT, n_units=5, n_waves=4)
    theta = dict(zip(sim.structure.names, sim.theta()))
    assert theta["lag[2]"] == theta["lag[4]"] == 0.3
    assert theta["resid_var[3]"] == 0.5
    exact = Simulation(spec=spec, params={**ALT, "lag[3]": 0.9}, n_units=5, n_waves=4)
    assert dict(zip(exact.structure.names, exact.theta()))["lag[3]"] == 0.9


@pytest.mark.parametrize("params, match", [
    pytest.param({k: v for k, v in ALT.items() if k != "slope_var"},
                 r"lacks 1 parameter\(s\) of model 'alt' with 4 waves: slope_var", id="missing"),
    pytest.param({**ALT, "lagg": 0.2}, r"'lagg'.*did you mean 'lag'\?", id="unknown"),
    pytest.param({**ALT, "level_slope_cov": 5.0}, r"level_var, level_slope_cov.*not positive "
                 r"semi-definite", id="not-psd"),
    pytest.param({**ALT, "lag": "big"}, r"params\['lag'\] must be a finite number", id="not-number"),
])
def test_bad_params_say_what_to_fix(params, match):
    with pytest.raises(SpecError, match=match):
        simulate(bl.model("alt"), params, 10, 4, seed=1)


@pytest.mark.parametrize("kwargs, match", [
    pytest.param(dict(missing={"drop": 0.1}), r"unknown kind 'drop'; did you mean 'dropout'", id="kind"),
    pytest.param(dict(missing={"dropout": 1.5}), r"missing\['dropout'\] must be a rate in \[0, 1\)",
                 id="rate"),
    pytest.param(dict(covariates={"x": ("gamma", 1)}), r"covariates\['x'\] must be a tuple",
                 id="generator"),
])
def test_bad_options_say_what_to_fix(kwargs, match):
    params = {**ALT, "effect[x]": 0.1, "initial_effect[x]": 0.0} if "covariates" in kwargs else ALT
    with pytest.raises(SpecError, match=match):
        simulate(bl.model("alt"), params, 10, 4, seed=1, **kwargs)
