"""The measurement part with several indicators per wave: structure, naive likelihood,
identification, option errors.

Expected values come from a naive re-implementation written here (the published ALT
equations wave by wave, the measurement part by Kronecker products, scored by
``scipy.stats.multivariate_normal``), from the engine's own single-indicator path (which the
reference tests in tests/infer/test_ml.py hold to statsmodels and published fits), or from
the rank argument of the model family page.
"""

import numpy as np
import pytest
from scipy import linalg, stats

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.infer.likelihood import loglik_and_grad, pattern_arrays
from bayeslong.model.simulation import parameter_vector
from bayeslong.model.start import start_values
from bayeslong.model.structure import build_structure, structure_for

ITEMS = ["a", "b", "c"]
T = 5

#: ALT with three indicators (marker 'a'), scalar invariance, unique factors covarying over waves.
TRUTH = {"level_mean": 2.0, "slope_mean": 0.5, "lag": 0.4, "initial_mean": 2.0, "level_var": 1.0,
         "level_slope_cov": 0.1, "slope_var": 0.1, "initial_level_cov": 0.3,
         "initial_slope_cov": 0.0, "initial_var": 1.5, "resid_var": 0.5,
         "loading[b]": 0.8, "loading[c]": 1.2, "intercept[b]": 1.0, "intercept[c]": -0.5,
         "unique_var[a]": 0.4, "unique_var[b]": 0.5, "unique_var[c]": 0.6, "unique_cov": 0.1}


def _loglik(spec, panel, theta):
    structure = structure_for(spec, panel)
    return loglik_and_grad(structure, theta, *pattern_arrays(panel.patterns()))[0]


def _gapminder_panels(gapminder, outcomes):
    plain = bl.Panel.from_long(gapminder, unit="country", wave="year", outcomes=outcomes)
    renamed = bl.Panel.from_long(gapminder, unit="country", wave="year",
                                 outcomes={f"{o}_process": [o] for o in outcomes})
    return plain, renamed


@pytest.mark.parametrize("name", bl.catalog())
def test_one_indicator_per_wave_is_todays_model(name, gapminder):
    # With one indicator per wave the indicator IS the latent (nu = 0, lambda = 1, no eps):
    # the structure must be the one of today's panels entry for entry, and the
    # log-likelihood the same to 1e-8, whatever the indicator is called.
    spec = bl.model(name)
    outcomes = ["lifeExp"] if spec.processes == 1 else ["lifeExp", "lgdp"]
    plain, renamed = _gapminder_panels(gapminder, outcomes)
    # today's structure, with the processes named as in the renamed panel
    today = build_structure(spec, outcomes=renamed.outcomes, n_waves=plain.n_waves)
    again = structure_for(spec, renamed)
    assert again.names == today.names
    for key, m in today.matrices.items():
        np.testing.assert_array_equal(again.matrices[key].index, m.index)
        np.testing.assert_array_equal(again.matrices[key].fixed, m.fixed)
    theta = start_values(structure_for(spec, plain), plain)
    np.testing.assert_allclose(start_values(again, renamed), theta, rtol=1e-12)
    assert _loglik(spec, renamed, theta) == pytest.approx(_loglik(spec, plain, theta), abs=1e-8)


def _naive_alt_loglik(params, y, lam, nu, T):
    """ALT with indicators, written from the published equations (Bollen & Curran 2004).

    Latents: eta_1 = initial (predetermined first wave), eta_t = level + (t-1) slope +
    lag eta_(t-1) + zeta_t. Their mean and covariance follow from eta = A u with
    u = (initial, level, slope, zeta_2..zeta_T). The indicators, indicator-major
    (all waves of 'a', then 'b', then 'c'): y = nu (x) 1_T + (lambda (x) I_T) eta + eps,
    with eps's covariance block-diagonal over indicators (unique variances on the diagonal,
    one covariance over waves). Scored unit by unit on its observed entries.
    """
    n_u = 3 + (T - 1)
    A = np.zeros((T, n_u))
    A[0, 0] = 1.0
    for t in range(2, T + 1):
        A[t - 1] = params["lag"] * A[t - 2]
        A[t - 1, 1] += 1.0
        A[t - 1, 2] += t - 1
        A[t - 1, 3 + t - 2] = 1.0
    u_mean = np.r_[params["initial_mean"], params["level_mean"], params["slope_mean"], np.zeros(T - 1)]
    g = np.array([[params["initial_var"], params["initial_level_cov"], params["initial_slope_cov"]],
                  [params["initial_level_cov"], params["level_var"], params["level_slope_cov"]],
                  [params["initial_slope_cov"], params["level_slope_cov"], params["slope_var"]]])
    u_cov = linalg.block_diag(g, np.eye(T - 1) * params["resid_var"])
    eta_mean, eta_cov = A @ u_mean, A @ u_cov @ A.T
    L = np.kron(lam[:, None], np.eye(T))
    theta_blocks = [np.full((T, T), params["unique_cov"]) + np.eye(T) * (params[f"unique_var[{j}]"]
                                                                        - params["unique_cov"])
                    for j in ITEMS]
    mean = np.kron(nu, np.ones(T)) + L @ eta_mean
    cov = L @ eta_cov @ L.T + linalg.block_diag(*theta_blocks)
    total = 0.0
    for row in y:
        seen = ~np.isnan(row)
        total += stats.multivariate_normal(mean[seen], cov[np.ix_(seen, seen)]).logpdf(row[seen])
    return total


