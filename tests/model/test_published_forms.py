"""Every catalog model against a naive implementation of its published structural equations.

Each naive model below is written wave by wave from the equations of the source cited
beside it, by model name, and reads its parameters by their documented names (README,
"The model catalog"). Its moments are worked by hand: every variable is kept as an affine
function of the covariates and of independent disturbance vectors, so E[y | w] and
Cov[y | w] follow by collecting coefficients. The engine's moments
(:func:`bayeslong.moments.moments_at`, built from the parameter table and (I - B)^-1) must
agree to 1e-8 at a random admissible point and at the engine's own ML estimates. Agreement
of the likelihood alone would not do: a reparameterised model (say, a slope that means
"constant change minus level") has the same maximum but other parameter values, and only a
check at named parameter values catches a parameter whose meaning drifts.

The naive models also state which parameters they read; a parameter the engine has but the
published form does not (or the other way round) fails the test.
"""

from __future__ import annotations

import textwrap
import warnings

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.model.moments import moments_at
from bayeslong.model.simulation import parameter_vector
from bayeslong.model.structure import build_structure
from bayeslong.model.transform import Unconstrained


# --- a linear variable: constant + covariate coefficients + disturbance coefficients -------
class Lin:
    """``const + w . wcoef + sum_k s[k] * shock_k``; shocks are registered in a `Design`."""

    def __init__(self, const, wcoef, s):
        self.const, self.wcoef, self.s = float(const), np.asarray(wcoef, dtype=float), dict(s)

    def __add__(self, other):
        if not isinstance(other, Lin):
            return Lin(self.const + other, self.wcoef, self.s)
        s = dict(self.s)
        for k, v in other.s.items():
            s[k] = s.get(k, 0.0) + v
        return Lin(self.const + other.const, self.wcoef + other.wcoef, s)

    __radd__ = __add__

    def __mul__(self, k):
        return Lin(k * self.const, k * self.wcoef, {key: k * v for key, v in self.s.items()})

    __rmul__ = __mul__


class Params(dict):
    """Named parameter values that remember which names a naive model read."""

    def __init__(self, values):
        super().__init__(values)
        self.read = set()

    def __getitem__(self, name):
        self.read.add(name)
        return super().__getitem__(name)

    def any(self, *names):
        """The value under whichever of ``names`` exists (a covariance has two spellings)."""
        for name in names:
            if name in self:
                return self[name]
        raise KeyError(f"none of {names} is a parameter")


def label(base, *keys):
    """The documented parameter name: ``base`` or ``base[key,key]``."""
    keys = [str(k) for k in keys if k is not None]
    return f"{base}[{','.join(keys)}]" if keys else base


