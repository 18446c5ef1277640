"""Bayesian fits of a process measured by several indicators, and approximate invariance.

References: the maximum-likelihood fit of the same model on the same data (``bl.fit_ml``,
which tests/model/test_measurement.py holds to a naive Kronecker-product likelihood scored
by ``scipy.stats.multivariate_normal``); under weak priors the posterior mean differs from
the maximum-likelihood estimate by O(1/N) while the posterior SD is O(1/sqrt(N))
(Bernstein-von Mises; e.g. Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., section
4.1), so at N = 300 the two agree to a fraction of a posterior SD plus Monte Carlo error.
Approximate invariance: Muthén, B. & Asparouhov, T. (2012), Bayesian structural equation
modeling, Psychological Methods 17(3), 313-335 (a deviation prior with a tiny variance is
exact invariance; a wide one leaves the parameters free by wave).
"""

import warnings

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.errors import ConvergenceWarning, SpecError

ITEMS = ["rested", "fell_asleep", "woke_rarely"]
T = 5

#: Invented scenario: a sleep-quality process measured by three items at five waves (ALT,
#: scalar invariance, unique factors covarying over waves). Invented values.
TRUTH = {"level_mean": 2.0, "slope_mean": 0.5, "lag": 0.4, "initial_mean": 2.0, "level_var": 1.0,
         "level_slope_cov": 0.1, "slope_var": 0.1, "initial_level_cov": 0.3,
         "initial_slope_cov": 0.0, "initial_var": 1.5, "resid_var": 0.5,
         "loading[fell_asleep]": 0.8, "loading[woke_rarely]": 1.2,
         "intercept[fell_asleep]": 1.0, "intercept[woke_rarely]": -0.5,
         "unique_var": 0.5, "unique_cov": 0.1}

#: The same with the loading of ``fell_asleep`` drifting over waves (0.8 -> 1.3).
DRIFT = {**{k: v for k, v in TRUTH.items() if k != "loading[fell_asleep]"},
         **{f"loading[fell_asleep,{t}]": v for t, v in zip(range(1, T + 1),
                                                           (0.8, 0.8, 0.9, 1.1, 1.3))}}

SMALL = dict(draws=300, tune=300, chains=2, seed=3, progressbar=False)
LOOKED_AT = ["lag", "loading[fell_asleep]", "loading[woke_rarely]"]


def _panel(truth, spec, seed):
    df = bl.simulate(spec, truth, 300, T, seed=seed, indicators={"y": ITEMS})
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"sleep": ITEMS})


@pytest.fixture(scope="module")
def panel():
    return _panel(TRUTH, bl.model("alt"), 11)


@pytest.fixture(scope="module")
def drift_panel():
    return _panel(DRIFT, bl.model("alt", release={"loading": ["fell_asleep"]}), 12)


