"""Tests of bayeslong.fit: NUTS fits, per-unit log-likelihood, diagnostics, save/load.

Sampling runs are tiny (2 chains x 300 draws on an 18-unit panel) and share one compiled
model through the per-structure cache; long recovery runs are marked slow.
"""

import warnings

import numpy as np
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.errors import ConvergenceWarning, SpecError
from bayeslong.infer.sampling import CAREFUL_DRAWS_FACTOR, fit, load_fit
from bayeslong.model.moments import moments_at
from bayeslong.model.structure import build_structure


@pytest.fixture(scope="module")
def sleep_fit(sleep_panel):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # judged by the tests below
        return fit(bl.model("linear-growth"), sleep_panel, draws=300, tune=300, chains=2, seed=1,
                   sampler="pymc", progressbar=False)


@pytest.fixture(scope="module")
def sleep_missing(sleepstudy):
    d = sleepstudy.copy()
    subjects = d["Subject"].unique()
    drop = ((d["Subject"] == subjects[0]) & (d["Days"] >= 7)) | \
           ((d["Subject"] == subjects[3]) & d["Days"].isin([2, 5])) | \
           ((d["Subject"] == subjects[5]) & (d["Days"] == 0))
    d.loc[drop, "Reaction"] = np.nan
    return bl.Panel.from_long(d, unit="Subject", wave="Days", outcomes=["Reaction"])


@pytest.fixture(scope="module")
def bad_fit(sleep_missing):
    # A deliberately bad fit: 1 chain of 20 draws after 20 warm-up iterations.
    with pytest.warns(ConvergenceWarning, match=r"(r_hat|ess_bulk|ess_tail) .* (>=|<=) ") as record:
        result = fit(bl.model("linear-growth"), sleep_missing, draws=20, tune=20, chains=1, seed=3,
                     sampler="pymc", progressbar=False)
    return result, record


def test_bad_fit_warns_naming_parameter_and_threshold(bad_fit):
    _, record = bad_fit
    message = str(record[0].message)
    # thresholds of Vehtari et al. (2021): R-hat < 1.01, ESS > 100 per chain
    assert "Vehtari et al. (2021)" in message and "1.01" in message
    assert any(name in message for name in ("level_mean", "slope_mean", "resid_var"))


def test_a_flagged_run_is_sampled_again_more_carefully(bad_fit):
    # 20 draws of one chain fail the ESS checks, so the default fit samples once more at the
    # careful target acceptance and says why; the kept run is the second one
    result, _ = bad_fit
    assert result.target_accept == 0.95
    assert "failed the convergence checks" in result.rerun and "again at 0.95" in result.rerun


def test_a_given_target_accept_is_used_without_a_rerun(sleep_missing):
    with pytest.warns(ConvergenceWarning):
        result = fit(bl.model("linear-growth"), sleep_missing, draws=20, tune=20, chains=1,
                     seed=3, sampler="generic", progressbar=False, target_accept=0.9)
    assert result.target_accept == 0.9 and result.rerun == ""
    for bad in (1.0, 0, "high", -0.5):
        with pytest.raises(SpecError, match="target_accept=.*between 0 and 1"):
            fit(bl.model("linear-growth"), sleep_missing, target_accept=bad)


