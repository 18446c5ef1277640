"""Lag sensitivity, power-scaling and small-sample planning.

References used below: a naive re-implementation of the cumulative Jensen-Shannon
power-scaling diagnostic written from the paper (Kallioinen, Paananen, Bürkner & Vehtari
2024, Statistics and Computing 34, eqs. for CJS and the log2-derivative), scipy densities,
the Beta form of the 2x2 LKJ density, and direct calls of `bl.fit_ml`.
"""

import types

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.evaluate.planning import plan
from bayeslong.evaluate.sensitivity import (
    LagSensitivity,
    lag_models,
    lag_parameter,
    log_prior_draws,
    power_scaling,
    scaled_variance_priors,
)
from bayeslong.infer.batch import SerialExecutor
from bayeslong.infer.priors import prior_draws, resolve_priors
from bayeslong.model.simulation import Simulation
from bayeslong.model.structure import structure_for

AR = {"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0, "initial_var": 1.0, "resid_var": 1.0}


# --- power-scaling ---------------------------------------------------------------------------
def _naive_cjs(x, w):
    """CJS distance between the ECDF of draws x and their w-weighted ECDF, straight from
    Kallioinen et al. (2024), eq. (8)-(9) (after Nguyen & Vreeken 2015), symmetrised over
    x and -x as the paper does for the two tails."""
    def one(x, w):
        o = np.argsort(x)
        x, w = x[o], w[o] / w.sum()
        dx = np.diff(x)
        P = np.arange(1, len(x)) / len(x)
        Q = np.cumsum(w)[:-1]
        M = 0.5 * (P + Q)
        with np.errstate(divide="ignore", invalid="ignore"):
            pq = np.nansum(dx * P * np.log2(np.where(P > 0, P / M, 1.0)))
            qp = np.nansum(dx * Q * np.log2(np.where(Q > 0, Q / M, 1.0)))
        pq += (np.sum(dx * Q) - np.sum(dx * P)) / (2 * np.log(2))
        qp += (np.sum(dx * P) - np.sum(dx * Q)) / (2 * np.log(2))
        return np.sqrt((max(pq, 0) + max(qp, 0)) / (np.sum(dx * P) + np.sum(dx * Q)))
    return max(one(x, w), one(-x, w))


def _naive_psens(x, log_component, delta=0.01):
    """Sensitivity = [CJS(alpha = 1/(1+d)) + CJS(alpha = 1+d)] / (2 log2(1+d)), with plain
    importance weights p^(alpha-1) (no smoothing: with d = 0.01 they are near uniform)."""
    out = 0.0
    for alpha in (1 / (1 + delta), 1 + delta):
        lw = (alpha - 1) * log_component
        out += _naive_cjs(x, np.exp(lw - lw.max()))
    return out / (2 * np.log2(1 + delta))


def _conjugate_fit(tau, n=50, seed=0):
    """Exact posterior draws of mu in y_i ~ N(mu, 1), mu ~ N(0, tau^2) (conjugate by hand:
    precision n + 1/tau^2, mean sum(y) / precision), wrapped as a Fit-shaped object."""
    rng = np.random.default_rng(seed)
    y = rng.normal(1.0, 1.0, size=n)
    prec = n + 1 / tau ** 2
    mu = rng.normal(y.sum() / prec, 1 / np.sqrt(prec), size=(2, 1000))
    ll = stats.norm.logpdf(y[None, None, :], mu[..., None], 1.0)
    lp = stats.norm.logpdf(mu, 0.0, tau)
    idata = az.from_dict(posterior={"mu": mu}, log_likelihood={"y": ll}, dims={"y": ["unit"]})
    idata.add_groups(log_prior=xr.Dataset({"mu": (("chain", "draw"), lp)},
                                          coords={"chain": [0, 1], "draw": np.arange(1000)}))
    structure = types.SimpleNamespace(names=("mu",))
    return types.SimpleNamespace(idata=idata, structure=structure), mu.ravel(), lp.ravel(), ll.sum(-1).ravel()


@pytest.mark.parametrize("tau", [0.05, 10.0], ids=["strong-prior", "vague-prior"])
def test_power_scaling_matches_the_paper_formula(tau):
    fit, mu, lp, ll = _conjugate_fit(tau)
    table = power_scaling(fit)
    # naive re-implementation from the paper; PSIS smoothing vs raw weights differ by
    # O(1e-3) relative at delta = 0.01, so 5% is ample and still catches a wrong formula
    assert table.loc["mu", "prior"] == pytest.approx(_naive_psens(mu, lp), rel=0.05)
    assert table.loc["mu", "likelihood"] == pytest.approx(_naive_psens(mu, ll), rel=0.05)


def test_power_scaling_flags_a_strong_prior_not_a_vague_one():
    # tau = 0.05 against n = 50 observations of SD 1 (data SE 0.14): the prior carries most
    # of the information, so the posterior moves when it is scaled; tau = 10 does not.
    strong = power_scaling(_conjugate_fit(0.05)[0]).loc["mu"]
    vague = power_scaling(_conjugate_fit(10.0)[0]).loc["mu"]
    assert strong["prior"] >= 0.05 > vague["prior"]  # 0.05: the paper's threshold
    assert strong["diagnosis"] == "prior-data conflict"  # prior pulls mu from ~1 to ~0.1
    assert vague["diagnosis"] == ""


def test_log_prior_draws_match_scipy_densities():
    # clpm has 2x2 covariance blocks: the LKJ(eta) density of a 2x2 correlation r is that of
    # (r + 1)/2 ~ Beta(eta, eta) (Lewandowski et al. 2009, sect. 3.2), independent of our kernel
    sim = Simulation(spec=bl.model("clpm"), params={
        "intercept[y1]": 1.0, "intercept[y2]": 0.0, "lag[y1<-y1]": 0.5, "lag[y1<-y2]": 0.1,
        "lag[y2<-y1]": 0.0, "lag[y2<-y2]": 0.4, "initial_mean[y1]": 0.0, "initial_mean[y2]": 0.0,
        "initial_var[y1]": 1.0, "initial_cov[y1,y2]": 0.2, "initial_var[y2]": 1.0,
        "resid_var[y1]": 1.0, "resid_cov[y1,y2]": 0.1, "resid_var[y2]": 1.0},
        n_units=60, n_waves=4, seed=2)
    panel = sim.panel()
    structure = structure_for(sim.spec, panel)
    prior_set = resolve_priors(structure, panel, {"lag[y1<-y1]": ("student_t", 4, 0.2, 0.3),
                                                  "initial_cov[y1,y2]": ("lkj", 3.0)})
    theta = prior_draws(prior_set, draws=40, seed=1)
    posterior = {n: theta[:, j].reshape(2, 20) for j, n in enumerate(structure.names)}
    fit = types.SimpleNamespace(structure=structure, panel=panel, prior_set=prior_set,
                                idata=az.from_dict(posterior=posterior), theta_draws=lambda: theta)
    ours = log_prior_draws(fit).ravel()
    naive = np.zeros(len(theta))
    for j, (name, p) in enumerate(zip(structure.names, prior_set.priors)):
        x = theta[:, j]
        if p.family == "normal":
            naive += stats.norm.logpdf(x, *p.args)
        elif p.family == "student_t":
            naive += stats.t.logpdf(x, p.args[0], p.args[1], p.args[2])
        elif p.family == "halfnormal":  # the prior is on the SD
            naive += stats.halfnorm.logpdf(np.sqrt(x), scale=p.args[0])
    for cov, v1, v2 in (("initial_cov[y1,y2]", "initial_var[y1]", "initial_var[y2]"),
                        ("resid_cov[y1,y2]", "resid_var[y1]", "resid_var[y2]")):
        i, a, b = (structure.names.index(k) for k in (cov, v1, v2))
        r = theta[:, i] / np.sqrt(theta[:, a] * theta[:, b])
        eta = prior_set[cov].args[0]
        naive += stats.beta.logpdf((r + 1) / 2, eta, eta)
    # equal up to one constant (normalising constants are irrelevant to power-scaling weights)
    diff = ours - naive
    np.testing.assert_allclose(diff, diff[0], atol=1e-8)


# --- pieces of the sensitivity table ---------------------------------------------------------
def test_lag_models_and_parameters():
    panel = Simulation(spec=bl.model("ar"), params=AR, n_units=20, n_waves=4, seed=1).panel()
    names = lag_models(panel)
    # every univariate catalog model with a constant lag (models/*.toml), alt first
    assert names == ["alt", "ar", "dual-change", "free-growth-lag", "level-lag"]
    assert lag_parameter(bl.model("dual-change"), ["y"]) == "proportional_change"
    assert lag_parameter(bl.model("clpm"), ["a", "b"]) == "lag[a<-a]"
    assert lag_parameter(bl.model("alt", lag="time-varying"), ["y"]) is None


def test_variance_prior_scaling():
    panel = Simulation(spec=bl.model("ar"), params=AR, n_units=40, n_waves=4, seed=1).panel()
    spec = bl.model("ar")
    base = resolve_priors(structure_for(spec, panel), panel)
    scaled = scaled_variance_priors(spec, panel, 2.0, {"lag": ("normal", 0, 1)})
    # default SD priors are HalfNormal(pooled SD) (bayeslong.priors rule): doubled here
    assert scaled["resid_var"] == ("halfnormal", 2.0 * base["resid_var"].args[0])
    assert scaled["initial_var"] == ("halfnormal", 2.0 * base["initial_var"].args[0])
    assert scaled["lag"] == ("normal", 0, 1)  # other overrides kept
    assert set(scaled) == {"lag", "resid_var", "initial_var"}


def test_plot_and_flags_from_a_table():
    table = pd.DataFrame({
        "axis": ["default", "prior", "prior", "power-scaling"],
        "setting": ["default priors", "lag ~ normal(0, 0.1)", "lag ~ normal(0, 10)", "prior"],
        "model": ["alt"] * 4, "parameter": ["lag"] * 4, "mean": [0.3, 0.1, 0.31, 0.3],
        "sd": [0.1, 0.05, 0.1, 0.1], "q5": [0.14, 0.02, 0.15, 0.14],
        "q95": [0.46, 0.18, 0.47, 0.46], "shift": [0, -2, 0.1, 0],
        "sign_change": [False] * 4, "flag": [False, True, False, False]})
    fig = LagSensitivity(table=table, reference="alt").plot()
    ax = fig.axes[0]
    assert len(ax.get_yticklabels()) == 3  # power-scaling rows are not intervals
    assert ax.get_yticklabels()[0].get_text() == "default: default priors (alt)"


# --- planning with maximum likelihood (fast) --------------------------------------------------
def test_plan_with_ml_matches_a_hand_loop():
    spec = bl.model("ar")
    out = plan(spec, AR, n_units=[40], n_waves=[4], replications=3, kind="fit_ml", seed=5,
               fit_kwargs={"starts": 1, "check": False},
               executor=SerialExecutor(),
               progress=False)
    # reference: the same three panels (same seeds, drawn by plan's rule) fitted by hand
    seeds = np.random.SeedSequence(5).generate_state(6)
    est, se = [], []
    for r in range(3):
        panel = Simulation(spec=spec, params=AR, n_units=40, n_waves=4, seed=int(seeds[2 * r])).panel()
        ml = bl.fit_ml(spec, panel, starts=1, check=False, seed=int(seeds[2 * r + 1]) % 2**31)
        est.append(ml.params["lag"])
        se.append(ml.se["lag"])
    est, se = np.array(est), np.array(se)
    z = stats.norm.ppf(0.95)  # Wald 90% interval
    row = out.iloc[0]
    assert row["truth"] == 0.5 and row["n_ok"] == 3 and row["n_failed"] == 0
    assert row["bias"] == pytest.approx(est.mean() - 0.5, abs=1e-9)
    assert row["bias_se"] == pytest.approx(est.std(ddof=1) / np.sqrt(3), abs=1e-9)
    assert row["coverage"] == pytest.approx(np.mean((est - z * se <= 0.5) & (0.5 <= est + z * se)))
    assert row["power"] == pytest.approx(np.mean(est - z * se > 0))
    assert row["post_sd"] == pytest.approx(se.mean(), abs=1e-9)


def test_plan_and_sensitivity_refuse_models_without_a_lag():
    with pytest.raises(SpecError, match="model 'linear-growth' has no constant lag"):
        plan(bl.model("linear-growth"), {}, replications=2)
    panel = Simulation(spec=bl.model("ar"), params=AR, n_units=20, n_waves=4, seed=1).panel()
    with pytest.raises(SpecError, match="model 'linear-growth' has no constant lag"):
        bl.lag_sensitivity(panel, models=["linear-growth"])


# --- with bl.fit ---------------------------------------------------------------------------
ALT = dict(level_mean=2.0, slope_mean=0.5, lag=0.3, initial_mean=2.0, level_var=1.0,
           level_slope_cov=0.1, slope_var=0.1, initial_level_cov=0.5, initial_slope_cov=0.05,
           initial_var=1.5, resid_var=0.5)
#: Tiny runs (one chain of 200 draws, ~100 effective): the Monte Carlo error of a posterior
#: mean is then ~sd/10, small beside the prior-driven moves compared below (worked by
#: conjugate-normal arithmetic: ~0.2 at N = 40, ~0.03 at N = 800, for Normal(0, 0.1)).
SMALL = dict(draws=200, tune=200, chains=1, seed=3)


def _study(n_units, seed):
    return Simulation(spec=bl.model("alt"), params=ALT, n_units=n_units, n_waves=5,
                      seed=seed).panel()


def _check_flags(table):
    # the flag rule re-derived here: the 90% interval's side of zero differs from the
    # default fit's, or the mean moved by more than one posterior SD of the default fit
    ref = table[table["axis"] == "default"].iloc[0]
    side = lambda lo, hi: "above" if lo > 0 else ("below" if hi < 0 else "across")  # noqa: E731
    for _, row in table[table["axis"] != "power-scaling"].iterrows():
        moved = abs(row["mean"] - ref["mean"]) > ref["sd"]
        sign = side(row["q5"], row["q95"]) != side(ref["q5"], ref["q95"])
        assert row["flag"] == (moved or sign)


def test_prior_axis_moves_the_lag_more_in_a_small_study():
    pytest.importorskip("bayeslong.infer.sampling")
    moves = {}
    for n, seed in ((40, 11), (800, 12)):
        result = bl.lag_sensitivity(_study(n, seed), models=["alt"],
                                    prior_grid=[("normal", 0.0, 0.1)], variance_scales=False,
                                    initial=False, specification=False, power_scaling=(n == 40),
                                    fit_kwargs=SMALL)
        t = result.table
        assert list(t["axis"]) == (["default", "prior", "power-scaling", "power-scaling"]
                                   if n == 40 else ["default", "prior"])
        _check_flags(t)
        default = t[t["axis"] == "default"].iloc[0]
        tight = t[t["axis"] == "prior"].iloc[0]
        moves[n] = abs(tight["mean"] - default["mean"])
        if n == 40:
            # Normal(0, 0.1) against ~0.1 posterior SD at N = 40: pulled toward 0 by far
            # more than one SD (conjugate-normal arithmetic: weight ~1/2 on the prior mean)
            assert tight["flag"]
            assert set(result.power_scaling.columns) == {"prior", "likelihood", "diagnosis"}
            assert result.power_scaling.loc["lag", "prior"] >= 0.0
    # the sensible direction: the same prior moves the lag more with less data
    # (expected ~0.2 against ~0.03; the tiny chains' Monte Carlo noise forbids a tighter ratio)
    assert moves[40] > moves[800]


@pytest.mark.slow
def test_full_sensitivity_on_a_small_study(tmp_path):
    pytest.importorskip("bayeslong.infer.sampling")
    result = bl.lag_sensitivity(_study(40, 11), fit_kwargs=SMALL)
    t = result.table
    assert set(t["axis"]) == {"default", "prior", "first wave", "specification", "power-scaling"}
    # the dual change model's lag is 1 + proportional_change (docs/model-family.md, dual change)
    dual = t[(t["axis"] == "specification") & (t["model"] == "dual-change")]
    assert dual.empty or dual["parameter"].iloc[0] == "1 + proportional_change"
    _check_flags(t)
    result.plot().savefig(tmp_path / "forest.png")


@pytest.mark.slow
def test_plan_with_bayes_small():
    pytest.importorskip("bayeslong.infer.sampling")
    out = plan(bl.model("alt"), ALT, n_units=[30, 60, 120], n_waves=[5], replications=4,
               fit_kwargs=dict(draws=300, tune=300, chains=2), progress=False)
    assert list(out["n_ok"]) == [4, 4, 4]
    # posterior SD of the lag shrinks with N (roughly 1/sqrt(N): common practice)
    assert out["post_sd"].is_monotonic_decreasing


def test_settings_equal_to_a_given_fit_are_read_from_it_others_are_refitted(monkeypatch):
    pytest.importorskip("bayeslong.infer.sampling")
    import importlib
    import warnings

    panel = Simulation(spec=bl.model("ar"), params=AR, n_units=60, n_waves=4, seed=2).panel()
    kw = dict(draws=60, tune=60, chains=1, seed=4, sampler="pymc", progressbar=False)
    priors = {"lag": ("normal", 0.2, 0.4)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.ConvergenceWarning)  # a tiny run; not the point
        given = bl.fit(bl.model("ar"), panel, priors=priors, **kw)
    fit_module = importlib.import_module("bayeslong.infer.sampling")
    asked = []

    def stand_in(spec, panel, **kwargs):  # records each refit instead of sampling
        asked.append(kwargs.get("priors"))
        raise RuntimeError("refit asked for")

    monkeypatch.setattr(fit_module, "fit", stand_in)
    result = bl.lag_sensitivity(panel, models=["ar"], prior_grid=[("normal", 0.0, 0.1)],
                                variance_scales=False, initial=False, specification=True,
                                power_scaling=True, fit_kwargs=kw, priors=priors, fits=[given])
    # the default setting (and its specification row) is the given fit: no refit, and its
    # row is the given draws summarised with NumPy; power-scaling came from it too
    assert result.reused == ("default",)
    lag = given.idata.posterior["lag"].values.ravel()
    t = result.table
    for axis in ("default", "specification"):
        row = t[t["axis"] == axis].iloc[0]
        assert row["mean"] == pytest.approx(lag.mean(), rel=1e-12)
        assert row["q95"] == pytest.approx(np.quantile(lag, 0.95), rel=1e-12)
    assert t[t["axis"] == "default"].iloc[0]["setting"] == "priors as given"
    assert set(t[t["axis"] == "power-scaling"]["setting"]) == {"prior", "likelihood"}
    # the prior-grid setting differs from the given fit (its lag prior), so it was refitted,
    # with the lag's prior replaced on top of the given overrides
    assert asked == [{"lag": ("normal", 0.0, 0.1)}]
    assert list(result.failed) == ["prior: lag ~ normal(0, 0.1)"]

    # another seed is another fit: nothing is read from the given one
    asked.clear()
    with pytest.raises(SpecError, match="the default fit of model 'ar' failed"):
        bl.lag_sensitivity(panel, models=["ar"], prior_grid=False, variance_scales=False,
                           initial=False, specification=True, power_scaling=False,
                           fit_kwargs={**kw, "seed": 5}, priors=priors, fits=[given])
    assert asked == [priors]


def test_lag_models_for_three_processes():
    from bayeslong.evaluate.sensitivity import catalog_spec
    from bayeslong.workflow.cli import default_params

    spec = bl.model("clpm", processes=3)
    panel = Simulation(spec=spec, params=default_params(spec, n_waves=4), n_units=20,
                       n_waves=4, seed=1).panel()
    # the catalog models written for several processes (models/*.toml), bivariate-alt first
    assert lag_models(panel) == ["bivariate-alt", "clpm", "ri-clpm"]
    assert catalog_spec("ri-clpm", panel).processes == 3
    assert lag_parameter(spec, panel.outcomes) == "lag[y1<-y1]"


# --- the deviation-SD axis (approximate invariance) ------------------------------------------
def _indicator_study(n_units, seed):
    # invented: three indicators of one process (ALT, scalar invariance)
    params = {**ALT, "loading[b]": 0.8, "loading[c]": 1.2, "unique_var": 0.5, "unique_cov": 0.1,
              "intercept[b]": 1.0, "intercept[c]": -0.5}
    df = bl.simulate(bl.model("alt"), params, n_units, 4, seed=seed, indicators={"y": ["a", "b", "c"]})
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ["a", "b", "c"]})


