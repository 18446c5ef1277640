"""The multiple-indicator RI-CLPM: the within form with several indicators per wave.

Reference for the likelihood: a naive implementation written here from the published
equations of Mulder, J. D. & Hamaker, E. L. (2021), "Three extensions of the random
intercept cross-lagged panel model", Structural Equation Modeling 28(4), 638-648, the
multiple-indicator extension with indicator-specific random intercepts:

    y[i,j,k,t] = mu[j,k,t] + RI[i,j,k] + lambda[j,k] w[i,k,t] + eps[i,j,k,t]
    w[i,.,t]   = R w[i,.,t-1] + zeta[i,.,t]   (t >= 2),   w[i,.,1] ~ N(0, Psi_1)

random intercepts freely correlated among themselves and uncorrelated with the within
part, built by Kronecker products and loops over waves and scored unit by unit with
``scipy.stats.multivariate_normal`` on the observed entries. With one indicator per process
the same equations are the RI-CLPM of Hamaker, Kuiper & Grasman (2015), Psychological
Methods 20(1), eqs. 1-3 (lambda = 1, no eps), which the engine's single-indicator path
must reproduce. Identification: the rank of the moment Jacobian (Rothenberg 1971,
Econometrica 39(3), Theorem 6).
"""

import warnings

import numpy as np
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.infer.likelihood import loglik_and_grad, pattern_arrays
from bayeslong.model import measurement
from bayeslong.model.structure import build_structure, structure_for
from bayeslong.model.transform import Unconstrained

T = 4
TWO_BY_THREE = {"s": ["a", "b", "c"], "m": ["d", "e", "f"]}
MIXED = {"s": ["a", "b", "c"], "m": ["m"]}  # process m observed directly
ONE_EACH = {"s": ["s"], "m": ["m"]}  # today's RI-CLPM


def _truth(indicators):
    """Invented values (an invented two-process scenario): a positive-definite point."""
    items = [j for g in indicators.values() for j in g]
    several = {k for k, g in indicators.items() if len(g) > 1}
    p = {"lag[s<-s]": 0.4, "lag[s<-m]": 0.15, "lag[m<-s]": -0.1, "lag[m<-m]": 0.3,
         "initial_var[s]": 1.0, "initial_var[m]": 1.0, "initial_cov[s,m]": 0.3,
         "resid_var[s]": 0.7, "resid_var[m]": 0.7, "resid_cov[s,m]": 0.15}
    for k, group in indicators.items():
        if k in several:
            p[f"intercept[{k}]"] = 0.2
            for n, j in enumerate(group):
                p[f"intercept[{j}]"] = 3.0 - n
                p[f"unique_var[{j}]"] = 0.4
                if n:
                    p[f"loading[{j}]"] = 0.8 + 0.3 * (n - 1)
        else:
            p[f"intercept[{k}]"] = 1.0
    for i, a in enumerate(items):
        p[f"level_var[{a}]"] = 0.6
        for b in items[:i]:
            same = any(a in g and b in g for g in indicators.values())
            p[f"level_cov[{b},{a}]"] = 0.25 if same else 0.1
    return p


def _panel(indicators, params, n, seed, missing=0.0, spec=None):
    spec = spec or bl.model("ri-clpm")
    df = bl.simulate(spec, params, n, T, seed=seed, indicators=indicators,
                     outcomes=list(indicators))
    rng = np.random.default_rng(seed + 1)
    for j in [j for g in indicators.values() for j in g]:  # single entries missing at random
        df.loc[(rng.uniform(size=len(df)) < missing) & (df["wave"] > 1), j] = np.nan
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=indicators)


def _engine_loglik(spec, panel, theta):
    return loglik_and_grad(structure_for(spec, panel), theta, *pattern_arrays(panel.patterns()))[0]


class _Read(dict):
    """Parameter values that remember which names the naive model read."""

    def __init__(self, values):
        super().__init__(values)
        self.read = set()

    def __getitem__(self, name):
        self.read.add(name)
        return super().__getitem__(name)