def test_unit_loglik_equals_scipy_with_missing_waves(bad_fit, sleep_missing):
    # Reference: scipy.stats.multivariate_normal.logpdf of each unit's observed waves, with
    # the linear-growth moments written out by hand: mean_t = level_mean + slope_mean t,
    # Cov = Z G Z' + resid_var I, Z = [1, t], t = 0..9 (days), G the level/slope covariance.
    result, _ = bad_fit
    ll = result.idata.log_likelihood["y"]
    assert ll.dims == ("chain", "draw", "unit")
    assert list(ll["unit"].values) == list(sleep_missing.units)
    post = result.idata.posterior
    t = np.arange(sleep_missing.n_waves, dtype=float)
    Z = np.column_stack([np.ones_like(t), t])
    y = sleep_missing.y[:, :, 0]
    for d in (0, 7, 19):  # spot-checked draws
        p = {k: float(post[k].values[0, d]) for k in result.structure.names}
        mean = p["level_mean"] + p["slope_mean"] * t
        G = np.array([[p["level_var"], p["level_slope_cov"]], [p["level_slope_cov"], p["slope_var"]]])
        cov = Z @ G @ Z.T + p["resid_var"] * np.eye(len(t))
        for i in range(sleep_missing.n_units):
            o = ~np.isnan(y[i])
            ref = stats.multivariate_normal(mean[o], cov[np.ix_(o, o)]).logpdf(y[i, o])
            # tolerance: double precision on log densities of size ~50
            assert float(ll.values[0, d, i]) == pytest.approx(ref, abs=1e-8)


def test_sleepstudy_posterior_near_mixedlm(sleep_fit, sleepstudy):
    # Reference: statsmodels MixedLM, ML, random intercept and slope (Belenky et al. 2003 data).
    smf = pytest.importorskip("statsmodels.formula.api")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("Reaction ~ Days", sleepstudy, groups=sleepstudy["Subject"],
                          re_formula="~Days").fit(reml=False)
    post = sleep_fit.idata.posterior
    for name, ml in (("level_mean", ref.fe_params["Intercept"]), ("slope_mean", ref.fe_params["Days"])):
        draws = post[name].values.ravel()
        # within 0.1 posterior SD (the criterion): in this balanced design the GLS
        # estimate does not depend on the variances, so only prior and Monte Carlo error
        # (about 0.05 SD with ~400 effective draws) separate the two.
        assert abs(draws.mean() - ml) < 0.1 * draws.std()
    # Published ML residual SD 25.5918 (lme4 documentation of this example; statsmodels'
    # scale gives the same). 5% is the tolerance.
    resid_sd = np.median(np.sqrt(post["resid_var"].values))
    assert resid_sd == pytest.approx(25.5918, rel=0.05)


def test_posterior_names_dims_and_draw_matrix(sleep_fit):
    post = sleep_fit.idata.posterior
    assert set(post.data_vars) == set(sleep_fit.structure.names)
    assert all(post[n].dims == ("chain", "draw") for n in post.data_vars)
    theta = sleep_fit.theta_draws()
    # a careful re-run keeps CAREFUL_DRAWS_FACTOR times the draws per chain (infer/sampling.py)
    per_chain = post.sizes["draw"]
    assert per_chain == 300 * (CAREFUL_DRAWS_FACTOR if sleep_fit.rerun else 1)
    assert theta.shape == (post.sizes["chain"] * per_chain, sleep_fit.structure.n_params)
    j = sleep_fit.structure.names.index("slope_var")
    np.testing.assert_array_equal(theta[:, j], post["slope_var"].values.reshape(-1))
    # a covariance is sd_level * sd_slope * r with |r| <= 1 (LKJ block)
    r = post["level_slope_cov"] / np.sqrt(post["level_var"] * post["slope_var"])
    assert float(abs(r).max()) <= 1.0
    assert {"observed_data", "sample_stats", "log_likelihood"} <= set(sleep_fit.idata.groups())


