"""Pattern-grouped marginal likelihood against SciPy's multivariate normal density."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.infer.likelihood import (
    loglik_function,
    pattern_arrays,
    pattern_values,
    unit_cross,
)
from bayeslong.infer.loglik_op import compiled_loglik_function
from bayeslong.model.moments import moments_at
from bayeslong.model.structure import structure_for


def _panel_with_gaps(seed=3, n=40, T=5):
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        z = rng.normal()
        level = 2 + 0.5 * z + rng.normal()
        for t in range(T):
            x = rng.normal()
            y = level + 0.3 * t + 0.8 * x + rng.normal()
            if t > 0 and rng.uniform() < 0.25:  # intermittent missing outcomes
                y = np.nan
            rows.append({"id": i, "t": t, "y": y, "x": x, "z": z})
    df = pd.DataFrame(rows)
    return bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"], time_varying=["x"],
                              time_invariant=["z"])


def _random_theta(structure, seed=0):
    from bayeslong.model.transform import Unconstrained

    rng = np.random.default_rng(seed)
    return Unconstrained(structure).to_natural(rng.normal(0, 0.5, structure.n_params))


# the NumPy engine (maximum likelihood), and the sampler's graph compiled by PyTensor's C
# backend (PyMC's NUTS; the Op calls the NumPy kernel) and by numba (nutpie; the loop kernel)
ENGINES = {"numpy": loglik_function, "pytensor": compiled_loglik_function,
           "numba": lambda s: compiled_loglik_function(s, mode="NUMBA")}


@pytest.mark.parametrize("engine_name", list(ENGINES))
@pytest.mark.parametrize("name", ["alt", "linear-growth", "level-lag"])
def test_loglik_equals_sum_of_scipy_logpdf_with_missing_waves(name, engine_name):
    panel = _panel_with_gaps()
    assert panel.patterns().n_patterns > 3  # several missing-data patterns in play
    s = structure_for(bl.model(name), panel)
    theta = _random_theta(s, seed=1)
    engine = ENGINES[engine_name](s)(theta, *pattern_arrays(panel.patterns()))[0]
    # Reference: SciPy's multivariate normal on each unit's observed entries, with the
    # conditional mean c + D w_i (independent of the trace/cross-product formulation).
    c, D, Sigma = moments_at(s, theta)
    Y, W = panel.outcome_matrix(), panel.covariate_matrix()
    expected = 0.0
    for y, w in zip(Y, W):
        o = ~np.isnan(y)
        expected += stats.multivariate_normal.logpdf(y[o], (c + D @ w)[o], Sigma[np.ix_(o, o)])
    assert engine == pytest.approx(expected, rel=1e-10)


def test_unit_terms_sum_to_total_and_match_scipy():
    panel = _panel_with_gaps(seed=5)
    s = structure_for(bl.model("alt"), panel)
    theta = _random_theta(s, seed=2)
    c, D, Sigma = moments_at(s, theta)
    per_unit = pattern_values(c, D, Sigma, *unit_cross(panel.outcome_matrix(),
                                                       panel.covariate_matrix()))
    total = loglik_function(s)(theta, *pattern_arrays(panel.patterns()))[0]
    assert per_unit.sum() == pytest.approx(total, rel=1e-10)
    y, w = panel.outcome_matrix()[7], panel.covariate_matrix()[7]
    o = ~np.isnan(y)
    assert per_unit[7] == pytest.approx(
        stats.multivariate_normal.logpdf(y[o], (c + D @ w)[o], Sigma[np.ix_(o, o)]), rel=1e-10)


@pytest.mark.parametrize("engine_name", list(ENGINES))
def test_gradient_matches_finite_differences(engine_name):
    panel = _panel_with_gaps(seed=7)
    s = structure_for(bl.model("alt"), panel)
    theta = _random_theta(s, seed=3)
    f = ENGINES[engine_name](s)
    data = pattern_arrays(panel.patterns())
    _, g = f(theta, *data)
    h = 1e-6
    fd = np.array([(f(theta + h * e, *data)[0] - f(theta - h * e, *data)[0]) / (2 * h)
                   for e in np.eye(len(theta))])
    np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-5)  # central differences, O(h^2)


@pytest.mark.parametrize("name", ["alt", "random-effects", "ri-clpm"])
def test_numpy_and_pytensor_engines_agree(name):
    # the analytic NumPy gradient (moment Jacobian by complex step) against PyTensor's
    # reverse-mode gradient of the sampler's graph, at a random admissible point
    if name == "ri-clpm":
        rng = np.random.default_rng(11)
        df = pd.DataFrame({"id": np.repeat(np.arange(30), 5), "t": np.tile(np.arange(5), 30),
                           "y": rng.normal(size=150), "v": rng.normal(size=150)})
        df.loc[rng.uniform(size=150) < 0.15, "v"] = np.nan
        panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y", "v"])
    else:
        panel = _panel_with_gaps(seed=9)
    s = structure_for(bl.model(name), panel)
    theta = _random_theta(s, seed=4)
    data = pattern_arrays(panel.patterns())
    ll_np, g_np = loglik_function(s)(theta, *data)
    for mode in (None, "NUMBA"):
        ll_pt, g_pt = compiled_loglik_function(s, mode=mode)(theta, *data)
        assert ll_np == pytest.approx(float(ll_pt), rel=1e-12)
        np.testing.assert_allclose(g_np, g_pt, rtol=1e-8, atol=1e-8 * np.abs(g_pt).max())


@pytest.mark.parametrize("engine_name", list(ENGINES))
def test_engines_are_minus_inf_off_the_parameter_space(engine_name):
    panel = _panel_with_gaps(seed=2)
    s = structure_for(bl.model("linear-growth"), panel)
    theta = _random_theta(s, seed=0)
    theta[s.position("resid_var")] = -1.0  # a negative variance: no density, no exception
    ll, g = ENGINES[engine_name](s)(theta, *pattern_arrays(panel.patterns()))
    assert ll == -np.inf and np.all(np.asarray(g) == 0)


def test_expected_information_equals_observed_at_expected_cross_products():
    # A fact of the Gaussian likelihood: when every pattern's cross-products equal their
    # expectation (R_p = n_p Sigma_oo, mean residual 0), the terms of the Hessian that carry
    # residuals vanish and -Hessian equals the expected (Fisher) information exactly.
    from bayeslong.infer.likelihood import expected_information
    from bayeslong.infer.ml import hessian
    from bayeslong.model.moments import moment_jacobian

    panel = _panel_with_gaps(seed=4)
    s = structure_for(bl.model("alt"), panel)
    theta = _random_theta(s, seed=5)
    counts, cross, masks = pattern_arrays(panel.patterns())
    (c, D, Sigma), (dc, dD, dS) = moment_jacobian(s, theta)
    n_w = D.shape[1]
    X = cross[:, :1 + n_w, :1 + n_w]  # keep each pattern's covariate moments
    B = np.concatenate([c[:, None], D], axis=1)  # E[y | w] = B (1, w)
    expected = cross.copy()
    expected[:, 1 + n_w:, :1 + n_w] = np.einsum("yu,Puv->Pyv", B, X)
    expected[:, :1 + n_w, 1 + n_w:] = np.swapaxes(expected[:, 1 + n_w:, :1 + n_w], 1, 2)
    expected[:, 1 + n_w:, 1 + n_w:] = (counts[:, None, None] * Sigma
                                       + np.einsum("yu,Puv,zv->Pyz", B, X, B))
    data = (counts, expected, masks)
    info = expected_information(dc, dD, dS, Sigma, *data)
    H = hessian(loglik_function(s), theta, data)
    np.testing.assert_allclose(info, -H, rtol=1e-5, atol=1e-6 * np.abs(info).max())


@pytest.mark.parametrize("name", ["alt", "free-growth-lag", "fixed-effects", "ri-clpm"])
def test_exact_hessian_equals_differences_of_the_gradient(name):
    # The analytic observed information (with the moments' second derivatives in B and
    # Lam) against central differences of the analytic gradient (relative error ~1e-10),
    # with covariates and missing waves; ri-clpm on two outcomes.
    from bayeslong.infer.likelihood import loglik_and_grad, loglik_grad_hessian
    from bayeslong.infer.ml import hessian

    spec = bl.model(name)
    if spec.processes == 1:
        panel = _panel_with_gaps(seed=6)
    else:
        rng = np.random.default_rng(8)
        y = rng.normal(size=(60, 5, 2)).cumsum(axis=1)
        y[rng.uniform(size=y.shape) < 0.15] = np.nan
        df = pd.DataFrame([{"id": i, "t": t, "a": y[i, t, 0], "b": y[i, t, 1]}
                           for i in range(60) for t in range(5)])
        panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["a", "b"])
    s = structure_for(spec, panel)
    theta = _random_theta(s, seed=9)
    data = pattern_arrays(panel.patterns())
    ll, g, H = loglik_grad_hessian(s, theta, *data)
    ll0, g0 = loglik_and_grad(s, theta, *data)
    assert ll == pytest.approx(ll0, rel=1e-12)
    np.testing.assert_allclose(g, g0, rtol=1e-10, atol=1e-10 * np.abs(g0).max())
    fd = hessian(loglik_function(s), theta, data)
    np.testing.assert_allclose(H, fd, rtol=1e-6, atol=1e-7 * np.abs(fd).max())