def _fit(spec, panel, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return bl.fit(spec, panel, **{**SMALL, **kwargs})


@pytest.fixture(scope="module")
def default_fit(panel):
    return _fit(bl.model("alt"), panel)


@pytest.mark.parametrize("sampler", [
    "auto",
    # the PyMC model: minutes to compile and sample for this graph (15 indicator x wave
    # entries); its log density equals the kernel's (tests/infer/test_generic_logp.py)
    pytest.param("pymc", marks=pytest.mark.slow),
])
def test_default_indicator_fit_is_near_maximum_likelihood(sampler, panel, default_fit):
    # default options: scalar invariance, unique factors covarying over waves
    ml = bl.fit_ml(bl.model("alt"), panel)
    fit = default_fit if sampler == "auto" else _fit(bl.model("alt"), panel, sampler=sampler,
                                                     draws=200, tune=200)
    assert fit.sampler == ("generic" if sampler == "auto" else sampler)
    assert set(fit.idata.posterior.data_vars) >= set(fit.structure.names)
    post = fit.idata.posterior
    for name in LOOKED_AT:
        mean, sd = float(post[name].mean()), float(post[name].std())
        # O(1/N) prior effect + Monte Carlo error (mcse ~ sd / sqrt(ESS), ESS >= ~50 here):
        # well inside 2 posterior SDs (module notes)
        assert abs(mean - ml.params[name]) < 2.0 * sd, (name, mean, ml.params[name], sd)
        # and the truth within 4 posterior SDs (a simulation check, not a tight one)
        assert abs(mean - TRUTH[name]) < 4.0 * sd, (name, mean, sd)


def test_strict_invariance_with_unique_covariances_is_near_maximum_likelihood(panel):
    # strict invariance with the unique factors covarying over waves: each indicator's
    # block is one SD times its LKJ correlation matrix (docs/priors.md); the unique
    # variances and the lag near the ML estimates, within 2 posterior SDs (module notes)
    spec = bl.model("alt", invariance="strict")
    ml = bl.fit_ml(spec, panel)
    post = _fit(spec, panel).idata.posterior
    for name in ["lag", "unique_var[rested]", "unique_var[fell_asleep]", "unique_cov[rested,1,2]"]:
        mean, sd = float(post[name].mean()), float(post[name].std())
        assert abs(mean - ml.params[name]) < 2.0 * sd, (name, mean, ml.params[name], sd)


def _wave_loading(post, name, t):
    return post[f"loading[{name}]"] + post[f"loading_deviation[{name},{t}]"]


def test_tiny_deviation_prior_is_scalar_invariance(drift_panel):
    # d -> 0: the deviations vanish and the model is scalar invariance; the lag's posterior
    # means agree within 4 combined Monte Carlo standard errors (ArviZ's mcse of the mean)
    import arviz as az

    from bayeslong.infer.diagnostics import _arviz_numpy

    fits = [_fit(bl.model("alt"), drift_panel),
            _fit(bl.model("alt", invariance="approximate", deviation_sd=1e-4), drift_panel, seed=4)]
    post = fits[1].idata.posterior
    waves = np.array([float(_wave_loading(post, "fell_asleep", t).mean()) for t in range(1, T + 1)])
    # a deviation's prior SD is 1e-4 s_j / s (about 1e-4 here): the wave loadings are equal
    # to well within 1e-2
    assert np.ptp(waves) < 1e-2
    with _arviz_numpy():
        mcse = [float(az.mcse(f.idata, var_names=["lag"])["lag"]) for f in fits]
    means = [float(f.idata.posterior["lag"].mean()) for f in fits]
    assert abs(means[0] - means[1]) < 4.0 * np.hypot(*mcse), (means, mcse)
    # the SDs: relative Monte Carlo error ~ 1 / sqrt(2 ESS), about 7% at ESS ~ 100 each;
    # 25% is more than three combined
    sds = [float(f.idata.posterior["lag"].std()) for f in fits]
    assert abs(np.log(sds[0] / sds[1])) < 0.25, sds


def test_wide_deviation_prior_frees_the_loadings(drift_panel):
    # d wide: loading + deviation at wave t is free, as in the model whose loadings are free
    # by wave (maximum likelihood with every non-marker loading and intercept released):
    # each wave's posterior mean within 2 posterior SDs of that ML estimate (module notes)
    released = {"loading": ITEMS[1:], "intercept": ITEMS[1:]}
    ml = bl.fit_ml(bl.model("alt", release=released), drift_panel)
    fit = _fit(bl.model("alt", invariance="approximate", deviation_sd=2.0), drift_panel,
               draws=400, tune=400)
    post = fit.idata.posterior
    for t in range(1, T + 1):
        for name in ITEMS[1:]:
            draws = _wave_loading(post, name, t)
            mean, sd = float(draws.mean()), float(draws.std())
            assert abs(mean - ml.params[f"loading[{name},{t}]"]) < 2.0 * sd, (name, t)
    # and the drift shows: wave 5's loading of fell_asleep is above wave 1's (truth 1.3 vs 0.8)
    diff = _wave_loading(post, "fell_asleep", 5) - _wave_loading(post, "fell_asleep", 1)
    assert float((diff > 0).mean()) > 0.95


def test_maximum_likelihood_refuses_approximate_invariance(panel):
    with pytest.raises(SpecError, match=r"invariance='approximate'.*no maximum likelihood "
                                        r"estimate.*bl\.fit"):
        bl.fit_ml(bl.model("alt", invariance="approximate"), panel)


def test_deviation_priors_follow_the_documented_rule(panel):
    # docs/priors.md: Normal(0, d_nu s_j) for an intercept's deviation, Normal(0, d_lambda
    # s_j / s) for a loading's, s_j the indicator's pooled SD (ddof 1) and s the marker's
    from bayeslong.infer.priors import resolve_priors
    from bayeslong.model.structure import structure_for

    spec = bl.model("alt", invariance="approximate", deviation_sd={"loading": 0.1})
    priors = resolve_priors(structure_for(spec, panel), panel)
    y = panel.outcome_matrix()
    s_j = np.nanstd(y[:, T:2 * T], ddof=1)  # fell_asleep's columns, pooled over waves
    s = np.nanstd(y[:, :T], ddof=1)          # the marker's (rested)
    assert priors["intercept_deviation[fell_asleep,3]"].args == pytest.approx((0.0, 0.05 * s_j))
    assert priors["loading_deviation[fell_asleep,3]"].args == pytest.approx((0.0, 0.1 * s_j / s))


@pytest.mark.parametrize("value", [0.0, -1.0, "small", {"loadings": 0.1}])
def test_deviation_sd_errors(value):
    with pytest.raises(SpecError, match="deviation_sd"):
        bl.model("alt", invariance="approximate", deviation_sd=value)


#: Invented scenario: two processes (sleep quality s, mood m), three items each, four waves;
#: the multiple-indicator RI-CLPM at scalar invariance (docs/model-family.md). Invented values.
WITHIN_ITEMS = {"s": ["a", "b", "c"], "m": ["d", "e", "f"]}


def _within_truth():
    items = [j for g in WITHIN_ITEMS.values() for j in g]
    p = {"lag[s<-s]": 0.4, "lag[s<-m]": 0.2, "lag[m<-s]": -0.15, "lag[m<-m]": 0.3,
         "intercept[s]": 0.2, "intercept[m]": -0.1, "initial_var[s]": 1.0, "initial_var[m]": 1.0,
         "initial_cov[s,m]": 0.3, "resid_var[s]": 0.7, "resid_var[m]": 0.7, "resid_cov[s,m]": 0.15,
         "loading[b]": 0.8, "loading[c]": 1.2, "loading[e]": 0.9, "loading[f]": 1.1,
         "intercept[a]": 3.0, "intercept[b]": 2.0, "intercept[c]": 1.0, "intercept[d]": 0.0,
         "intercept[e]": 1.5, "intercept[f]": -1.0, "unique_var": 0.4}
    for i, a in enumerate(items):
        p[f"level_var[{a}]"] = 0.6
        for b in items[:i]:
            p[f"level_cov[{b},{a}]"] = 0.25 if (a in "abc") == (b in "abc") else 0.1
    return p


def test_within_form_with_indicators_is_near_maximum_likelihood():
    # the generic kernel (default sampler) on the multiple-indicator RI-CLPM, 2 short chains
    # at N = 300: the cross-lags' posterior means within 2 posterior SDs of the ML
    # estimates (Bernstein-von Mises, module notes)
    spec = bl.model("ri-clpm")
    df = bl.simulate(spec, _within_truth(), 300, 4, seed=21, indicators=WITHIN_ITEMS,
                     outcomes=list(WITHIN_ITEMS))
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=WITHIN_ITEMS)
    ml = bl.fit_ml(spec, panel)
    fit = _fit(spec, panel, draws=200, tune=300)
    assert fit.sampler == "generic"
    post = fit.idata.posterior
    for name in ["lag[s<-m]", "lag[m<-s]", "lag[s<-s]", "loading[b]"]:
        mean, sd = float(post[name].mean()), float(post[name].std())
        assert abs(mean - ml.params[name]) < 2.0 * sd, (name, mean, ml.params[name], sd)


