"""Tests of bayeslong.build: the PyMC model's log density against hand-written references."""

import numpy as np
import pymc as pm
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.infer.pymc_model import build_model


def _ar_moments(intercept, lag, initial_mean, initial_var, resid_var, T):
    """Naive AR(1) moments with a predetermined first wave, by recursion (written here).

    eta_1 ~ N(initial_mean, initial_var); eta_t = intercept + lag eta_(t-1) + zeta_t,
    Var(zeta_t) = resid_var, zeta independent of the past.
    """
    mean = np.empty(T)
    cov = np.empty((T, T))
    mean[0], cov[0, 0] = initial_mean, initial_var
    for t in range(1, T):
        mean[t] = intercept + lag * mean[t - 1]
        cov[t, :t] = lag * cov[t - 1, :t]
        cov[:t, t] = cov[t, :t]
        cov[t, t] = lag**2 * cov[t - 1, t - 1] + resid_var
    return mean, cov


@pytest.fixture(scope="module")
def sleep_missing(sleepstudy):
    # Drop some days of some subjects, so several missing-data patterns occur.
    d = sleepstudy.copy()
    drop = ((d["Subject"] == d["Subject"].unique()[0]) & (d["Days"] >= 7)) | \
           ((d["Subject"] == d["Subject"].unique()[3]) & (d["Days"].isin([2, 5])))
    d.loc[drop, "Reaction"] = np.nan
    return bl.Panel.from_long(d, unit="Subject", wave="Days", outcomes=["Reaction"])


def test_ar_log_density_equals_scipy(sleep_missing):
    # log p(theta, y) without Jacobians = sum of the prior log densities (scipy, on the
    # standard deviations for variances) + sum over units of the multivariate normal log
    # density of the observed waves (scipy), with moments from the naive recursion above.
    panel = sleep_missing
    spec = bl.model("ar")
    model = build_model(spec, panel, {"lag": ("normal", 0.3, 0.2)})
    point = {"intercept": 120.0, "lag": 0.55, "initial_mean": 250.0, "initial_var__sd": 30.0,
             "resid_var__sd": 35.0}
    value = model.compile_logp(jacobian=False)(
        {**{k: v for k, v in point.items() if "__sd" not in k},
         "initial_var__sd_log__": np.log(30.0), "resid_var__sd_log__": np.log(35.0)})
    # jacobian=False with log-transformed values still evaluates the densities at the
    # natural values; the log-Jacobian terms are left out.
    scale = panel.summary_scale()["Reaction"]
    m, s = scale["mean"], scale["sd"]
    prior = (stats.norm(m, 3 * s + abs(m)).logpdf(120.0) + stats.norm(0.3, 0.2).logpdf(0.55)
             + stats.norm(m, 3 * s + abs(m)).logpdf(250.0)
             + stats.halfnorm(scale=s).logpdf(30.0) + stats.halfnorm(scale=s).logpdf(35.0))
    mean, cov = _ar_moments(120.0, 0.55, 250.0, 30.0**2, 35.0**2, panel.n_waves)
    y = panel.y[:, :, 0]
    loglik = sum(stats.multivariate_normal(mean[~np.isnan(r)], cov[np.ix_(~np.isnan(r), ~np.isnan(r))])
                 .logpdf(r[~np.isnan(r)]) for r in y)
    # tolerance: both sides are double-precision sums of ~200 terms of size ~1e3
    assert value == pytest.approx(prior + loglik, abs=1e-6)


def test_posterior_names_and_data(sleep_panel):
    model = build_model(bl.model("linear-growth"), sleep_panel)
    names = {v.name for v in model.free_RVs} | {v.name for v in model.deterministics}
    assert {"level_mean", "slope_mean", "level_var", "level_slope_cov", "slope_var",
            "resid_var"} <= names
    assert {"counts", "cross", "masks", "prior_hyper"} <= set(model.named_vars)