def _naive_moments(p, indicators, invariance, scale="marker"):
    """Mean and covariance of y (process, indicator, wave order) from the published equations.

    ``p`` holds the documented parameter names (docs/model-family.md, "The multiple-indicator
    RI-CLPM"). A process with one indicator is observed directly (lambda = 1, no eps, wave
    means intercept[k,t]); with several: marker loading 1 (the first indicator), or under
    effects coding (Little, Slegers & Card 2006) J minus the other loadings; loadings equal
    over waves at metric and above, intercepts mu[j,t] free by wave below scalar, else
    mu[j] + lambda_j * (within factor's wave intercepts intercept[k,t], t >= 2). Approximate
    invariance (Muthén & Asparouhov 2012): every non-marker loading and intercept is the
    common value plus its wave's deviation; the marker keeps loading 1 and one intercept.
    """
    procs = list(indicators)
    K = len(procs)
    items = [(k, j) for k, g in indicators.items() for j in g]
    J = len(items)
    several = {k: len(g) > 1 for k, g in indicators.items()}
    # within part w (process-major, wave-minor): E[w_t] = a_t + R E[w_(t-1)],
    # Cov(w_t, w_s) = R Cov(w_(t-1), w_s) for s < t, Var(w_t) = R Var(w_(t-1)) R' + Psi_t
    R = np.array([[p[f"lag[{k}<-{l}]"] for l in procs] for k in procs])

    def block(base, t=None):
        def val(a, b):
            if a == b:
                return p[f"{base}_var[{a}{'' if t is None else f',{t}'}]"]
            a, b = sorted((a, b), key=procs.index)
            return p[f"{base}_cov[{a},{b}{'' if t is None else f',{t}'}]"]
        return np.array([[val(a, b) for b in procs] for a in procs])

    moves = invariance in ("scalar", "strict", "approximate")
    approx = invariance == "approximate"

    def loading(j, t):
        if invariance == "configural":
            return p[f"loading[{j},{t}]"]
        return p[f"loading[{j}]"] + (p[f"loading_deviation[{j},{t}]"] if approx else 0.0)
    a = [np.zeros(K)] + [np.array([p[f"intercept[{k},{t}]"] if several[k] and moves else 0.0
                                   for k in procs]) for t in range(2, T + 1)]
    m = [np.zeros(K)]
    C = {(1, 1): block("initial")}
    for t in range(2, T + 1):
        m.append(a[t - 1] + R @ m[-1])
        for s in range(1, t):
            C[(t, s)] = R @ C[(t - 1, s)]
            C[(s, t)] = C[(t, s)].T
        C[(t, t)] = R @ C[(t - 1, t - 1)] @ R.T + block("resid", t)
    # reorder to process-major, wave-minor
    w_mean = np.array([m[t][k] for k in range(K) for t in range(T)])
    w_cov = np.array([[C[(t + 1, s + 1)][k, l] for l in range(K) for s in range(T)]
                      for k in range(K) for t in range(T)])
    # measurement: loadings lambda[j,t] on w[k(j),t], indicator-major, wave-minor
    L = np.zeros((J * T, K * T))
    mu = np.zeros(J * T)
    eps = np.zeros(J * T)
    for n, (k, j) in enumerate(items):
        kk = procs.index(k)
        first = indicators[k][0] == j
        for t in range(1, T + 1):
            row = n * T + t - 1
            if not several[k]:
                L[row, kk * T + t - 1] = 1.0
                mu[row] = p[f"intercept[{k},{t}]"]
                continue
            others = [o for o in indicators[k] if o != j]
            if first and scale == "effects":
                L[row, kk * T + t - 1] = len(indicators[k]) - sum(loading(o, t) for o in others)
            elif first:
                L[row, kk * T + t - 1] = 1.0
            else:
                L[row, kk * T + t - 1] = loading(j, t)
            if not moves:
                mu[row] = p[f"intercept[{j},{t}]"]
            else:
                mu[row] = p[f"intercept[{j}]"] + (p[f"intercept_deviation[{j},{t}]"]
                                                  if approx and not first else 0.0)
            eps[row] = p[f"unique_var[{j}]"] if invariance == "strict" else p[f"unique_var[{j},{t}]"]
    # random intercepts: one per indicator, loading 1 at every wave (I_J kron 1_T)
    names = [j for _, j in items]
    ri = np.array([[p[f"level_var[{a}]"] if a == b else
                    p[f"level_cov[{min(a, b, key=names.index)},{max(a, b, key=names.index)}]"]
                    for b in names] for a in names])
    ones = np.kron(np.eye(J), np.ones((T, 1)))
    mean = mu + L @ w_mean
    cov = ones @ ri @ ones.T + L @ w_cov @ L.T + np.diag(eps)
    return mean, cov