def test_diagnostics_and_summary_flags(sleep_fit, bad_fit):
    diag = sleep_fit.diagnostics()
    assert list(diag.columns) == ["r_hat", "ess_bulk", "ess_tail", "flag"]
    assert set(diag.attrs) >= {"divergences", "ebfmi", "treedepth_share", "thresholds"}
    assert len(diag.attrs["ebfmi"]) == 2
    # R-hat and ESS agree with ArviZ on the same draws (reference library)
    import arviz as az
    assert diag.loc["slope_mean", "r_hat"] == pytest.approx(
        float(az.rhat(sleep_fit.idata.posterior[["slope_mean"]])["slope_mean"]), rel=1e-12)
    # E-BFMI by the formula of Betancourt (2016), written out here:
    # sum_n (E_n - E_(n-1))^2 / sum_n (E_n - mean E)^2 per chain
    e = sleep_fit.idata.sample_stats["energy"].values
    ebfmi = np.sum(np.diff(e, axis=1) ** 2, axis=1) / np.sum((e - e.mean(axis=1, keepdims=True)) ** 2, axis=1)
    # tolerance: the same sums in another order (ArviZ), double precision
    np.testing.assert_allclose(diag.attrs["ebfmi"], ebfmi, rtol=1e-8)
    summary = bad_fit[0].summary()
    assert "flag" in summary.columns
    assert (summary["flag"] != "").any()  # 20 draws: ESS below 100 per chain somewhere


def test_priors_table_and_override(sleep_panel, sleep_fit):
    table = sleep_fit.priors()
    assert table.loc["resid_var", "family"] == "halfnormal"
    assert set(table["source"]) == {"default"}
    with pytest.raises(SpecError, match="valid names are"):
        fit(bl.model("linear-growth"), sleep_panel, priors={"lag": ("normal", 0, 1)})
    with pytest.raises(SpecError, match="`sampler` must be one of auto, generic, nutpie, pymc"):
        fit(bl.model("linear-growth"), sleep_panel, sampler="hmc")
    with pytest.raises(SpecError, match="`draws` of fit must be at least 1; got 0"):
        fit(bl.model("linear-growth"), sleep_panel, draws=0)


def test_save_load_round_trip(sleep_fit, tmp_path):
    path = sleep_fit.save(tmp_path / "fit.nc")
    back = load_fit(path)
    assert back.spec == sleep_fit.spec
    assert back.panel == sleep_fit.panel
    np.testing.assert_array_equal(back.theta_draws(), sleep_fit.theta_draws())
    np.testing.assert_array_equal(back.idata.log_likelihood["y"].values,
                                  sleep_fit.idata.log_likelihood["y"].values)
    assert back.priors().equals(sleep_fit.priors())
    assert back.diagnostics()["flag"].tolist() == sleep_fit.diagnostics()["flag"].tolist()
    assert (back.target_accept, back.rerun) == (sleep_fit.target_accept, sleep_fit.rerun)
    with pytest.raises(SpecError, match="no fit file at"):
        load_fit(tmp_path / "missing.nc")


# ---------------------------------------------------------------------------------------
# recovery on simulated alt data (slow: minutes with PyMC's NUTS on 2 cores)
# ---------------------------------------------------------------------------------------
ALT_TRUE = {"level_mean": 10.0, "slope_mean": 1.0, "lag": 0.4, "initial_mean": 10.0,
            "level_var": 4.0, "level_slope_cov": 0.3, "slope_var": 0.5, "initial_level_cov": 2.0,
            "initial_slope_cov": 0.2, "initial_var": 5.0}


def _simulate_alt(n, seed, t=6):
    # y ~ N(c, Sigma) from the implied moments at the true values (numpy, independent draws)
    spec = bl.model("alt")
    structure = build_structure(spec, outcomes=["y"], n_waves=t)
    theta = np.array([ALT_TRUE.get(nm, 1.5) for nm in structure.names])  # resid_var[t] = 1.5
    c, _, sigma = moments_at(structure, theta)
    y = np.random.default_rng(seed).multivariate_normal(c, sigma, size=n)
    panel = bl.Panel(units=tuple(range(n)), waves=tuple(range(1, t + 1)), outcomes=("y",),
                     y=y[:, :, None])
    return spec, panel, dict(zip(structure.names, theta))