def test_deviation_sd_axis_refits_an_approximate_invariance_model():
    pytest.importorskip("bayeslong.infer.sampling")
    import warnings

    from bayeslong.infer.diagnostics import _arviz_numpy

    panel = _indicator_study(200, 21)
    approx = bl.model("alt", invariance="approximate")
    kw = dict(draws=300, tune=300, chains=2, seed=3)
    off = dict(prior_grid=False, variance_scales=False, initial=False, specification=False,
               power_scaling=False, fit_kwargs=kw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.ConvergenceWarning)  # small runs; not the point
        result = bl.lag_sensitivity(panel, models=[approx], deviation_sds=[1e-4, 1.0], **off)
        scalar = bl.fit(bl.model("alt"), panel, progressbar=False, **kw)
    t = result.table
    assert list(t["axis"]) == ["default", "deviation SD", "deviation SD"]
    assert list(t["setting"][1:]) == ["deviation_sd 0.0001", "deviation_sd 1"]
    _check_flags(t)
    # a deviation SD of 1e-4 is scalar invariance (Muthén & Asparouhov 2012): the lag's
    # posterior mean as in the scalar fit, within 4 combined Monte Carlo standard errors
    # (the two runs have the same size, so the scalar fit's mcse stands for both)
    tiny = t[t["setting"] == "deviation_sd 0.0001"].iloc[0]
    lag = scalar.idata.posterior["lag"]
    with _arviz_numpy():
        mcse = float(az.mcse(scalar.idata, var_names=["lag"])["lag"])
    assert abs(tiny["mean"] - float(lag.mean())) < 4.0 * np.sqrt(2.0) * mcse
    # offered only where it applies: not for a model with exact invariance
    with pytest.raises(SpecError, match="`deviation_sds` refits .* invariance='scalar'"):
        bl.lag_sensitivity(panel, models=["alt"], deviation_sds=[0.1], **off)