class Design:
    """Waves, processes and covariates of a panel, and the disturbances drawn so far.

    Covariate order x[1..T] per time-varying covariate, then z; outcome order process-major
    (the documented conventions of `Panel.covariate_matrix` and `Panel.outcome_matrix`).
    """

    def __init__(self, params, n_waves, outcomes, time_varying=(), time_invariant=()):
        self.p = Params(params)
        self.T, self.outcomes = n_waves, list(outcomes)
        self.multi = len(self.outcomes) > 1
        self.xs, self.zs = list(time_varying), list(time_invariant)
        self.n_w = len(self.xs) * n_waves + len(self.zs)
        self.cov = {}  # (shock, shock) -> covariance

    def key(self, k):
        """The process key of a name: None with one process."""
        return k if self.multi else None

    def const(self, value=0.0):
        return Lin(value, np.zeros(self.n_w), {})

    def x(self, name, t):
        v = np.zeros(self.n_w)
        v[self.xs.index(name) * self.T + t - 1] = 1.0
        return Lin(0.0, v, {})

    def z(self, name):
        v = np.zeros(self.n_w)
        v[len(self.xs) * self.T + self.zs.index(name)] = 1.0
        return Lin(0.0, v, {})

    def disturbances(self, members, name_of):
        """Zero-mean disturbances of ``members`` with Cov(m_i, m_j) = p[name_of(m_i, m_j)]."""
        out = []
        for i, a in enumerate(members):
            for j, b in enumerate(members[: i + 1]):
                self.cov[(a, b)] = self.cov[(b, a)] = name_of(a, b)
            out.append(Lin(0.0, np.zeros(self.n_w), {a: 1.0}))
        return out

    def moments(self, ys):
        """(c, D, Sigma) of the outcomes ``ys`` (a list of Lin in the observed order)."""
        shocks = sorted({k for y in ys for k in y.s} | {k for pair in self.cov for k in pair})
        S = np.array([[y.s.get(k, 0.0) for k in shocks] for y in ys])
        Omega = np.array([[self.cov.get((a, b), 0.0) for b in shocks] for a in shocks])
        return (np.array([y.const for y in ys]), np.array([y.wcoef for y in ys]).reshape(len(ys), self.n_w),
                S @ Omega @ S.T)

    # names by the README's convention -------------------------------------------------------
    def pair(self, a, ka, b, kb):
        """Cov(a of process ka, b of process kb): ``level_var``, ``level_slope_cov``,
        ``initial_level_cov``, ``level_cov[y1,y2]``, ``level_slope_cov[y1,y2]`` ..."""
        if a == b and ka == kb:
            return self.p[label(f"{a}_var", self.key(ka))]
        keys = lambda k1, k2: ([] if not self.multi else [k1] if k1 == k2 else [k1, k2])  # noqa: E731
        base = lambda u, v: u if u == v else f"{u}_{v}"  # noqa: E731
        return self.p.any(label(f"{base(a, b)}_cov", *keys(ka, kb)),
                          label(f"{base(b, a)}_cov", *keys(kb, ka)))

    def factor_block(self, members):
        """Disturbances of factors/first waves ``members`` = [(kind, process)] in one block."""
        tags = [f"u:{kind}:{k}" for kind, k in members]
        kinds = dict(zip(tags, members))
        us = self.disturbances(tags, lambda a, b: self.pair(*kinds[a], *kinds[b]))
        return dict(zip(members, us))

    def wave_residuals(self, t, *, free, level="e"):
        """Residuals of all processes at wave t: resid_var[(k,)(t)], resid_cov[y1,y2(,t)]."""
        tt = t if free else None
        tags = [f"{level}:{k}:{t}" for k in self.outcomes]
        procs = dict(zip(tags, self.outcomes))

        def name(a, b):
            if a == b:
                return self.p[label("resid_var", self.key(procs[a]), tt)]
            k1, k2 = sorted([self.outcomes.index(procs[a]), self.outcomes.index(procs[b])])
            return self.p[label("resid_cov", self.outcomes[k1], self.outcomes[k2], tt)]

        return dict(zip(self.outcomes, self.disturbances(tags, name)))

    def factor_mean(self, kind, k):
        """E[factor | z] = kind_mean + sum_z kind_effect[z] z."""
        m = self.const(self.p[label(f"{kind}_mean", self.key(k))])
        for zname in self.zs:
            m = m + self.p[label(f"{kind}_effect", self.key(k), zname)] * self.z(zname)
        return m

    def predetermined_first_wave(self, k, *, mean=True):
        """y_1 (or the first within deviation) as an exogenous variable given x_1 and z."""
        m = self.const(self.p[label("initial_mean", self.key(k))] if mean else 0.0)
        for xname in self.xs:
            m = m + self.p[label("initial_effect", self.key(k), xname)] * self.x(xname, 1)
        for zname in self.zs:
            m = m + self.p[label("initial_effect", self.key(k), zname)] * self.z(zname)
        return m

    def x_effects(self, k, t, with_z=False):
        """sum_x effect[x] x_t (+ sum_z effect[z] z): equal effects over waves."""
        who = (lambda v: f"{k}<-{v}") if self.multi else (lambda v: v)  # noqa: E731
        out = self.const()
        for xname in self.xs:
            out = out + self.p[label("effect", who(xname))] * self.x(xname, t)
        if with_z:
            for zname in self.zs:
                out = out + self.p[label("effect", who(zname))] * self.z(zname)
        return out

    def lag(self, k, l, name="lag", t=None):
        return self.p[label(name, f"{k}<-{l}" if self.multi else None, t)]


