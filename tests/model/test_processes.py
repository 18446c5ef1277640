"""Several processes (K = 3, 4): cross-lags, dropped cross-lags, same-wave paths,
cross-loadings; the naive likelihood, recovery by ML, identification and the wording of
refusals.

Expected values come from a naive re-implementation written here: the structural recursion
of the cross-lagged panel model (Hamaker, Kuiper & Grasman 2015, eq. 1, extended by a
same-wave regression matrix B0)

    eta_1 ~ N(m_1, Phi_1),   eta_t = mu + B0 eta_t + R eta_(t-1) + zeta_t,  zeta_t ~ N(0, Psi)

solved by hand, eta_t = A (mu + R eta_(t-1) + zeta_t) with A = (I - B0)^-1, for the mean and
covariance of all waves, the indicators added as y = nu + Lam eta + eps (a factor model at
every wave under the cross-lagged structure, as in the multiple-indicator extension of
Mulder & Hamaker 2021, Structural Equation Modeling 28(4), 638-648, here without random
intercepts), and scored unit by unit with
``scipy.stats.multivariate_normal.logpdf`` on the observed entries.
"""

import time

import numpy as np
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.errors import DataError, SpecError
from bayeslong.infer.likelihood import loglik_and_grad, pattern_arrays
from bayeslong.model.structure import build_structure, structure_for
from bayeslong.model.transform import Unconstrained

T = 4
NAMES = ("stress", "sleep", "mood", "energy")


def _spec(K, **extra):
    return bl.model("clpm", processes=K, cross_lags={"drop": ["stress<-sleep"]},
                    same_wave=["stress->sleep"], **extra)


def _random_theta(structure, seed):
    """A random admissible point: random unconstrained values, lags kept small."""
    rng = np.random.default_rng(seed)
    u = rng.normal(0.0, 0.4, structure.n_params)
    for i, kind in enumerate(structure.kinds):
        if kind == "lag":
            u[i] = rng.uniform(-0.4, 0.4)
        elif kind == "loading":
            u[i] = rng.uniform(0.5, 1.5)
    return Unconstrained(structure).to_natural(u)


def _naive_moments(p, outcomes, indicators, cross):
    """Mean and covariance of the observed variables, process, indicator, wave order."""
    K = len(outcomes)
    name = lambda base, *keys: f"{base}[{','.join(keys)}]"  # noqa: E731
    R = np.array([[p.get(name("lag", f"{y}<-{x}"), 0.0) for x in outcomes] for y in outcomes])
    B0 = np.array([[p.get(name("same_wave", f"{y}<-{x}"), 0.0) for x in outcomes]
                   for y in outcomes])
    mu = np.array([p[name("intercept", y)] for y in outcomes])
    m1 = np.array([p[name("initial_mean", y)] for y in outcomes])

    def sym(base, wave=None):
        out = np.zeros((K, K))
        for r, y in enumerate(outcomes):
            for c, x in enumerate(outcomes):
                if r == c:
                    out[r, c] = p[name(f"{base}_var", y)]
                else:
                    a, b = (y, x) if r < c else (x, y)
                    out[r, c] = p.get(name(f"{base}_cov", a, b), 0.0)  # absent: fixed at 0
        return out

    Phi1, Psi = sym("initial"), sym("resid")
    A = np.linalg.inv(np.eye(K) - B0)
    means = [m1]
    C = {(1, 1): Phi1}
    for t in range(2, T + 1):
        means.append(A @ (mu + R @ means[-1]))
        C[(t, t)] = A @ (R @ C[(t - 1, t - 1)] @ R.T + Psi) @ A.T
        for s in range(1, t):
            C[(t, s)] = A @ R @ C[(t - 1, s)]
            C[(s, t)] = C[(t, s)].T
    # latent order: process-major, wave-minor
    mean_eta = np.array([means[t][k] for k in range(K) for t in range(T)])
    cov_eta = np.array([[C[(t + 1, s + 1)][k, l] for l in range(K) for s in range(T)]
                        for k in range(K) for t in range(T)])
    # observed: each indicator of each process at every wave
    rows, nu, theta_blocks = [], [], []
    for k, proc in enumerate(outcomes):
        group = indicators[proc]
        for j, item in enumerate(group):
            for t in range(T):
                lam = np.zeros(K * T)
                if len(group) == 1:
                    lam[k * T + t] = 1.0
                    nu.append(0.0)
                else:
                    lam[k * T + t] = 1.0 if j == 0 else p[name("loading", item)]
                    nu.append(0.0 if j == 0 else p[name("intercept", item)])
                    for target in cross.get(item, ()):
                        lam[outcomes.index(target) * T + t] = p[name("loading", f"{item}<-{target}")]
                rows.append(lam)
            if len(group) > 1:
                block = np.array([[p[name("unique_var", item, str(s + 1))] if s == t else
                                   p[name("unique_cov", item, str(min(s, t) + 1), str(max(s, t) + 1))]
                                   for s in range(T)] for t in range(T)])
                theta_blocks.append(block)
            else:
                theta_blocks.append(np.zeros((T, T)))
    Lam = np.array(rows)
    Theta = np.zeros((len(rows), len(rows)))
    at = 0
    for b in theta_blocks:
        Theta[at:at + T, at:at + T] = b
        at += T
    return np.array(nu) + Lam @ mean_eta, Lam @ cov_eta @ Lam.T + Theta