@pytest.mark.parametrize("eta", [2.0, 4.0])
def test_lkj_block_density_closed_form(sleep_panel, eta):
    # With the data switched off (counts and cross-products 0, so the likelihood is 0)
    # the model's log density is the prior. A 2 x 2 block is sampled as (log sd1, log sd2,
    # y) with the correlation r = tanh(y). Worked by hand: half-normal SD priors with the
    # log transform's Jacobian sd, and LKJ(eta) for 2 x 2, c (1 - r^2)^(eta - 1)
    # (Lewandowski, Kurowicka & Joe 2009), with tanh's Jacobian dr/dy = 1 - r^2:
    #   log HN(sd1) + log sd1 + log HN(sd2) + log sd2 + eta log(1 - r^2) + c.
    # Differences between two points remove c.
    model = build_model(bl.model("linear-growth"), sleep_panel,
                        {"level_slope_cov": ("lkj", 3.0)})
    s = sleep_panel.summary_scale()["Reaction"]["sd"]
    lkj = "lkj__level_var__slope_var"
    with model:
        pm.set_data({"counts": np.zeros(1), "cross": np.zeros((1, 11, 11))})
    from bayeslong.infer.priors import resolve_priors
    from bayeslong.model.structure import structure_for
    ps = resolve_priors(structure_for(bl.model("linear-growth"), sleep_panel), sleep_panel,
                        {"level_slope_cov": ("lkj", eta)})
    with model:
        pm.set_data({"prior_hyper": ps.hyper})  # a new prior value, same compiled graph
    f = model.compile_logp(vars=[model[lkj], model[lkj + "__sd"]] + list(model.potentials)[:1])

    def hand(sd1, sd2, r):
        return (stats.halfnorm(scale=s).logpdf(sd1) + np.log(sd1)
                + stats.halfnorm(scale=s).logpdf(sd2) + np.log(sd2) + eta * np.log(1 - r**2))

    base = {v.name: np.asarray(model.initial_point()[v.name]) for v in model.value_vars}

    def at(sd1, sd2, r):
        point = dict(base)
        point[lkj + "__sd_log__"] = np.log([sd1, sd2])
        point[lkj + "_cpc__"] = np.array([np.arctanh(r)])
        return f(point)

    got = at(20.0, 5.0, 0.6) - at(30.0, 8.0, -0.2)
    # tolerance: double precision arithmetic on O(10) log densities
    assert got == pytest.approx(hand(20.0, 5.0, 0.6) - hand(30.0, 8.0, -0.2), abs=1e-8)


def test_factory_prior_and_wrong_name(sleep_panel):
    model = build_model(bl.model("linear-growth"), sleep_panel,
                        {"slope_mean": lambda name: pm.Normal(name, 10.0, 5.0)})
    assert model["slope_mean"].owner.op.name == "normal"
    with pytest.raises(SpecError, match="must use the name it is given, 'slope_mean'"):
        build_model(bl.model("linear-growth"), sleep_panel,
                    {"slope_mean": lambda name: pm.Normal("other", 10.0, 5.0)})


@pytest.mark.parametrize("q", [3, 4])
def test_partial_correlation_jacobian_by_finite_differences(q):
    # The transform's log-Jacobian against a central-difference Jacobian of y -> the
    # correlations (a map of q(q-1)/2 numbers to as many), and the round trip; the LKJ prior
    # in the sampler's coordinates is LKJ(C) times this Jacobian, so an error here would
    # bias every block's correlations.
    import pytensor
    import pytensor.tensor as pt

    from bayeslong.infer.pymc_model import PartialCorrelations

    tr = PartialCorrelations(q)
    y = pt.dvector("y")
    back = pytensor.function([y], tr.backward(y))
    logjac = pytensor.function([y], tr.log_jac_det(y))
    fwd = pytensor.function([y], tr.forward(y))
    rng = np.random.default_rng(q)
    m = q * (q - 1) // 2
    for _ in range(3):
        y0 = rng.normal(scale=0.8, size=m)
        h = 1e-6
        J = np.column_stack([(back(y0 + h * e) - back(y0 - h * e)) / (2 * h) for e in np.eye(m)])
        # tolerance: central differences with h = 1e-6 on O(1) functions, about 1e-9
        assert logjac(y0) == pytest.approx(np.log(abs(np.linalg.det(J))), abs=1e-6)
        np.testing.assert_allclose(fwd(back(y0)), y0, atol=1e-9)
        corr = np.eye(q)
        corr[np.triu_indices(q, 1)] = back(y0)
        corr = corr + np.triu(corr, 1).T
        assert np.all(np.linalg.eigvalsh(corr) > 0)  # every y gives a correlation matrix


def test_uniform_correlation_draws_have_lkj_marginals():
    # Under LKJ(eta) on q x q matrices each correlation r has (r + 1) / 2 ~
    # Beta(eta - 1 + q / 2, eta - 1 + q / 2) (Lewandowski, Kurowicka & Joe 2009, sec. 3.2);
    # here eta = 1, q = 4: Beta(2, 2). A Kolmogorov-Smirnov test on 4000 draws of each entry.
    from bayeslong.infer.pymc_model import uniform_correlations

    with pm.Model():
        vec = uniform_correlations("c", 4)
    draws = pm.draw(vec, draws=4000, random_seed=3)
    for j in range(draws.shape[1]):
        # p > 0.001: a false alarm once in a thousand runs at most (fixed seed: deterministic)
        assert stats.kstest((draws[:, j] + 1) / 2, stats.beta(2, 2).cdf).pvalue > 1e-3