# --- the published forms ------------------------------------------------------------------
def growth_curve(d, scores, *, free):
    """Latent growth curve with time-varying covariates (Bollen & Curran 2006, Latent Curve
    Models, Wiley, ch. 2 and 5; latent basis: Meredith & Tisak 1990, Psychometrika 55(1)):
        y_t = level + sum_f score_f(t) factor_f + b x_t + e_t,  factor_f = m_f + g_f z + u_f,
    e_t ~ N(0, resid_var) independent over waves."""
    kinds = ["level"] + list(scores)
    y = []
    for k in d.outcomes:
        u = d.factor_block([(f, k) for f in kinds])
        fac = {f: d.factor_mean(f, k) + u[(f, k)] for f in kinds}
        for t in range(1, d.T + 1):
            e = d.wave_residuals(t, free=free)[k]
            y.append(fac["level"] + sum((scores[f](t) * fac[f] for f in scores), d.const())
                     + d.x_effects(k, t) + e)
    return y


def linear_growth(d):
    return growth_curve(d, {"slope": lambda t: t - 1.0}, free=False)


def quadratic_growth(d):
    return growth_curve(d, {"slope": lambda t: t - 1.0, "curve": lambda t: (t - 1.0) ** 2}, free=False)


def free_growth(d):
    # Meredith & Tisak (1990): loadings 0 and 1 at waves 1 and 2 set the slope's origin and
    # unit; the later ones are estimated
    score = lambda t: t - 1.0 if t <= 2 else d.p[label("slope_score", t)]  # noqa: E731
    return growth_curve(d, {"slope": score}, free=False)


def alt_family(d, scores, *, free, initial="predetermined", lag_name="lag"):
    """Autoregressive latent trajectory model (Bollen & Curran 2004, Sociological Methods &
    Research 32(3), 336-383), one or two processes (their bivariate ALT with cross-lags):
        y_k1 predetermined: initial_mean + c x_1 + c' z + u_k1, correlated with the factors
        y_kt = level_k + score(t) slope_k + sum_l lag[k<-l] y_l,t-1 + b x_t + e_kt, t >= 2;
    or, with an endogenous first wave, y_k1 = initial_intercept + initial_on_level level +
    initial_on_slope slope + b x_1 + u_k1 (u_k1 uncorrelated with the factors)."""
    kinds = ["level"] + list(scores)
    members = [(f, k) for k in d.outcomes for f in kinds]
    if initial == "predetermined":
        members += [("initial", k) for k in d.outcomes]
    u = d.factor_block(members)
    fac = {(f, k): d.factor_mean(f, k) + u[(f, k)] for k in d.outcomes for f in kinds}
    y = {}
    for k in d.outcomes:
        if initial == "predetermined":
            y[k, 1] = d.predetermined_first_wave(k) + u[("initial", k)]
        else:
            u1 = d.factor_block([("initial", k)])[("initial", k)]
            y[k, 1] = (d.const(d.p["initial_intercept"]) + sum(
                (d.p[f"initial_on_{f}"] * fac[(f, k)] for f in kinds), d.const())
                + d.x_effects(k, 1) + u1)
    for t in range(2, d.T + 1):
        e = d.wave_residuals(t, free=free)
        for k in d.outcomes:
            y[k, t] = (sum((scores[f](t) * fac[(f, k)] for f in scores), fac[("level", k)])
                       + sum((d.lag(k, l, lag_name) * y[l, t - 1] for l in d.outcomes), d.const())
                       + d.x_effects(k, t) + e[k])
    return [y[k, t] for k in d.outcomes for t in range(1, d.T + 1)]