@pytest.mark.slow
def test_alt_recovery_and_lag_sd_shrinks():
    spec, panel, truth = _simulate_alt(500, seed=20261201)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        big = fit(spec, panel, draws=500, tune=500, chains=2, seed=5, sampler="pymc",
                  progressbar=False)
    post = big.idata.posterior
    for name, value in truth.items():
        lo, hi = np.quantile(post[name].values, [0.05, 0.95])
        assert lo <= value <= hi, f"{name}: 90% interval [{lo:.3f}, {hi:.3f}] misses {value}"
    _, small_panel, _ = _simulate_alt(100, seed=20261202)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        small = fit(spec, small_panel, draws=500, tune=500, chains=2, seed=5, sampler="pymc",
                    progressbar=False)
    # posterior SD of the lag shrinks roughly as 1/sqrt(N): at 5x the units it must be smaller
    assert float(post["lag"].std()) < float(small.idata.posterior["lag"].std())


@pytest.mark.slow
def test_nutpie_fit_agrees_with_mixedlm(sleep_panel, sleepstudy):
    # nutpie's first compile takes minutes on 2 cores (numba), hence slow.
    pytest.importorskip("nutpie")
    smf = pytest.importorskip("statsmodels.formula.api")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("Reaction ~ Days", sleepstudy, groups=sleepstudy["Subject"],
                          re_formula="~Days").fit(reml=False)
        result = fit(bl.model("linear-growth"), sleep_panel, draws=500, tune=500, chains=2,
                     seed=1, sampler="nutpie", progressbar=False)
    assert result.sampler == "nutpie"
    draws = result.idata.posterior["slope_mean"].values.ravel()
    # same criterion as the PyMC test: within 0.1 posterior SD of the ML estimate
    assert abs(draws.mean() - ref.fe_params["Days"]) < 0.1 * draws.std()
    assert result.idata.log_likelihood["y"].shape == (2, 500, sleep_panel.n_units)


# --- the sampler's start point ---------------------------------------------------------------
def _small_alt_panel(seed: int = 3, n_units: int = 50):
    """An invented ALT panel, T = 5, drawn with NumPy at fixed values (bench/_panels.py's)."""
    spec = bl.model("alt")
    s = build_structure(spec, outcomes=["y"], n_waves=5)
    truth = {"level_mean": 10.0, "slope_mean": 1.0, "lag": 0.4, "initial_mean": 10.0,
             "level_var": 4.0, "level_slope_cov": 0.3, "slope_var": 0.5,
             "initial_level_cov": 2.0, "initial_slope_cov": 0.2, "initial_var": 5.0}
    c, _, sigma = moments_at(s, np.array([truth.get(n, 1.5) for n in s.names]))
    y = np.random.default_rng(seed).multivariate_normal(c, sigma, size=n_units)
    return spec, bl.Panel(units=tuple(range(n_units)), waves=tuple(range(1, 6)), outcomes=("y",),
                          y=y[:, :, None])


def _gradient_at(spec, panel, theta_of):
    """The PyMC model's log-density gradient at the sampler's start built from ``theta_of``."""
    from pymc.initial_point import make_initial_point_fn

    from bayeslong.infer import sampling
    from bayeslong.infer.priors import resolve_priors
    from bayeslong.infer.pymc_model import build_model
    from bayeslong.model import start
    from bayeslong.model.structure import structure_for

    s = structure_for(spec, panel)
    ps = resolve_priors(s, panel, None)
    model = build_model(spec, panel, ps)
    real = start.sampler_start
    start.sampler_start = lambda *a, **k: theta_of(s, panel)
    try:
        point = sampling._start_point(model, s, panel, ps, seed=1)
    finally:
        start.sampler_start = real
    ip = make_initial_point_fn(model=model, overrides=point, jitter_rvs=set(),
                               return_transformed=True)(0)
    return model.compile_dlogp()(ip)