def _naive_loglik(p, indicators, invariance, y, scale="marker"):
    mean, cov = _naive_moments(p, indicators, invariance, scale)
    total = 0.0
    for row in y:  # unit by unit on its observed entries
        seen = ~np.isnan(row)
        total += stats.multivariate_normal(mean[seen], cov[np.ix_(seen, seen)]).logpdf(row[seen])
    return total


@pytest.mark.parametrize("indicators, options", [
    (TWO_BY_THREE, {}),
    (TWO_BY_THREE, {"invariance": "configural"}),
    (TWO_BY_THREE, {"invariance": "metric"}),
    (TWO_BY_THREE, {"invariance": "strict"}),
    (TWO_BY_THREE, {"scale": "effects"}),
    (TWO_BY_THREE, {"invariance": "approximate"}),
    (MIXED, {}),
    (ONE_EACH, {}),
], ids=["2x3-scalar", "2x3-configural", "2x3-metric", "2x3-strict", "2x3-effects",
        "2x3-approximate", "mixed", "one-each"])
def test_loglik_equals_naive_published_equations(indicators, options):
    spec = bl.model("ri-clpm", **options)
    panel = _panel(indicators, _truth(indicators), 150, seed=3, missing=0.12)
    if len(next(iter(indicators.values()))) > 1:
        assert panel.patterns().n_patterns > 10  # missing indicators, not only whole rows
    structure = structure_for(spec, panel)
    # a random admissible point (not the truth): every covariance block positive definite
    theta = Unconstrained(structure).to_natural(
        np.random.default_rng(8).normal(0.0, 0.4, size=structure.n_params))
    values = _Read(dict(zip(structure.names, theta)))
    expected = _naive_loglik(values, indicators, spec.measurement["invariance"],
                             panel.outcome_matrix(), spec.measurement["scale"])
    # the naive form reads exactly the engine's parameters, by their documented names
    assert values.read == set(structure.names), sorted(set(structure.names) ^ values.read)
    # both sum the same ~150 terms in double precision: agreement to 1e-8 absolute
    assert _engine_loglik(spec, panel, theta) == pytest.approx(expected, abs=1e-8)


def test_one_indicator_each_is_todays_ri_clpm():
    # a panel whose processes are given as one-indicator groups builds today's RI-CLPM
    # structure entry for entry (the single-indicator path, held to the published form in
    # tests/model/test_published_forms.py)
    spec = bl.model("ri-clpm")
    today = build_structure(spec, outcomes=("s", "m"), n_waves=T)
    grouped = build_structure(spec, outcomes=("s", "m"), n_waves=T, indicators=ONE_EACH)
    assert grouped.names == today.names
    for key, m in today.matrices.items():
        np.testing.assert_array_equal(grouped.matrices[key].index, m.index)
        np.testing.assert_array_equal(grouped.matrices[key].fixed, m.fixed)


def test_parameter_names_follow_the_invariance_level():
    def names(**options):
        return set(build_structure(bl.model("ri-clpm", **options), outcomes=("s", "m"),
                                   n_waves=3, indicators=TWO_BY_THREE).names)

    scalar = names()
    # one random intercept per indicator, correlated among themselves and across processes
    assert {"level_var[a]", "level_cov[a,b]", "level_cov[c,d]", "level_var[f]"} <= scalar
    assert {"lag[s<-m]", "initial_var[s]", "resid_var[m,3]", "intercept[s,2]"} <= scalar
    assert {"loading[b]", "intercept[a]", "intercept[b]", "unique_var[b,2]"} <= scalar
    assert "loading[a]" not in scalar and "intercept[s,1]" not in scalar
    assert not any(n.startswith("unique_cov") for n in scalar)  # the within form's default
    configural = names(invariance="configural")
    assert {"loading[b,2]", "intercept[a,1]", "intercept[a,3]"} <= configural
    assert not any(n.startswith("intercept[s,") for n in configural)  # no within means
    assert {"unique_var[b]"} <= names(invariance="strict")
    partial = names(release={"intercept": ["c"]})
    assert {"intercept[c,1]", "intercept[c,3]", "intercept[b]", "intercept[s,2]"} <= partial
    assert {"loading[a]", "intercept[b]"} <= names(marker=["b", "d"])