def alt(d, initial="predetermined"):
    return alt_family(d, {"slope": lambda t: t - 1.0}, free=True, initial=initial)


def free_growth_lag(d):
    # Bollen & Curran (2004) ALT with latent-basis loadings (Meredith & Tisak 1990): the
    # first wave is predetermined, so the loadings of the first two equation waves (2 and 3)
    # are fixed at 1 and 2 and the later ones estimated
    score = lambda t: t - 1.0 if t <= 3 else d.p[label("slope_score", t)]  # noqa: E731
    return alt_family(d, {"slope": score}, free=False)


def level_lag(d):
    # Bollen & Curran (2004) ALT without a slope: the dynamic panel model with a random
    # intercept, first wave predetermined and correlated with the level
    return alt_family(d, {}, free=False)


def bivariate_alt(d):
    return alt_family(d, {"slope": lambda t: t - 1.0}, free=True)


def autoregressive(d):
    """Cross-lagged (K = 2) and autoregressive (K = 1) panel model, first wave predetermined
    (the CLPM as written in Hamaker, Kuiper & Grasman 2015, Psychological Methods 20(1),
    102-116, with intercepts and covariates; the simplex of Bollen & Curran 2004):
        y_k1 = initial_mean + c x_1 + c' z + u_k1,
        y_kt = intercept_k + sum_l lag[k<-l] y_l,t-1 + b x_t + b' z + e_kt, t >= 2."""
    u = d.factor_block([("initial", k) for k in d.outcomes])
    y = {(k, 1): d.predetermined_first_wave(k) + u[("initial", k)] for k in d.outcomes}
    for t in range(2, d.T + 1):
        e = d.wave_residuals(t, free=False)
        for k in d.outcomes:
            y[k, t] = (d.const(d.p[label("intercept", d.key(k))])
                       + sum((d.lag(k, l) * y[l, t - 1] for l in d.outcomes), d.const())
                       + d.x_effects(k, t, with_z=True) + e[k])
    return [y[k, t] for k in d.outcomes for t in range(1, d.T + 1)]


def ri_clpm(d):
    """Random-intercept cross-lagged panel model (Hamaker, Kuiper & Grasman 2015,
    Psychological Methods 20(1), eqs. 1-3):
        y_kt = mu_kt + kappa_k + w_kt,  w_kt = sum_l lag[k<-l] w_l,t-1 + e_kt  (t >= 2),
    kappa (level_var, level_cov) uncorrelated with w_1 (initial_var, initial_cov), wave-specific
    residual (co)variances. The paper has no covariates; as the model file's within form
    states, x_t and z enter the within part (w_k1 = c x_1 + c' z + u_k1, and b x_t + b' z in
    each later equation)."""
    kappa = d.factor_block([("level", k) for k in d.outcomes])
    w1 = d.factor_block([("initial", k) for k in d.outcomes])
    w = {(k, 1): d.predetermined_first_wave(k, mean=False) + w1[("initial", k)] for k in d.outcomes}
    for t in range(2, d.T + 1):
        e = d.wave_residuals(t, free=True)
        for k in d.outcomes:
            w[k, t] = (sum((d.lag(k, l) * w[l, t - 1] for l in d.outcomes), d.const())
                       + d.x_effects(k, t, with_z=True) + e[k])
    return [d.const(d.p[label("intercept", k, t)]) + kappa[("level", k)] + w[k, t]
            for k in d.outcomes for t in range(1, d.T + 1)]