def test_sampler_start_has_no_zero_gradient_entry():
    # At the data-based start the first-wave mean is the sample mean of wave 1 and the
    # centre of its default prior, so that gradient entry is 0.0 exactly on this panel
    # (found by scanning seeds). A sampler that sets its first mass matrix from the
    # gradient's magnitudes should not start on such a point.
    from bayeslong.model.start import sampler_start, start_values

    spec, panel = _small_alt_panel()
    before = _gradient_at(spec, panel, start_values)
    assert (before == 0).any()
    now = _gradient_at(spec, panel, lambda s, p: sampler_start(s, p, seed=1))
    assert np.all(np.isfinite(now)) and np.all(np.abs(now) > 1e-6)


def _hard_alt_panel(seed: int = 0, n_units: int = 20):
    """An invented ALT panel on a test-score scale (mean 100, SD 15) with a slope variance
    near zero (0.01), T = 5: the kind of panel on which nutpie failed to start."""
    spec = bl.model("alt")
    s = build_structure(spec, outcomes=["y"], n_waves=5)
    truth = {"level_mean": 100.0, "slope_mean": 2.0, "lag": 0.3, "initial_mean": 100.0,
             "level_var": 150.0, "level_slope_cov": 0.0, "slope_var": 0.01,
             "initial_level_cov": 100.0, "initial_slope_cov": 0.0, "initial_var": 225.0}
    c, _, sigma = moments_at(s, np.array([truth.get(n, 60.0) for n in s.names]))
    y = np.random.default_rng(seed).multivariate_normal(c, sigma, size=n_units)
    return spec, bl.Panel(units=tuple(range(n_units)), waves=tuple(range(1, 6)), outcomes=("y",),
                          y=y[:, :, None])


def test_nutpie_starts_from_the_nudged_point_where_the_data_based_one_failed(monkeypatch):
    # Measured with bench/small_start.py: on this panel nutpie refused the data-based start
    # ("All initialization points failed") under the default and the tight lag prior, and
    # the fit fell back to PyMC's NUTS at 80-150 s; from the nudged start it samples.
    pytest.importorskip("nutpie")
    from bayeslong.infer import sampling
    from bayeslong.infer.priors import resolve_priors
    from bayeslong.infer.pymc_model import model_inputs
    from bayeslong.model import start
    from bayeslong.model.structure import structure_for

    spec, panel = _hard_alt_panel()
    s = structure_for(spec, panel)
    ps = resolve_priors(s, panel, None)
    # a fresh compile, whatever other tests compiled for this structure before
    monkeypatch.setattr(sampling, "_COMPILED", {})
    entry, _ = sampling._entry(spec, panel, s, ps)
    inputs = model_inputs(panel, ps)
    settings = dict(draws=50, tune=50, chains=2, cores=1, seed=0, progressbar=False, names=s.names,
                    target_accept=0.8)
    real = start.sampler_start
    start.sampler_start = lambda st, p, seed=0: start.start_values(st, p)
    try:
        old = sampling._start_point(entry["model"], s, panel, ps, seed=0)
    finally:
        start.sampler_start = real
    with pytest.raises(RuntimeError, match="initializ"):
        sampling._sample_nutpie(entry, inputs, old, **settings)
    # our flat start vector is in nutpie's own order: at compile time nutpie kept the start
    # it was given, and its initial-point function returns exactly that vector
    from pymc.initial_point import make_initial_point_fn

    model = entry["model"]
    ip = make_initial_point_fn(model=model, overrides=old, jitter_rvs=set(),
                               return_transformed=True)(0)
    flat = np.concatenate([np.asarray(ip[model.rvs_to_values[rv].name]).ravel()
                           for rv in model.free_RVs])
    np.testing.assert_array_equal(entry["nutpie"].initial_point_func(0), flat)
    # the compiled model is reused, so this also checks that each fit's own start replaces
    # the one nutpie kept from the compile (the failing start above)
    new = sampling._start_point(entry["model"], s, panel, ps, seed=0)
    idata, _, _ = sampling._sample_nutpie(entry, inputs, new, **settings)
    assert idata.posterior.sizes["draw"] == 50

