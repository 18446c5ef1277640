"""Tests of bayeslong.priors: the default rule, overrides, errors and prior predictive draws."""

import numpy as np
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.infer.priors import prior_draws, prior_predictive, resolve_priors
from bayeslong.model.structure import structure_for


@pytest.fixture(scope="module")
def lg(sleep_panel):
    spec = bl.model("linear-growth")
    return spec, structure_for(spec, sleep_panel)


def test_default_rule_on_sleepstudy_scale(sleepstudy, sleep_panel, lg):
    # The rule of default_priors, worked by hand from the raw data with pandas:
    # m = mean of Reaction at the first day, s = SD (ddof=1) of all Reaction values.
    m = sleepstudy.loc[sleepstudy["Days"] == 0, "Reaction"].mean()
    s = sleepstudy["Reaction"].std(ddof=1)
    ps = resolve_priors(lg[1], sleep_panel)
    assert ps["level_mean"].family == "normal"
    assert ps["level_mean"].args == pytest.approx((m, 3 * s + abs(m)), rel=1e-12)
    assert ps["slope_mean"].args == pytest.approx((0.0, s), rel=1e-12)
    assert ps["resid_var"].family == "halfnormal" and ps["resid_var"].target == "sd"
    assert ps["resid_var"].args == pytest.approx((s,), rel=1e-12)
    assert ps["level_slope_cov"].family == "lkj" and ps["level_slope_cov"].args == (2.0,)
    table = ps.table()
    assert table.loc["level_slope_cov", "on"].startswith("correlation (LKJ over the block level_var, slope_var")
    assert set(table["source"]) == {"default"}


def test_lag_and_effect_defaults(grunfeld):
    # Grunfeld (1958) firm panel with a time-varying covariate; alt with x.
    g = grunfeld[grunfeld["year"] <= 1940]
    panel = bl.Panel.from_long(g, unit="firm", wave="year", outcomes=["inv"], time_varying=["value"])
    ps = resolve_priors(structure_for(bl.model("alt"), panel), panel)
    s_y = g["inv"].std(ddof=1)  # pooled outcome SD (pandas)
    s_x = g["value"].std(ddof=1)  # pooled covariate SD (pandas)
    assert ps["lag"].args == (0.0, 0.5)
    assert ps["effect[value]"].args == pytest.approx((0.0, 2.5 * s_y / s_x), rel=1e-12)


def test_override_changes_table_and_hyper(sleep_panel, lg):
    ps = resolve_priors(lg[1], sleep_panel, {"slope_mean": ("student_t", 3, 0, 20),
                                             "resid_var": ("exponential", 0.1),
                                             "level_slope_cov": ("lkj", 4)})
    table = ps.table()
    assert table.loc["slope_mean", "family"] == "student_t"
    assert table.loc["slope_mean", "arguments"] == "nu=3, mu=0, sigma=20"
    assert table.loc["slope_mean", "source"] == "user"
    assert table.loc["resid_var", "family"] == "exponential"
    assert table.loc["level_slope_cov", "arguments"] == "eta=4"
    sl = ps.hyper_slices()["slope_mean"]
    assert ps.hyper[sl].tolist() == [3.0, 0.0, 20.0]
    # same families -> same graph key; other families -> another key
    assert ps.key != resolve_priors(lg[1], sleep_panel).key
    assert resolve_priors(lg[1], sleep_panel, {"slope_mean": ("normal", 1, 2)}).key == \
        resolve_priors(lg[1], sleep_panel).key


@pytest.mark.parametrize("priors, match", [
    ({"lagg": ("normal", 0, 1)}, r"'lagg'.*not a parameter of model 'linear-growth'.*valid names are: level_mean"),
    ({"slope_mean": ("cauchy", 0, 1)}, r"unknown family 'cauchy'; families are normal, student_t"),
    ({"slope_mean": ("normal", 0)}, r"takes 2 argument\(s\) \(mu, sigma\); got 1"),
    ({"slope_mean": ("normal", 0, -1)}, r"normal needs sigma > 0"),
    ({"resid_var": ("normal", 0, 1)}, r"prior is on its standard deviation, which must be positive"),
    ({"level_slope_cov": ("normal", 0, 1)}, r"give \('lkj', eta\)"),
    ({"level_var": ("exponential", 1.0)}, r"variances of one covariance block take their SD priors from one family"),
    ({"slope_mean": 3.0}, r"must be a tuple \(family, \*arguments\)"),
], ids=["unknown-name", "unknown-family", "arity", "negative-scale", "variance-real", "cov-not-lkj",
        "block-mixed", "not-a-tuple"])
def test_bad_priors_raise_spec_error(sleep_panel, lg, priors, match):
    with pytest.raises(SpecError, match=match):
        resolve_priors(lg[1], sleep_panel, priors)


def test_lkj_prior_draws_match_beta_marginal(sleep_panel, lg):
    # Lewandowski, Kurowicka & Joe (2009): for a 2 x 2 LKJ(eta) correlation matrix,
    # (r + 1) / 2 ~ Beta(eta, eta). Independent draws, so a KS test applies; alpha 0.001
    # keeps a false alarm rare while a wrong eta (e.g. 1 vs 3) fails by far with n = 4000.
    for eta in (1.0, 3.0):
        ps = resolve_priors(lg[1], sleep_panel, {"level_slope_cov": ("lkj", eta)})
        theta = prior_draws(ps, draws=4000, seed=3)
        i = lg[1].names
        r = theta[:, i.index("level_slope_cov")] / np.sqrt(
            theta[:, i.index("level_var")] * theta[:, i.index("slope_var")])
        assert stats.kstest((r + 1) / 2, stats.beta(eta, eta).cdf).pvalue > 1e-3


def test_prior_predictive_moments_closed_form(sleep_panel, lg):
    # Linear growth, wave 1: y = level + e, so under the priors (independent):
    # E[y_1] = E[level_mean] = m and Var[y_1] = Var(level_mean) + E[level_var] + E[resid_var]
    # = (3s + |m|)^2 + s^2 + s^2   (E[sd^2] = sigma^2 for a half-normal sd; worked by hand).
    scale = sleep_panel.summary_scale()["Reaction"]
    m, s = scale["mean"], scale["sd"]
    pp = prior_predictive(lg[0], sleep_panel, draws=3000, seed=11)
    assert pp["Reaction"].dims == ("draw", "unit", "wave")
    assert pp["Reaction"].shape == (3000, sleep_panel.n_units, sleep_panel.n_waves)
    y1 = pp["Reaction"].isel(wave=0, unit=0).values
    sd_expected = np.sqrt((3 * s + abs(m)) ** 2 + 2 * s**2)
    # Monte Carlo tolerance: 5 standard errors of the mean, and 10% on the SD (3000 draws
    # of a near-normal quantity give an SD with relative SE of about 1.3%).
    assert y1.mean() == pytest.approx(m, abs=5 * sd_expected / np.sqrt(3000))
    assert y1.std() == pytest.approx(sd_expected, rel=0.10)
    assert "lag" not in pp and "level_mean" in pp