# --- planning with indicators and categorical outcomes ----------------------------------------
AR_ITEMS = {**AR, "loading": 0.8, "intercept[b]": 0.5, "intercept[c]": -0.5, "unique_var": 0.5,
            "unique_cov": 0.1}


def test_plan_with_indicators_matches_a_hand_loop():
    # the simulated panels carry three indicators; the hand loop draws and fits the same ones
    spec = bl.model("ar")
    items = {"y": ["a", "b", "c"]}
    out = plan(spec, AR_ITEMS, n_units=[80], n_waves=[4], replications=2, kind="fit_ml", seed=3,
               fit_kwargs={"starts": 1, "check": False}, executor=SerialExecutor(),
               progress=False, indicators=items)
    seeds = np.random.SeedSequence(3).generate_state(4)
    est = []
    for r in range(2):
        panel = Simulation(spec=spec, params=AR_ITEMS, n_units=80, n_waves=4,
                           seed=int(seeds[2 * r]), indicators=items).panel()
        assert panel.indicators == {"y": ("a", "b", "c")}
        ml = bl.fit_ml(spec, panel, starts=1, check=False, seed=int(seeds[2 * r + 1]) % 2**31)
        est.append(ml.params["lag"])
    row = out.iloc[0]
    assert row["n_ok"] == 2 and row["truth"] == 0.5
    assert row["bias"] == pytest.approx(np.mean(est) - 0.5, abs=1e-9)