def test_alt_with_indicators_equals_naive_kronecker_likelihood():
    spec = bl.model("alt")
    rng = np.random.default_rng(5)
    df = bl.simulate(spec, TRUTH, 120, T, seed=4, indicators={"y": ITEMS})
    # knock out single indicators (and some whole waves) at random, never all of a unit
    for item in ITEMS:
        gone = rng.uniform(size=len(df)) < 0.12
        df.loc[gone & (df["wave"] > 1), item] = np.nan
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})
    assert panel.patterns().n_patterns > 20
    structure = structure_for(spec, panel)
    theta = parameter_vector(structure, TRUTH)
    lam = np.array([1.0, TRUTH["loading[b]"], TRUTH["loading[c]"]])
    nu = np.array([0.0, TRUTH["intercept[b]"], TRUTH["intercept[c]"]])
    expected = _naive_alt_loglik(TRUTH, panel.outcome_matrix(), lam, nu, T)
    assert _loglik(spec, panel, theta) == pytest.approx(expected, abs=1e-8)


def test_parameter_names_follow_the_invariance_level():
    def names(**options):
        return build_structure(bl.model("alt", **options), outcomes=("y",), n_waves=3,
                               indicators={"y": tuple(ITEMS)}).names

    scalar = names()
    assert {"loading[b]", "intercept[b]", "unique_var[b,2]", "unique_cov[b,1,3]"} <= set(scalar)
    assert not any(n.startswith(("loading[a", "intercept[a")) for n in scalar)  # the marker
    assert {"loading[b,2]", "intercept[b,2]", "intercept[a,2]"} <= set(names(invariance="configural"))
    assert {"loading[b]", "intercept[b,2]"} <= set(names(invariance="metric"))
    strict = names(invariance="strict", unique_covariance="none")
    assert "unique_var[b]" in strict and not any(n.startswith("unique_cov") for n in strict)
    partial = names(release={"intercept": ["c"]})
    assert {"intercept[b]", "intercept[c,2]", "loading[c]"} <= set(partial)
    assert {"loading[a]", "intercept[a]"} <= set(names(marker="b"))


def test_configural_growth_means_are_not_identified():
    # Below scalar invariance every indicator's intercept is free from wave 2 on (the
    # marker's too), so the indicators' means at those waves are saturated and the growth
    # means that move the latent's mean over waves have no information: the null space of
    # the moment Jacobian holds the growth means and the later intercepts (rank argument,
    # docs/model-family.md, "Identification with indicators").
    df = bl.simulate(bl.model("alt"), TRUTH, 200, T, seed=6, indicators={"y": ITEMS})
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})
    result = bl.identify(bl.model("alt", invariance="configural"), panel)
    assert not result.identified
    assert {"level_mean", "slope_mean"} <= set(result.deficient)
    assert {f"intercept[{j},{t}]" for j in ITEMS for t in range(2, T + 1)} == \
        {n for n in result.deficient if n.startswith("intercept[")}
    assert "lag" not in result.deficient and "initial_mean" not in result.deficient
    assert "need invariance='scalar'" in result.advice
    assert bl.identify(bl.model("alt"), panel).identified
    assert bl.identify(bl.model("alt", release=("c",)), panel).identified
    assert bl.identify(bl.model("alt", invariance="strict"), panel).identified
    with pytest.raises(bl.IdentificationError, match="slope_mean"):
        bl.fit_ml(bl.model("alt", invariance="metric"), panel)


@pytest.mark.parametrize(
    "options, message",
    [
        ({"invariance": "scaler"},
         r"`invariance` in model 'alt' must be one of scalar, configural, metric, strict, "
         r"approximate; got "
         r"'scaler'; did you mean 'scalar'\?"),
        ({"unique_covariance": "all"}, r"`unique_covariance` in model 'alt' must be one of "
                                       r"same-indicator, none; got 'all'"),
        ({"release": {"loadings": ["b"]}}, r"`release` in model 'alt' must be one of loading, "
                                          r"intercept, unique_var; got 'loadings'"),
        ({"scale": "reference"}, r"`scale` in model 'alt' must be one of marker, effects; got "
                                 r"'reference'"),
    ],
    ids=["invariance", "unique-covariance", "release-part", "scale"],
)
def test_measurement_option_errors(options, message):
    with pytest.raises(SpecError, match=message):
        bl.model("alt", **options)