def test_every_invariance_level_is_identified():
    panel = _panel(TWO_BY_THREE, _truth(TWO_BY_THREE), 60, seed=4)
    for level in ("configural", "metric", "scalar", "strict"):
        result = bl.identify(bl.model("ri-clpm", invariance=level), panel)
        assert result.identified, (level, result.deficient)
    released = bl.model("ri-clpm", release={"intercept": ["a", "b", "c"]})  # no within means
    assert bl.identify(released, panel).identified
    assert bl.identify(bl.model("ri-clpm", scale="effects"), panel).identified
    # approximate invariance: the common values and deviations are one parameter more than
    # the data identify per indicator and part, told apart only by their prior
    approx = bl.identify(bl.model("ri-clpm", invariance="approximate"), panel)
    assert not approx.identified and "loading_deviation[b,2]" in approx.deficient
    assert "intercept[a]" not in approx.deficient  # the marker's intercept has no deviation
    assert "prior" in approx.advice


def test_same_indicator_unique_covariances_are_not_identified(monkeypatch):
    # Why the within form refuses unique_covariance="same-indicator": an indicator's random
    # intercept adds one variance to every pair of its waves, which free unique covariances
    # over waves reproduce. Lift the refusal, and the rank check names each indicator's
    # random-intercept variance with its unique (co)variances, one deficiency per indicator.
    panel = _panel(TWO_BY_THREE, _truth(TWO_BY_THREE), 60, seed=4)
    with pytest.raises(SpecError, match="unique_covariance.*not identified.*random intercept"):
        structure_for(bl.model("ri-clpm", unique_covariance="same-indicator"), panel)
    monkeypatch.setattr(measurement, "_check_within", lambda spec, indicators: None)
    result = bl.identify(bl.model("ri-clpm", unique_covariance="same-indicator"), panel)
    assert not result.identified
    assert result.n_params - result.rank == 6  # one per indicator
    assert {f"level_var[{j}]" for j in "abcdef"} <= set(result.deficient)
    assert "unique_cov[a,1,2]" in result.deficient
    assert not any(n.startswith(("lag", "loading", "level_cov")) for n in result.deficient)


def test_options_the_within_form_cannot_take_are_refused(tmp_path):
    panel = _panel(TWO_BY_THREE, _truth(TWO_BY_THREE), 30, seed=5)
    with pytest.raises(SpecError, match=r"`intercepts = \"equal\"` has nothing to act on.*"
                                        "invariance='metric'"):
        structure_for(bl.model("ri-clpm", invariance="metric", intercepts="equal"), panel)
    with pytest.raises(SpecError, match="intercepts of a, b, c released"):
        structure_for(bl.model("ri-clpm", intercepts="equal",
                               release={"intercept": ["a", "b", "c"]}), panel)
    # under scalar invariance intercepts="equal" keeps the within means at 0 (allowed)
    equal = structure_for(bl.model("ri-clpm", intercepts="equal"), panel)
    assert not any(n.startswith("intercept[s,") for n in equal.names)
    path = tmp_path / "within-growth.toml"
    path.write_text('description = "within form with a slope"\nprocesses = 2\nform = "within"\n'
                    'factors = ["level", "slope"]\n[options]\ninitial = "predetermined"\n'
                    'lag = "constant"\n[allowed]\ninitial = ["predetermined"]\n')
    with pytest.raises(SpecError, match=r"random intercepts only.*factors = \['level', 'slope'\]"):
        structure_for(bl.model(str(path)), panel)


def test_ml_recovers_the_cross_lags():
    # N = 800, 2 processes x 3 indicators x 4 waves, no missing data. A correctly specified
    # ML estimate is asymptotically normal around the truth with the reported SE, so each
    # cross-lag lies within 3 SE with probability 0.997 (fixed seed: a deterministic check)
    truth = _truth(TWO_BY_THREE)
    panel = _panel(TWO_BY_THREE, truth, 800, seed=11)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = bl.fit_ml(bl.model("ri-clpm"), panel)
    assert ml.converged and not ml.boundary
    for name in ["lag[s<-m]", "lag[m<-s]", "lag[s<-s]", "lag[m<-m]", "loading[b]", "loading[e]"]:
        est, se = ml.params[name], ml.se[name]
        assert abs(est - truth[name]) < 3.0 * se, (name, est, truth[name], se)