def test_plan_refuses_ml_for_categorical_outcomes():
    with pytest.raises(SpecError, match="maximum likelihood is not available for categorical"):
        plan(bl.model("ar"), AR, kind="fit_ml", categorical={"y": "binary"}, replications=2)


@pytest.mark.slow
def test_plan_with_bayes_on_binary_outcomes():
    pytest.importorskip("bayeslong.infer.sampling")
    spec = bl.model("ar")
    truth = {"intercept": 0.0, "lag": 0.5, "initial_mean": 0.0, "initial_var": 1.0,
             "resid_var": 0.6}
    out = plan(spec, truth, n_units=[60], n_waves=[4], replications=2, seed=2,
               categorical={"y": "binary"}, executor=SerialExecutor(), progress=False,
               fit_kwargs=dict(draws=200, tune=200, chains=2))
    row = out.iloc[0]
    assert row["n_ok"] == 2 and row["truth"] == 0.5 and np.isfinite(row["post_sd"])


# --- categorical panels ----------------------------------------------------------------------
BINARY_ALT = {"level_mean": 0.0, "slope_mean": 0.1, "lag": 0.4, "initial_mean": 0.0,
              "level_var": 0.5, "slope_var": 0.05, "level_slope_cov": 0.0, "initial_var": 1.0,
              "initial_level_cov": 0.3, "initial_slope_cov": 0.0, "resid_var": 0.5}