@pytest.mark.parametrize(
    "options, message",
    [
        ({"marker": "bb"}, r"`marker` names 'bb', which is not an indicator of a process measured "
                           r"by several indicators; did you mean 'b'\?"),
        ({"release": ("d",)}, r"`release` names 'd'"),
        ({"release": {"loading": ["a"]}}, r"frees the loading of 'a', the marker indicator"),
        ({"name": "ri-clpm", "unique_covariance": "same-indicator"},
         r"`unique_covariance = \"same-indicator\"` is not identified in model 'ri-clpm' "
         r"\(within-person form"),
    ],
    ids=["marker", "release", "release-marker-loading", "within-form"],
)
def test_measurement_names_are_checked_against_the_panel(options, message):
    name = options.pop("name", "alt")
    spec = bl.model(name, **options)
    outcomes = ("y",) if spec.processes == 1 else ("y", "v")
    indicators = {"y": tuple(ITEMS), "v": ("d", "e", "f")}
    with pytest.raises(SpecError, match=message):
        build_structure(spec, outcomes=outcomes, n_waves=3,
                        indicators={k: indicators[k] for k in outcomes})


def test_measurement_options_round_trip():
    spec = bl.model("alt", invariance="metric", release={"intercept": ["c"]}, marker="b")
    assert spec.measurement["invariance"] == "metric"
    assert spec.measurement["release"]["intercept"] == ("c",)
    assert bl.Spec.from_dict(spec.to_dict()) == spec
    assert spec.replace(invariance="strict").measurement["marker"] == ("b",)


def test_effects_coding_is_the_marker_model_rescaled():
    # Closed form: with marker coding y_j = nu_j + lambda_j eta_m + eps_j (lambda_a = 1,
    # nu_a = 0). Effects coding (Little, Slegers & Card 2006) asks mean(lambda*) = 1 and
    # sum(nu*) = 0, which holds for eta_e = c eta_m + d with c = mean(lambda_j),
    # d = mean(nu_j), lambda*_j = lambda_j / c, nu*_j = nu_j - lambda*_j d. The two are one
    # model (same maximum); the lag is unchanged, a growth mean is multiplied by c.
    df = bl.simulate(bl.model("alt"), TRUTH, 300, T, seed=8, indicators={"y": ITEMS})
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})
    marker = bl.fit_ml(bl.model("alt"), panel)
    effects = bl.fit_ml(bl.model("alt", scale="effects"), panel)
    assert effects.loglik == pytest.approx(marker.loglik, abs=1e-6)
    lam = np.array([1.0, marker.params["loading[b]"], marker.params["loading[c]"]])
    nu = np.array([0.0, marker.params["intercept[b]"], marker.params["intercept[c]"]])
    c, d = lam.mean(), nu.mean()
    assert effects.params["lag"] == pytest.approx(marker.params["lag"], abs=1e-6)
    assert effects.params["slope_mean"] == pytest.approx(c * marker.params["slope_mean"], abs=1e-6)
    assert effects.params["loading[b]"] == pytest.approx(lam[1] / c, abs=1e-6)
    assert effects.params["intercept[c]"] == pytest.approx(nu[2] - lam[2] / c * d, abs=1e-6)
    assert "loading[a]" not in effects.params.index  # 'a' is J minus the others


def test_effects_coding_numpy_and_pytensor_engines_agree():
    # the entries that are linear combinations (effects coding) in both array backends: the
    # NumPy moments against the compiled PyTensor graph the sampler uses
    from bayeslong.infer.loglik_op import compiled_loglik_function

    df = bl.simulate(bl.model("alt"), TRUTH, 80, 4, seed=9, indicators={"y": ITEMS})
    df.loc[df.index % 7 == 3, "b"] = np.nan
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})
    s = structure_for(bl.model("alt", scale="effects", invariance="strict"), panel)
    theta = parameter_vector(s, TRUTH)
    data = pattern_arrays(panel.patterns())
    ll_np, g_np = loglik_and_grad(s, theta, *data)
    ll_pt, g_pt = compiled_loglik_function(s)(theta, *data)
    assert ll_np == pytest.approx(float(ll_pt), rel=1e-12)
    np.testing.assert_allclose(g_np, g_pt, rtol=1e-8, atol=1e-8 * np.abs(g_pt).max())


def test_simulated_indicators_have_the_implied_moments():
    # Simulation solves the structural equations and draws the indicators from
    # y = nu + Lam eta + eps; the moment code writes the reduced form. Over N = 100,000 units
    # the sample mean and covariance must match the implied ones to sampling error: the
    # largest implied variance is about 9, so a sample mean's SD is at most sqrt(9/N) = 0.01
    # and a sample covariance's about sqrt(2/N) 9 = 0.04; tolerances 5 and 3 of them.
    from bayeslong.model.moments import moments_at

    # partial scalar invariance: the intercepts of 'c' are free over waves
    spec = bl.model("alt", release={"intercept": ["c"]})
    params = {k: v for k, v in TRUTH.items() if k != "intercept[c]"}
    params.update({f"intercept[c,{t}]": -0.5 + 0.2 * t for t in range(1, 5)})
    df = bl.simulate(spec, params, 100_000, 4, seed=12, indicators={"y": ITEMS})
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ITEMS})
    structure = structure_for(spec, panel)
    c, _, sigma = moments_at(structure, parameter_vector(structure, params))
    y = panel.outcome_matrix()
    np.testing.assert_allclose(y.mean(axis=0), c, atol=0.05)
    np.testing.assert_allclose(np.cov(y, rowvar=False), sigma, atol=0.12)