def waves_apart(d):
    """Unlinked waves: each wave its own regression, no growth factors and no lag (the
    saturated-mean baseline against which linked models are read; with one observed score
    it is a set of T separate regressions, Bollen & Curran 2006, Latent Curve Models, ch. 2):
        y_t = intercept_t + b x_t + b' z + e_t,  e_t ~ N(0, resid_var_t) independent over waves."""
    (k,) = d.outcomes
    ys = []
    for t in range(1, d.T + 1):
        e = d.wave_residuals(t, free=True)
        ys.append(d.const(d.p[label("intercept", t)]) + d.x_effects(k, t, with_z=True) + e[k])
    return ys


def waves_free(d):
    """Saturated waves: the multivariate regression of the T waves on the covariates with a
    free covariance (Anderson 2003, An Introduction to Multivariate Statistical Analysis,
    3rd ed., ch. 8): y_t = intercept_t + b x_t + b' z + e_t, Cov(e_s, e_t) = resid_cov[s,t]."""
    (k,) = d.outcomes
    tags = [f"e:{t}" for t in range(1, d.T + 1)]

    def name(a, b):
        s, t = sorted((int(a[2:]), int(b[2:])))
        return d.p[label("resid_var", t) if s == t else label("resid_cov", s, t)]

    es = d.disturbances(tags, name)
    return [d.const(d.p[label("intercept", t)]) + d.x_effects(k, t, with_z=True) + es[t - 1]
            for t in range(1, d.T + 1)]


def random_effects(d):
    """Random-effects panel model (Laird & Ware 1982, Biometrics 38(4), random intercept):
    y_t = level + b x_t + e_t, level = level_mean + g z + u uncorrelated with x."""
    return growth_curve(d, {}, free=False)


def fixed_effects(d):
    """Fixed effects as a level correlated with x at every wave, by the projection of the
    individual effect on all waves' x (Mundlak 1978, Econometrica 46(1); Chamberlain 1982,
    J. Econometrics 18(1)): level = level_mean + sum_t level_on[x,t] x_t + u,
    y_t = level + b x_t + e_t."""
    (k,) = d.outcomes
    level = d.const(d.p["level_mean"]) + d.factor_block([("level", k)])[("level", k)]
    for xname in d.xs:
        for t in range(1, d.T + 1):
            level = level + d.p[label("level_on", xname, t)] * d.x(xname, t)
    return [level + d.x_effects(k, t) + d.wave_residuals(t, free=False)[k]
            for t in range(1, d.T + 1)]


def dual_change(d, *, lag="constant", free=False):
    """Dual change score model (McArdle & Hamagami 2001, in Collins & Sayer (eds.), New
    Methods for the Analysis of Change, APA, 139-175; McArdle 2009, Annual Review of
    Psychology 60, 577-605):
        eta_1 = level,  eta_t = eta_(t-1) + slope + beta eta_(t-1) + b x_t   (t >= 2),
        y_t = eta_t + e_t,  e_t ~ N(0, resid_var) measurement error at every wave;
    the level enters only the first wave and slope is the constant change."""
    (k,) = d.outcomes
    u = d.factor_block([("level", k), ("slope", k)])
    level = d.factor_mean("level", k) + u[("level", k)]
    slope = d.factor_mean("slope", k) + u[("slope", k)]
    eta = {1: level}
    for t in range(2, d.T + 1):
        beta = d.p[label("proportional_change", t if lag == "time-varying" else None)]
        eta[t] = (1.0 + beta) * eta[t - 1] + slope + d.x_effects(k, t)
    return [eta[t] + d.wave_residuals(t, free=free, level="eps")[k] for t in range(1, d.T + 1)]


#: catalog name (and options) -> naive published form
NAIVE = {
    "alt": alt,
    "linear-growth": linear_growth,
    "quadratic-growth": quadratic_growth,
    "free-growth": free_growth,
    "free-growth-lag": free_growth_lag,
    "ar": autoregressive,
    "level-lag": level_lag,
    "random-effects": random_effects,
    "fixed-effects": fixed_effects,
    "dual-change": dual_change,
    "clpm": autoregressive,
    "ri-clpm": ri_clpm,
    "bivariate-alt": bivariate_alt,
    "waves-apart": waves_apart,
    "waves-free": waves_free,
}