def _naive_loglik(p, panel, cross):
    mean, cov = _naive_moments(p, tuple(panel.outcomes), dict(panel.indicators), cross)
    y = panel.outcome_matrix()
    total = 0.0
    for row in y:
        seen = ~np.isnan(row)
        total += stats.multivariate_normal.logpdf(row[seen], mean[seen], cov[np.ix_(seen, seen)])
    return total


def _panel(spec, outcomes, params, indicators=None, n=60, seed=3, waves=T):
    df = bl.simulate(spec, params, n, waves, seed=seed, outcomes=outcomes, indicators=indicators,
                     missing={"intermittent": 0.15})
    given = ({k: list(indicators.get(k, [k])) for k in outcomes} if indicators
             else list(outcomes))
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=given)


@pytest.mark.parametrize("K", [3, 4])
@pytest.mark.parametrize("with_indicators", [False, True], ids=["observed", "indicators"])
def test_engine_loglik_equals_naive_recursion(K, with_indicators):
    outcomes = NAMES[:K]
    indicators = cross = None
    extra = {}
    if with_indicators:
        # stress and sleep measured by three items each, the others observed directly;
        # one sleep item also loads on stress
        indicators = {"stress": ["tense", "worried", "rushed"],
                      "sleep": ["rested", "fell_asleep", "woke_rarely"]}
        cross = {"woke_rarely": ("stress",)}
        extra = {"cross_loadings": {"woke_rarely": "stress"}}
    spec = _spec(K, **extra)
    full = {k: tuple(v) for k, v in (indicators or {}).items()}
    structure = build_structure(spec, outcomes=outcomes, n_waves=T,
                                indicators={o: full.get(o, (o,)) for o in outcomes})
    assert "lag[stress<-sleep]" not in structure.names  # the dropped cross-lag
    assert "lag[sleep<-stress]" in structure.names and "same_wave[sleep<-stress]" in structure.names
    assert "resid_cov[stress,sleep]" not in structure.names  # replaced by the path
    if with_indicators:
        assert "loading[woke_rarely<-stress]" in structure.names
    for seed in range(3):
        theta = _random_theta(structure, seed)
        params = dict(zip(structure.names, theta))
        panel = _panel(spec, outcomes, params, indicators, seed=seed)
        st = structure_for(spec, panel)
        assert st.names == structure.names
        engine = loglik_and_grad(st, theta, *pattern_arrays(panel.patterns()))[0]
        naive = _naive_loglik(params, panel, cross or {})
        assert engine == pytest.approx(naive, abs=1e-8)


def test_every_multi_process_catalog_model_works_for_three_and_four(gapminder):
    # clpm, ri-clpm and bivariate-alt with K = 3 and 4: built, identified (rank of the
    # Jacobian equals the number of parameters), every cross-lag present
    for name in ("clpm", "ri-clpm", "bivariate-alt"):
        for K in (3, 4):
            spec = bl.model(name, processes=K)
            outcomes = NAMES[:K]
            st = build_structure(spec, outcomes=outcomes, n_waves=5)
            lags = [n for n in st.names if n.startswith("lag[")]
            assert len(lags) == K * K
            truth = dict(zip(st.names, _random_theta(st, 1)))
            panel = _panel(spec, outcomes, truth, n=80, waves=5)
            ident = bl.identify(spec, panel)
            assert ident.identified, (name, K, ident.deficient)


