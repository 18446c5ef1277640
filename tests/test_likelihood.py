"""Pattern-grouped marginal likelihood against SciPy's multivariate normal density."""

import numpy as np
import pandas as pd
import pytensor
import pytensor.tensor as pt
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.likelihood import loglik_function, pattern_arrays, pattern_loglik, unit_cross
from bayeslong.moments import moments_at
from bayeslong.structure import structure_for


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
    from bayeslong._transform import Unconstrained

    rng = np.random.default_rng(seed)
    return Unconstrained(structure).to_natural(rng.normal(0, 0.5, structure.n_params))


@pytest.mark.parametrize("name", ["alt", "linear-growth", "level-lag"])
def test_loglik_equals_sum_of_scipy_logpdf_with_missing_waves(name):
    panel = _panel_with_gaps()
    assert panel.patterns().n_patterns > 3  # several missing-data patterns in play
    s = structure_for(bl.model(name), panel)
    theta = _random_theta(s, seed=1)
    engine = loglik_function(s)(theta, *pattern_arrays(panel.patterns()))[0]
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
    th = pt.dvector()
    counts, cross, masks = unit_cross(panel.outcome_matrix(), panel.covariate_matrix())
    from bayeslong.moments import implied_moments

    f = pytensor.function([th], pattern_loglik(*implied_moments(s, th), counts, cross, masks))
    per_unit = f(theta)
    total = loglik_function(s)(theta, *pattern_arrays(panel.patterns()))[0]
    assert per_unit.sum() == pytest.approx(total, rel=1e-10)
    c, D, Sigma = moments_at(s, theta)
    y, w = panel.outcome_matrix()[7], panel.covariate_matrix()[7]
    o = ~np.isnan(y)
    assert per_unit[7] == pytest.approx(
        stats.multivariate_normal.logpdf(y[o], (c + D @ w)[o], Sigma[np.ix_(o, o)]), rel=1e-10)


def test_gradient_matches_finite_differences():
    panel = _panel_with_gaps(seed=7)
    s = structure_for(bl.model("alt"), panel)
    theta = _random_theta(s, seed=3)
    f = loglik_function(s)
    data = pattern_arrays(panel.patterns())
    _, g = f(theta, *data)
    h = 1e-6
    fd = np.array([(f(theta + h * e, *data)[0] - f(theta - h * e, *data)[0]) / (2 * h)
                   for e in np.eye(len(theta))])
    np.testing.assert_allclose(g, fd, rtol=1e-5, atol=1e-5)  # central differences, O(h^2)