VARIANTS = {  # option settings whose published form differs, beside each model's defaults
    ("alt", "initial=endogenous"): ({"initial": "endogenous"}, lambda d: alt(d, initial="endogenous")),
    ("dual-change", "lag=time-varying"): ({"lag": "time-varying"},
                                          lambda d: dual_change(d, lag="time-varying")),
    ("dual-change", "residuals=free"): ({"residuals": "free"}, lambda d: dual_change(d, free=True)),
}

CASES = ([pytest.param(name, {}, NAIVE[name], id=name) for name in bl.catalog()]
         + [pytest.param(name, opts, fn, id=f"{name}-{tag}") for (name, tag), (opts, fn) in VARIANTS.items()])

T = 5


def _design(spec):
    outcomes = ["y"] if spec.processes == 1 else ["y1", "y2"]
    zs = [] if spec.level_covariates == "every-wave" else ["z"]  # fixed effects: no z (identification)
    return outcomes, ["x"], zs


def _naive_moments(fn, values, outcomes, xs, zs, n_waves=T):
    d = Design(values, n_waves, outcomes, xs, zs)
    ys = fn(d)
    return d.moments(ys), d.p.read


def _assert_same(engine, naive):
    for what, a, b in zip(("mean", "covariate slopes", "covariance"), engine, naive):
        scale = max(1.0, float(np.abs(b).max(initial=0.0)))
        np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-8 * scale, err_msg=what)


def test_every_catalog_model_has_a_published_form():
    assert set(NAIVE) == set(bl.catalog())


@pytest.mark.parametrize("name, options, fn", CASES)
def test_engine_moments_equal_published_form(name, options, fn):
    spec = bl.model(name, **options)
    outcomes, xs, zs = _design(spec)
    s = build_structure(spec, outcomes=outcomes, n_waves=T, time_varying=xs, time_invariant=zs)
    rng = np.random.default_rng(7)
    tr = Unconstrained(s)

    # 1. a random admissible point, named, whose covariance blocks are well inside the
    # positive definite cone (smallest eigenvalue above 0.3): at a point near a singular block
    # the ML estimate on 400 units may sit on the boundary (measured: bivariate-alt's first
    # draw has a factor block with eigenvalue 0.077, and its ML estimate is singular there)
    for _ in range(50):
        theta = tr.to_natural(rng.normal(0.0, 0.4, size=s.n_params))
        for i, n in enumerate(s.names):  # free time scores near their linear values, so that the
            if n.startswith("slope_score"):  # slope's variance is well away from 0 in the ML part
                theta[i] += float(n[n.index("[") + 1:-1]) - 1.0
        if all(np.linalg.eigvalsh(b.matrix(theta)).min() > 0.3 for b in s.blocks):
            break
    else:
        raise AssertionError("no well-conditioned point in 50 draws")
    values = dict(zip(s.names, theta))
    naive, read = _naive_moments(fn, values, outcomes, xs, zs)
    assert read == set(s.names), (sorted(set(s.names) - read), sorted(read - set(s.names)))
    _assert_same(moments_at(s, parameter_vector(s, values)), naive)

    # 2. the engine's ML estimates on a panel drawn at that point
    df = bl.simulate(spec, values, 400, T, seed=3, covariates={x: ("normal", 0.0, 1.0) for x in xs},
                     time_invariant={z: ("normal", 0.0, 1.0) for z in zs}, outcomes=outcomes)
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=outcomes, time_varying=xs,
                               time_invariant=zs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = bl.fit_ml(spec, panel, starts=1)
    assert ml.converged and not ml.boundary
    assert list(ml.params.index) == list(s.names)
    naive, _ = _naive_moments(fn, ml.params.to_dict(), outcomes, xs, zs)
    _assert_same(moments_at(s, ml.params.to_numpy()), naive)