def test_ml_recovers_three_process_cross_lags():
    # K = 3 cross-lagged model with one dropped cross-lag and one same-wave path, N = 3000
    # simulated units (fixed seed): each cross-lag within 3 standard errors of its truth
    spec = _spec(3)
    outcomes = NAMES[:3]
    truth = {f"{base}[{y}]": value for y in outcomes
             for base, value in (("intercept", 0.5), ("initial_mean", 1.0), ("initial_var", 1.0),
                                 ("resid_var", 0.8))}
    truth |= {f"initial_cov[{a},{b}]": 0.3 for a, b in
              (("stress", "sleep"), ("stress", "mood"), ("sleep", "mood"))}
    truth |= {"resid_cov[stress,mood]": 0.2, "resid_cov[sleep,mood]": 0.2}
    truth |= {"lag[stress<-stress]": 0.5, "lag[sleep<-sleep]": 0.4, "lag[mood<-mood]": 0.6,
             "lag[stress<-mood]": 0.2, "lag[sleep<-stress]": -0.3, "lag[sleep<-mood]": 0.1,
             "lag[mood<-stress]": 0.15, "lag[mood<-sleep]": -0.2,
             "same_wave[sleep<-stress]": -0.25}
    df = bl.simulate(spec, truth, 3000, 5, seed=11, outcomes=outcomes)
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=list(outcomes))
    start = time.perf_counter()
    fit = bl.fit_ml(spec, panel)
    assert time.perf_counter() - start < 30
    assert fit.converged
    for name in [n for n in fit.params.index if n.startswith(("lag[", "same_wave["))]:
        value = truth[name]
        assert abs(fit.params[name] - value) < 3 * fit.se[name], name


@pytest.mark.parametrize(
    "options, message",
    [
        ({"same_wave": ["stress->sleep", "sleep->mood", "mood->stress"]},
         r"same-wave paths of model 'clpm' form a loop, stress -> sleep -> mood -> stress"),
        ({"same_wave": ["stress->sleep", "sleep->stress"]},
         r"form a loop, stress -> sleep -> stress.*drop one path of the loop"),
        ({"same_wave": ["stres->sleep"]},
         r"`same_wave` names the process 'stres' \(in 'sleep<-stres'\), which is not a process "
         r"of the panel; did you mean 'stress'\?"),
        ({"cross_lags": {"drop": ["mod<-sleep"]}},
         r"`cross_lags` names the process 'mod' .*did you mean 'mood'\?"),
        ({"cross_lags": {"drop": ["stress<-stress"]}},
         r"`cross_lags` in model 'clpm' must list pairs of two different processes"),
        ({"cross_loadings": {"woke_rarely": "stres"}},
         r"`cross_loadings` lets 'woke_rarely' load on 'stres', which is not a process of the "
         r"panel; did you mean 'stress'\?"),
        ({"cross_loadings": {"woke_rare": "stress"}},
         r"`cross_loadings` names 'woke_rare', which is not an indicator .*did you mean "
         r"'woke_rarely'\?"),
    ],
    ids=["loop-of-three", "both-directions", "unknown-path-process", "unknown-dropped",
         "drop-autoregression", "cross-loading-unknown-process", "cross-loading-unknown-item"],
)
def test_refusals_name_the_fault(options, message):
    indicators = {"stress": ("stress",), "sleep": ("rested", "fell_asleep", "woke_rarely"),
                  "mood": ("mood",)}
    with pytest.raises(SpecError, match=message):
        spec = bl.model("clpm", processes=3, **options)
        build_structure(spec, outcomes=NAMES[:3], n_waves=T, indicators=indicators)


def test_processes_only_for_models_of_several():
    with pytest.raises(SpecError, match=r"written for one process.*choose clpm, ri-clpm or "
                                        r"bivariate-alt"):
        bl.model("alt", processes=3)
    with pytest.raises(SpecError, match=r"model 'clpm' is for 2 outcome process\(es\) but the "
                                        r"panel has 3 .*set processes=3 \(bl.model\('clpm', processes=3\)"):
        build_structure(bl.model("clpm"), outcomes=NAMES[:3], n_waves=T)


def test_identification_same_wave_both_directions_refused_just_identified_passes():
    plain_spec = bl.model("clpm", processes=2)
    plain = build_structure(plain_spec, outcomes=NAMES[:2], n_waves=T)
    df = bl.simulate(plain_spec, dict(zip(plain.names, _random_theta(plain, 0))), 400, T,
                     seed=2, outcomes=NAMES[:2])
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=list(NAMES[:2]))
    # both directions at once: a loop, refused before the rank is taken
    both = bl.model("clpm", processes=2, same_wave=["stress->sleep", "sleep->stress"])
    with pytest.raises(SpecError, match=r"form a loop, (stress -> sleep -> stress|"
                                        r"sleep -> stress -> sleep)"):
        bl.identify(both, panel)
    # one direction: the path takes the place of the disturbance covariance, which it
    # identifies exactly. Worked by hand: with A = (I - B0)^-1 unit lower triangular and Psi
    # diagonal, a wave's reduced form (A mu, A R, A Psi A') reaches every intercept, lag
    # matrix and positive definite covariance, one to one (the LDL' factorisation is unique),
    # so the model is just identified relative to the model without the path: the same
    # number of parameters, full rank, and the same maximum of the likelihood.
    one = bl.model("clpm", processes=2, same_wave=["stress->sleep"])
    ident = bl.identify(one, panel)
    assert ident.identified and ident.n_params == plain.n_params
    assert "resid_cov[stress,sleep]" not in structure_for(one, panel).names
    assert bl.fit_ml(one, panel).loglik == pytest.approx(bl.fit_ml(plain_spec, panel).loglik,
                                                         abs=1e-6)


