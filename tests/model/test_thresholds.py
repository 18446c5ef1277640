"""The categorical part of a model: thresholds, the fixed values that identify it, simulation.

Expected values: the identification rules of docs/model-family.md ("Categorical
indicators") written out by hand for each model, and closed-form category probabilities
Phi(tau_c - mu) - Phi(tau_(c-1) - mu) of the ordered probit (McKelvey & Zavoina 1975,
J. Math. Sociology 4(1), eq. 2) for the simulation check.
"""

import numpy as np
import pytest
from scipy.stats import norm

import bayeslong as bl
from bayeslong.model.thresholds import categorical_design


def test_unlinked_waves_fix_the_first_threshold_and_the_wave_disturbances():
    cat = categorical_design(bl.model("waves-apart"), outcomes=("y",), n_waves=3,
                             n_categories={"y": 4}, time_varying=("x",))
    # first threshold fixed at 0, later ones free and equal over waves
    assert cat.thresholds == ("threshold[y,2]", "threshold[y,3]")
    assert cat.cuts["y"].tolist() == [[-1, 0, 1]] * 3
    # a disturbance nothing carries is the response's error: fixed at 0
    assert cat.pinned == {"resid_var[1]": 0.0, "resid_var[2]": 0.0, "resid_var[3]": 0.0}
    # the response's error, variance 1 under the probit, sits in Theta
    np.testing.assert_array_equal(np.diag(cat.structure.matrices["Theta"].fixed), [1.0] * 3)
    assert "intercept[1]" in cat.names and "threshold[y,1]" not in cat.names


def test_logit_error_variance_and_thresholds_free_over_waves():
    cat = categorical_design(bl.model("waves-apart", link="logit", thresholds="free"),
                             outcomes=("y",), n_waves=3, n_categories={"y": 3})
    np.testing.assert_allclose(np.diag(cat.structure.matrices["Theta"].fixed), np.pi**2 / 3)
    assert cat.thresholds == ("threshold[y,2,1]", "threshold[y,2,2]", "threshold[y,2,3]")


def test_a_lag_keeps_disturbances_free_except_the_last_waves():
    free = categorical_design(bl.model("alt"), outcomes=("y",), n_waves=5, n_categories={"y": 2})
    assert free.pinned == {"resid_var[5]": 0.0}  # wave 5 carries to nothing
    assert free.thresholds == ()  # binary: the one cut is 0
    equal = categorical_design(bl.model("alt", residuals="equal"), outcomes=("y",), n_waves=5,
                               n_categories={"y": 2})
    assert equal.pinned == {}
    ri = categorical_design(bl.model("random-effects"), outcomes=("y",), n_waves=5,
                            n_categories={"y": 2})
    assert ri.pinned == {"resid_var": 0.0} and "level_var" in ri.names


def test_categorical_indicator_of_a_latent_has_unit_unique_variance():
    spec = bl.model("alt", unique_covariance="none")
    cat = categorical_design(spec, outcomes=("sleep",), n_waves=3,
                             indicators={"sleep": ("a", "b", "c")}, n_categories={"b": 3})
    assert cat.pinned == {"unique_var[b,1]": 1.0, "unique_var[b,2]": 1.0, "unique_var[b,3]": 1.0}
    assert "intercept[b]" in cat.names and cat.thresholds == ("threshold[b,2]",)
    with pytest.raises(bl.SpecError, match=r"categorical indicator 'b' has unique covariances "
                       r"over waves .* choose unique_covariance='none'"):
        categorical_design(bl.model("alt"), outcomes=("sleep",), n_waves=3,
                           indicators={"sleep": ("a", "b", "c")}, n_categories={"b": 3})


def test_simulated_categories_follow_the_ordered_probit():
    params = {"intercept": 0.4, "effect[x]": 0.0, "threshold[y,2]": 0.9}
    spec = bl.model("waves-apart", intercepts="equal")
    panel = bl.Simulation(spec=spec, params=params, n_units=40_000, n_waves=3, seed=5,
                          covariates={"x": ("normal", 0, 1)}, categorical={"y": 3}).panel()
    assert panel.categories == {"y": (1, 2, 3)}
    share = np.array([(panel.y[:, :, 0] == c).mean() for c in range(3)])
    # closed form: P(c) = Phi(tau_c - mu) - Phi(tau_(c-1) - mu), tau = (-inf, 0, 0.9, inf)
    cuts = np.array([-np.inf, 0.0, 0.9, np.inf]) - 0.4
    expected = np.diff(norm.cdf(cuts))
    np.testing.assert_allclose(share, expected, atol=4 * np.sqrt(0.25 / (40_000 * 3)))


def test_simulation_refuses_a_value_for_a_fixed_parameter():
    with pytest.raises(bl.SpecError, match=r"params\['resid_var'\] is 0.5, but with categorical "
                       r"indicators the model fixes it at 0"):
        bl.simulate(bl.model("random-effects"), {"level_mean": 0.0, "level_var": 1.0,
                                                 "resid_var": 0.5}, 10, 3, seed=1,
                    categorical={"y": "binary"})