# --- catalog models in their form with several indicators per wave ---------------------------
def ri_clpm_indicators(d, indicators):
    """Multiple-indicator RI-CLPM (Mulder & Hamaker 2021, Structural Equation Modeling 28(4),
    "Three extensions of the random intercept cross-lagged panel model", the version with
    indicator-specific random intercepts):
        y_jkt = mu_jk + RI_jk + lambda_jk w_kt + eps_jkt,   RI (level_var[j], level_cov[j,j'])
    uncorrelated with the within part; the within part as in ``ri_clpm`` with the within
    factors' wave intercepts intercept[k,t] at t >= 2 (scalar invariance: mu_jk and lambda_jk
    equal over waves, the first indicator the marker with loading 1); eps_jkt independent
    (unique_var[j,t]). Covariates enter the within part, as in ``ri_clpm``."""
    items = [(k, j) for k in d.outcomes for j in indicators[k]]
    ri = d.factor_block([("level", j) for _, j in items])
    w1 = d.factor_block([("initial", k) for k in d.outcomes])
    w = {(k, 1): d.predetermined_first_wave(k, mean=False) + w1[("initial", k)] for k in d.outcomes}
    for t in range(2, d.T + 1):
        e = d.wave_residuals(t, free=True)
        for k in d.outcomes:
            w[k, t] = (d.const(d.p[label("intercept", k, t)])
                       + sum((d.lag(k, l) * w[l, t - 1] for l in d.outcomes), d.const())
                       + d.x_effects(k, t, with_z=True) + e[k])
    ys = []
    for k, j in items:
        lam = 1.0 if j == indicators[k][0] else d.p[label("loading", j)]
        for t in range(1, d.T + 1):
            (eps,) = d.disturbances([f"eps:{j}:{t}"], lambda a, b, j=j, t=t: d.p[label("unique_var", j, t)])
            ys.append(d.const(d.p[label("intercept", j)]) + ri[("level", j)] + lam * w[k, t] + eps)
    return ys


#: catalog name -> its published form with several indicators per wave (within-form models
#: had none before; latent-form models are held to naive Kronecker forms in
#: tests/model/test_measurement.py and tests/model/test_processes.py)
INDICATOR_NAIVE = {"ri-clpm": ri_clpm_indicators}


def test_every_within_form_model_has_a_published_indicator_form():
    assert {n for n in bl.catalog() if bl.model(n).form == "within"} <= set(INDICATOR_NAIVE)


@pytest.mark.parametrize("name", sorted(INDICATOR_NAIVE))
def test_engine_moments_equal_published_indicator_form(name):
    spec = bl.model(name)
    outcomes, xs, zs = _design(spec)
    indicators = {k: [f"{k}_{i}" for i in "abc"] for k in outcomes}
    s = build_structure(spec, outcomes=outcomes, n_waves=T, time_varying=xs, time_invariant=zs,
                        indicators=indicators)
    fn = lambda d: INDICATOR_NAIVE[name](d, indicators)  # noqa: E731
    theta = Unconstrained(s).to_natural(np.random.default_rng(7).normal(0.0, 0.4, size=s.n_params))
    values = dict(zip(s.names, theta))
    naive, read = _naive_moments(fn, values, outcomes, xs, zs)
    assert read == set(s.names), (sorted(set(s.names) - read), sorted(read - set(s.names)))
    _assert_same(moments_at(s, theta), naive)
    # and at the engine's ML estimates on a panel drawn at that point
    df = bl.simulate(spec, values, 400, T, seed=3, covariates={x: ("normal", 0.0, 1.0) for x in xs},
                     time_invariant={z: ("normal", 0.0, 1.0) for z in zs}, outcomes=outcomes,
                     indicators=indicators)
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=indicators, time_varying=xs,
                               time_invariant=zs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = bl.fit_ml(spec, panel, starts=1)
    assert ml.converged and not ml.boundary
    naive, _ = _naive_moments(fn, ml.params.to_dict(), outcomes, xs, zs)
    _assert_same(moments_at(s, ml.params.to_numpy()), naive)