def test_invariance_levels_are_compared_by_per_unit_psis_loo(panel, default_fit):
    # bl.compare of two invariance levels (scalar, the default, against strict) by PSIS-LOO
    # with one term per unit over all its indicators and waves. References: each term is the
    # unit's observed indicator x wave vector scored by scipy.stats.multivariate_normal under
    # the draw's implied moments; the table's elpd_loo is ArviZ's az.loo (Vehtari, Gelman &
    # Gabry 2017, Statistics and Computing 27(5)) on those terms.
    import arviz as az
    from scipy import stats

    from bayeslong.model.moments import moments_at

    strict = _fit(bl.model("alt", invariance="strict"), panel)
    y = panel.outcome_matrix()  # (N, indicators x waves), the order of the implied moments
    for fit in (default_fit, strict):
        terms = fit.idata.log_likelihood["y"]
        assert terms.sizes["unit"] == panel.n_units == 300  # one term per unit
        flat = terms.values.reshape(-1, panel.n_units)
        for s in (0, 137, 599):
            c, _, sigma = moments_at(fit.structure, fit.theta_draws()[s])
            for i in (0, 41, 299):
                seen = ~np.isnan(y[i])
                ref = stats.multivariate_normal(c[seen], sigma[np.ix_(seen, seen)]).logpdf(y[i, seen])
                assert flat[s, i] == pytest.approx(ref, abs=1e-8)  # float rounding only
    table = bl.compare({"scalar": default_fit, "strict": strict})
    assert set(table.index) == {"scalar", "strict"}
    for name, fit in (("scalar", default_fit), ("strict", strict)):
        assert table.loc[name, "elpd_loo"] == pytest.approx(az.loo(fit.idata).elpd_loo, rel=1e-12)