def test_variance_prior_scaling_of_a_categorical_model_leaves_fixed_variances_out():
    # alt with free residual variances on one binary variable fixes the last wave's
    # disturbance variance at 0 (docs/model-family.md, "Identification"), so the scaled
    # priors must not name it (the categorical fit refuses a prior for a fixed parameter)
    spec = bl.model("alt", residuals="free")
    params = {**BINARY_ALT, "resid_var": 0.5}
    panel = Simulation(spec=spec, params=params, n_units=30, n_waves=4, seed=2,
                       categorical={"y": "binary"}).panel()
    scaled = scaled_variance_priors(spec, panel, 2.0, {"lag": ("normal", 0, 1)})
    # a categorical variable's latent response has SD s = 1 for the default priors
    # (docs/model-family.md, "Estimation"), so every SD prior HalfNormal(1) becomes
    # HalfNormal(2) (docs/priors.md: a variance's SD ~ HalfNormal(s))
    assert scaled["lag"] == ("normal", 0, 1)
    assert {k: v for k, v in scaled.items() if k != "lag"} == {
        name: ("halfnormal", 2.0) for name in
        ("level_var", "slope_var", "initial_var", "resid_var[2]", "resid_var[3]")}


def test_log_prior_draws_of_a_categorical_fit_add_the_gap_priors_and_leave_fixed_ones_out():
    # alt with free residual variances on one four-category variable: the categorical model
    # fixes resid_var[4] at 0 (docs/model-family.md, "Identification"), which has no prior
    # in the model, and has two thresholds, the second one the first plus a gap
    # (infer/categorical.py); the reference is a sum of scipy densities at the draws
    from bayeslong.infer.categorical import categorical_priors
    from bayeslong.model.thresholds import categorical_structure

    spec = bl.model("alt", residuals="free")
    params = {**{k: v for k, v in BINARY_ALT.items() if k != "resid_var"},
              "resid_var[2]": 0.5, "resid_var[3]": 0.5, "threshold[y,2]": 0.8,
              "threshold[y,3]": 1.5}
    panel = Simulation(spec=spec, params=params, n_units=30, n_waves=4, seed=2,
                       categorical={"y": 4}).panel()
    cat = categorical_structure(spec, panel)
    assert cat.pinned == {"resid_var[4]": 0.0}
    assert cat.thresholds == ("threshold[y,2]", "threshold[y,3]")
    # LKJ(1) is uniform over correlation matrices (Lewandowski et al. 2009): a constant
    prior_set, gaps = categorical_priors(cat, panel, {"threshold[y,3]": ("gamma", 2.0, 1.5),
                                                      "lag": ("student_t", 4, 0.2, 0.3),
                                                      "level_slope_cov": ("lkj", 1.0)})
    S = 40
    theta = prior_draws(prior_set, draws=S, seed=3)
    theta[:, cat.structure.names.index("resid_var[4]")] = 0.0  # as the fit stores it
    rng = np.random.default_rng(4)
    gap2, gap3 = rng.uniform(0.1, 3.0, size=S), rng.uniform(0.1, 3.0, size=S)
    tau = {"threshold[y,2]": gap2, "threshold[y,3]": gap2 + gap3}
    posterior = {n: theta[:, j].reshape(2, S // 2) for j, n in enumerate(cat.structure.names)}
    posterior.update({n: v.reshape(2, S // 2) for n, v in tau.items()})
    fit = types.SimpleNamespace(structure=cat.structure, panel=panel, prior_set=prior_set,
                                categorical=cat, gaps=gaps, theta_draws=lambda: theta,
                                idata=az.from_dict(posterior=posterior))
    ours = log_prior_draws(fit).ravel()
    naive = stats.halfnorm.logpdf(gap2, scale=3.0) + stats.gamma.logpdf(gap3, 2.0, scale=1 / 1.5)
    for j, (name, p) in enumerate(zip(cat.structure.names, prior_set.priors)):
        x = theta[:, j]
        if name in cat.pinned or p.family == "lkj":
            continue
        if p.family == "normal":
            naive += stats.norm.logpdf(x, *p.args)
        elif p.family == "student_t":
            naive += stats.t.logpdf(x, p.args[0], p.args[1], p.args[2])
        else:  # the prior is on the SD
            assert p.family == "halfnormal", p
            naive += stats.halfnorm.logpdf(np.sqrt(x), scale=p.args[0])
    diff = ours - naive
    assert np.all(np.isfinite(ours))
    np.testing.assert_allclose(diff, diff[0], atol=1e-8)


def _binary_alt_panel():
    spec = bl.model("alt", residuals="equal")
    return spec, Simulation(spec=spec, params=BINARY_ALT, n_units=40, n_waves=4, seed=5,
                            categorical={"y": "binary"}).panel()


# two categorical fits: about 3 min on a loaded 2-core machine, so outside the default pass
@pytest.mark.slow
def test_lag_sensitivity_of_a_binary_panel_refits_and_reads_categorical_fits():
    import warnings

    spec, panel = _binary_alt_panel()
    # 200 warm-up draws: with 30 the step size stays small and sampling takes longer
    kwargs = dict(draws=30, tune=200, chains=2, sampler="pymc", seed=4, loglik_draws=10)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.ConvergenceWarning)
        tight = bl.fit(spec, panel, priors={"lag": ("normal", 0.0, 0.1)}, **kwargs)
    # the default setting is refitted through the categorical path (bl.fit dispatches; the
    # continuous fit would fail on categories), the tight-prior setting is read from the
    # categorical fit given, whose thresholds' gap priors are the defaults
    result = bl.lag_sensitivity(panel, models=[spec], prior_grid=[("normal", 0.0, 0.1)],
                                variance_scales=False, initial=False, specification=False,
                                power_scaling=False,
                                fit_kwargs=kwargs, fits=[tight])
    assert result.failed == {}, result.failed
    assert result.reused == ("prior: lag ~ normal(0, 0.1)",)
    assert list(result.table["axis"]) == ["default", "prior"]
    assert result.skipped == {}
    row = result.table.set_index("setting").loc["lag ~ normal(0, 0.1)"]
    assert row["mean"] == pytest.approx(float(tight.idata.posterior["lag"].mean()), rel=1e-12)
    assert np.isfinite(result.table["mean"]).all() and (result.table["sd"] > 0).all()


@pytest.mark.slow
def test_lag_sensitivity_of_a_binary_panel_refits_prior_and_first_wave_axes():
    spec, panel = _binary_alt_panel()
    kwargs = dict(draws=60, tune=200, chains=2, sampler="pymc", seed=4, loglik_draws=10)
    result = bl.lag_sensitivity(panel, models=[spec], prior_grid=[("normal", 0.0, 0.1)],
                                variance_scales=[2.0], fit_kwargs=kwargs)
    table = result.table.set_index("setting")
    assert result.failed == {}, result.failed
    assert list(result.table["axis"]) == ["default", "prior", "prior", "first wave", "first wave",
                                          "specification", "power-scaling", "power-scaling"]
    assert result.skipped == {}
    # power-scaling on the default fit's draws that carry the marginal log-likelihood
    assert result.power_scaling.attrs["draws"] == 10
    # each row is the categorical fit of its setting: a direct bl.fit under the same prior
    # and seed gives the same draws (person-level latents, thresholds; infer/categorical.py)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.ConvergenceWarning)
        tight = bl.fit(spec, panel, priors={"lag": ("normal", 0.0, 0.1)}, **kwargs)
        other = bl.fit(spec.replace(initial="endogenous"), panel, **kwargs)
    assert type(tight).__name__ == "CategoricalFit"
    lag = tight.idata.posterior["lag"].values
    assert table.loc["lag ~ normal(0, 0.1)", "mean"] == pytest.approx(lag.mean(), rel=1e-12)
    assert table.loc["endogenous", "mean"] == pytest.approx(
        other.idata.posterior["lag"].values.mean(), rel=1e-12)
    # the SD-scale row is a different prior, so a different posterior from the default
    assert table.loc["variance priors: SD scale x2", "mean"] != table.loc["default priors", "mean"]


# the binary ar and level-lag are identified on four waves, binary alt with equal residual
# variances is not (bl.identify: rank 10 of 11 parameters)
BINARY_AR = {"intercept": 0.0, "lag": 0.5, "initial_mean": 0.0, "initial_var": 1.0,
             "resid_var": 1.0}


def test_power_scaling_of_a_categorical_fit_uses_its_thinned_draws_and_flags_a_tight_prior():
    # a three-category ar (one threshold, so one gap prior) under a lag prior of N(-0.5,
    # 0.05) far from the simulated 0.5; the marginal log-likelihood is stored on every
    # second draw (loglik_draws = 200 of 2 x 200), and power-scaling must use exactly those.
    # References: scipy densities for the log prior and the re-implementation from the
    # paper (Kallioinen et al. 2024) for both sensitivities, on the same thinned draws
    import warnings

    spec = bl.model("ar", residuals="equal")
    panel = Simulation(spec=spec, params={**BINARY_AR, "threshold[y,2]": 1.0}, n_units=40,
                       n_waves=4, seed=5, categorical={"y": 3}).panel()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.ConvergenceWarning)
        fit = bl.fit(spec, panel, priors={"lag": ("normal", -0.5, 0.05)}, draws=200, tune=200,
                     chains=2, sampler="pymc", seed=4, loglik_draws=200, progressbar=False)
    assert type(fit).__name__ == "CategoricalFit" and fit.categorical.thresholds == ("threshold[y,2]",)
    table = power_scaling(fit)
    ll = fit.idata.log_likelihood
    assert ll.attrs["thin"] == 2 and table.attrs["draws"] == ll.sizes["chain"] * ll.sizes["draw"] == 200
    assert list(table.index) == list(fit.categorical.names)
    thinned = fit.idata.posterior.sel(draw=ll["draw"].values)
    lp = np.zeros(200)
    for name, p in zip(fit.structure.names, fit.prior_set.priors):
        if name in fit.categorical.pinned:
            continue
        x = thinned[name].values.ravel()
        if p.family == "normal":
            lp += stats.norm.logpdf(x, *p.args)
        else:  # a variance's prior is on its SD
            assert p.family == "halfnormal", p
            lp += stats.halfnorm.logpdf(np.sqrt(x), scale=p.args[0])
    lp += stats.halfnorm.logpdf(thinned["threshold[y,2]"].values.ravel(), scale=3.0)  # gap prior
    lag = thinned["lag"].values.ravel()
    assert table.loc["lag", "prior"] == pytest.approx(_naive_psens(lag, lp), rel=0.05)
    assert table.loc["lag", "likelihood"] == pytest.approx(
        _naive_psens(lag, ll["y"].values.sum(-1).ravel()), rel=0.05)
    # the tight prior is what holds the lag: prior-sensitive (0.05: the paper's threshold)
    assert table.loc["lag", "prior"] >= 0.05
    assert table.loc["lag", "diagnosis"] in ("strong prior / weak likelihood", "prior-data conflict")


def test_lag_sensitivity_of_a_binary_panel_fits_the_identified_models_and_skips_the_others():
    spec = bl.model("ar", residuals="equal")
    panel = Simulation(spec=spec, params=BINARY_AR, n_units=40, n_waves=4, seed=5,
                       categorical={"y": "binary"}).panel()
    kwargs = dict(draws=100, tune=150, chains=2, sampler="pymc", seed=4, loglik_draws=100)
    models = [spec, bl.model("level-lag"), bl.model("alt", residuals="equal")]
    result = bl.lag_sensitivity(panel, models=models, prior_grid=False, variance_scales=False,
                                initial=False, fit_kwargs=kwargs)
    assert result.failed == {}, result.failed
    # alt is not fitted: bl.identify's reason is kept and shown
    why = bl.identify(models[2], panel)
    assert not why.identified and bl.identify(models[1], panel).identified
    assert list(result.skipped) == ["specification: alt"]
    assert f"rank {why.rank} of {why.n_params} parameters" in result.skipped["specification: alt"]
    assert "not identified with these categorical variables" in result.skipped["specification: alt"]
    table = result.table
    assert list(table["axis"]) == ["default", "specification", "specification", "power-scaling",
                                   "power-scaling"]
    spec_rows = table[table["axis"] == "specification"].set_index("model")
    assert list(spec_rows.index) == ["ar", "level-lag"]
    # the ar row is the default fit itself; level-lag a categorical fit of its own
    assert spec_rows.loc["ar", "mean"] == table.loc[0, "mean"]
    assert np.isfinite(spec_rows["mean"]).all() and (spec_rows["sd"] > 0).all()
    # power-scaling of the default fit on its 100 draws with a marginal log-likelihood
    assert result.power_scaling.attrs["draws"] == 100
    ps = table[table["axis"] == "power-scaling"]
    assert list(ps["setting"]) == ["prior", "likelihood"] and np.isfinite(ps["psens"]).all()