# --- dual change: the published parameters, not a reparameterisation ------------------------
DUAL_TRUTH = dict(level_mean=50.0, slope_mean=5.0, proportional_change=-0.1, level_var=25.0,
                  level_slope_cov=2.0, slope_var=1.0, resid_var=4.0)


def _dual_change_panel(n, n_waves, seed):
    """Draw y straight from McArdle's equations (not through the engine's structure)."""
    rng = np.random.default_rng(seed)
    p = DUAL_TRUTH
    factors = rng.multivariate_normal([p["level_mean"], p["slope_mean"]],
                                      [[p["level_var"], p["level_slope_cov"]],
                                       [p["level_slope_cov"], p["slope_var"]]], size=n)
    eta = np.empty((n, n_waves))
    eta[:, 0] = factors[:, 0]
    for t in range(1, n_waves):
        eta[:, t] = eta[:, t - 1] + factors[:, 1] + p["proportional_change"] * eta[:, t - 1]
    y = eta + rng.normal(0.0, np.sqrt(p["resid_var"]), size=eta.shape)
    df = pd.DataFrame({"unit": np.repeat(np.arange(n), n_waves),
                       "wave": np.tile(np.arange(1, n_waves + 1), n), "y": y.ravel()})
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y"])


def test_dual_change_ml_recovers_the_published_parameters():
    # Truth with a clearly non-zero constant change (5 per wave, against a level of 50): the
    # old parameterisation reported slope_mean = 5 - 50 = -45 here.
    panel = _dual_change_panel(2000, 6, seed=2024)
    spec = bl.model("dual-change")
    ml = bl.fit_ml(spec, panel)
    assert ml.converged
    for name, value in DUAL_TRUTH.items():
        assert abs(ml.params[name] - value) < 3.5 * ml.se[name], (name, ml.params[name], ml.se[name])
    # the engine's moments at its estimates are the published form's at the same named values
    s = build_structure(spec, outcomes=["y"], n_waves=6)
    naive, read = _naive_moments(dual_change, ml.params.to_dict(), ["y"], [], [], n_waves=6)
    assert read == set(s.names)
    _assert_same(moments_at(s, ml.params.to_numpy()), naive)


def test_dual_change_simulation_has_the_published_meaning():
    # bl.simulate draws from the same equations: by hand from eta_1 = level and
    # eta_t = 0.9 eta_(t-1) + slope, E(y_t) = 0.9 E(y_(t-1)) + slope_mean from 50, which with
    # slope_mean = 8 is 50, 53, 55.7, 58.13 (the level loaded on every change would give 103
    # at wave 2).
    params = {**DUAL_TRUTH, "slope_mean": 8.0}
    df = bl.simulate(bl.model("dual-change"), params, 20_000, 4, seed=5)
    means = df.groupby("wave")["y"].mean().to_numpy()
    expected = [50.0, 53.0, 55.7, 58.13]
    sd = df.groupby("wave")["y"].std().to_numpy() / np.sqrt(20_000)
    assert np.all(np.abs(means - expected) < 4 * sd), (means, expected)


def test_initial_is_level_without_a_lag_is_refused(tmp_path):
    # Without the lag the level (the first wave) would never reach later waves.
    path = tmp_path / "lcs-no-lag.toml"
    path.write_text(textwrap.dedent("""\
        description = "change score without proportional change"
        processes = 1
        factors = ["level", "slope"]
        scores = "constant"
        initial_is_level = true
        [options]
        lag = "none"
        """))
    with pytest.raises(SpecError, match=r"initial_is_level = true.*needs a lag.*lag = \"constant\""):
        bl.model(str(path))