def test_cross_loading_refused_at_intake_without_the_option():
    plain = build_structure(bl.model("clpm"), outcomes=("a", "b"), n_waves=3)
    df = bl.simulate(bl.model("clpm"), dict(zip(plain.names, _random_theta(plain, 0))), 20, 3,
                     seed=1, outcomes=("a", "b"))
    with pytest.raises(DataError, match=r"an indicator measures one process.*cross_loadings"):
        bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"p": ["a", "b"], "q": ["b"]})


def test_simulated_three_process_panel_reproduces_implied_moments():
    # bl.simulate solves the structural equations by substitution (model/simulation.py), not
    # the implied moments: a large panel's sample moments must match moments_at within
    # normal-theory sampling error (SE(cov_ij) = sqrt((S_ii S_jj + S_ij^2) / N); Anderson
    # 2003, An Introduction to Multivariate Statistical Analysis, Thm 3.4.4), here with a
    # dropped cross-lag, a same-wave path, indicators and a cross-loading
    from bayeslong.model.moments import moments_at
    from bayeslong.model.simulation import Simulation

    indicators = {"stress": ("tense", "worried", "rushed"), "sleep": ("rested", "fell_asleep",
                                                                      "woke_rarely"),
                  "mood": ("mood",)}
    spec = _spec(3, cross_loadings={"woke_rarely": "stress"})
    structure = build_structure(spec, outcomes=NAMES[:3], n_waves=T, indicators=indicators)
    params = dict(zip(structure.names, _random_theta(structure, 4)))
    n = 50_000
    sim = Simulation(spec=spec, params=params, n_units=n, n_waves=T, seed=8,
                     outcomes=NAMES[:3], indicators=indicators)
    df = sim.data()
    items = [i for g in indicators.values() for i in g]
    Y = np.concatenate([df[i].to_numpy().reshape(n, T) for i in items], axis=1)
    c, _, Sigma = moments_at(sim.structure, sim.theta())
    R = Y - c
    d = np.diag(Sigma)
    np.testing.assert_array_less(np.abs(R.mean(axis=0)), 5 * np.sqrt(d / n))
    np.testing.assert_array_less(np.abs(np.cov(R, rowvar=False) - Sigma),
                                 5 * np.sqrt((np.outer(d, d) + Sigma ** 2) / n))


@pytest.mark.parametrize("name", ["clpm", "ri-clpm", "bivariate-alt"])
def test_catalog_models_with_paths_are_identified_at_three(name):
    # a dropped cross-lag and a same-wave path in each multi-process catalog model, K = 3;
    # bivariate-alt also with indicators for two processes and a cross-loading
    spec = _spec(3) if name == "clpm" else bl.model(
        name, processes=3, cross_lags={"drop": ["stress<-sleep"]}, same_wave=["sleep<-stress"])
    outcomes = NAMES[:3]
    indicators = None
    if name == "bivariate-alt":
        indicators = {"stress": ["tense", "worried", "rushed"],
                      "sleep": ["rested", "fell_asleep", "woke_rarely"]}
        spec = spec.replace(cross_loadings={"woke_rarely": "stress"})
    full = {o: tuple((indicators or {}).get(o, [o])) for o in outcomes}
    st = build_structure(spec, outcomes=outcomes, n_waves=5, indicators=full)
    panel = _panel(spec, outcomes, dict(zip(st.names, _random_theta(st, 2))), indicators,
                   n=100, waves=5)
    ident = bl.identify(spec, panel)
    assert ident.identified, ident.deficient


def test_options_round_trip_and_cross_lags_none():
    spec = _spec(4, cross_loadings={"woke_rarely": "stress"})
    assert bl.Spec.from_dict(spec.to_dict()) == spec  # plain data (JSON/TOML) and back
    assert spec.replace(same_wave=[]).paths["same_wave"] == ()
    none = build_structure(bl.model("clpm", processes=3, cross_lags="none"),
                           outcomes=NAMES[:3], n_waves=T)
    # only the three autoregressions remain (counted by hand: K of the K^2 lags)
    assert [n for n in none.names if n.startswith("lag")] == [f"lag[{y}<-{y}]" for y in NAMES[:3]]
