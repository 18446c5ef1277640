"""Maximum likelihood for two-process models against an independent optimiser.

The reference is written here from the structural equations of the bivariate
autoregressive latent trajectory model (Bollen, K. A. & Curran, P. J. 2004, Autoregressive
latent trajectory (ALT) models: a synthesis of two traditions, Sociological Methods &
Research 32(3), 336-383): for each process k, wave 1 is predetermined,
y[k,1] = initial_mean[k] + e[k,1], and for t >= 2

    y[k,t] = level[k] + (t-1) slope[k] + sum_l lag[k<-l] y[l,t-1] + zeta[k,t],

with (level, slope, e[., 1]) of both processes jointly normal and (zeta[1,t], zeta[2,t])
normal with a covariance of their own at each wave. The mean and covariance of all waves
come from iterating that recursion on the coefficients of the basic normal variables with
NumPy; each unit is scored by ``scipy.stats.multivariate_normal.logpdf``. SciPy's BFGS
maximises the same sum written through the sample mean and covariance (the normal
log-likelihood's sufficient statistics) by BFGS over Cholesky factors, with the gradient
from central differences; every end point is scored again by ``logpdf``, and the two forms
must agree there to 1e-8. Nothing from bayeslong's moments, likelihood or optimiser
is used by the reference.

A reference optimiser that stops early would let a weak fit pass, so the reference is the
best of SciPy runs from several starts: the truth, bayeslong's own estimate (a polish:
if bayeslong stopped short of a maximum, SciPy climbs further from there and the test
fails) and a jittered truth. bayeslong must then be within 1e-4 of it, from both sides.
"""

import time
import warnings

import numpy as np
import pytest
from scipy import optimize, stats

import bayeslong as bl
from bayeslong.model.structure import build_structure

BLOCK = ["level", "slope", "level", "slope", "initial", "initial"]  # y1, y1, y2, y2, y1, y2


def _truth(slope_var2, T):
    """The truth in the reference's own terms (the factor/first-wave block S ordered as
    level y1, slope y1, level y2, slope y2, initial y1, initial y2)."""
    sd = np.sqrt([1.0, 0.09, 0.8, slope_var2, 1.5, 1.2])
    R = np.array([[1, .2, .4, .1, .5, .3], [.2, 1, .1, .3, .1, .1], [.4, .1, 1, .2, .3, .5],
                  [.1, .3, .2, 1, .1, .1], [.5, .1, .3, .1, 1, .4], [.3, .1, .5, .1, .4, 1]])
    return {"means": np.array([5.0, 0.4, 2.0, 0.2]), "lag": np.array([[0.3, 0.1], [0.15, 0.25]]),
            "init": np.array([5.0, 2.0]), "S": R * np.outer(sd, sd),
            "resid": [np.array([[0.5, 0.1], [0.1, 0.4]])] * (T - 1)}


def _named(truth, structure):
    """The same values under bayeslong's names (the block looked up by role, not position)."""
    p = {"level_mean[y1]": truth["means"][0], "slope_mean[y1]": truth["means"][1],
         "level_mean[y2]": truth["means"][2], "slope_mean[y2]": truth["means"][3],
         "initial_mean[y1]": truth["init"][0], "initial_mean[y2]": truth["init"][1]}
    for k, a in enumerate(("y1", "y2")):
        for m, b in enumerate(("y1", "y2")):
            p[f"lag[{a}<-{b}]"] = truth["lag"][k, m]
    for t, resid in enumerate(truth["resid"], start=2):
        p[f"resid_var[y1,{t}]"], p[f"resid_var[y2,{t}]"] = resid[0, 0], resid[1, 1]
        p[f"resid_cov[y1,y2,{t}]"] = resid[0, 1]
    block = next(b for b in structure.blocks if len(b.index) == 6)
    for r in range(6):
        for c in range(r + 1):
            p[structure.names[block.index[r, c]]] = truth["S"][r, c]
    return p


def _from_named(p, structure, T):
    """bayeslong's estimates in the reference's terms."""
    block = next(b for b in structure.blocks if len(b.index) == 6)
    S = np.array([[p[structure.names[block.index[r, c]]] for c in range(6)] for r in range(6)])
    return {"means": np.array([p["level_mean[y1]"], p["slope_mean[y1]"], p["level_mean[y2]"],
                               p["slope_mean[y2]"]]),
            "lag": np.array([[p["lag[y1<-y1]"], p["lag[y1<-y2]"]], [p["lag[y2<-y1]"], p["lag[y2<-y2]"]]]),
            "init": np.array([p["initial_mean[y1]"], p["initial_mean[y2]"]]), "S": S,
            "resid": [np.array([[p[f"resid_var[y1,{t}]"], p[f"resid_cov[y1,y2,{t}]"]],
                                [p[f"resid_cov[y1,y2,{t}]"], p[f"resid_var[y2,{t}]"]]])
                      for t in range(2, T + 1)]}


def _moments(v, T):
    """Mean and covariance of (y1[1..T], y2[1..T]) by iterating the recursion.

    Every y[k,t] is a + b' x with x = (level1, slope1, level2, slope2, e1, e2, zeta[., 2..T])
    the basic normal variables; the recursion updates (a, b) wave by wave. Every array may
    carry a leading batch axis (many parameter points at once, for differences).
    """
    lag = np.asarray(v["lag"])
    batch = lag.shape[:-2]
    n_x = 6 + 2 * (T - 1)
    cov_x = np.zeros(batch + (n_x, n_x))
    cov_x[..., :6, :6] = v["S"]
    for t in range(T - 1):
        cov_x[..., 6 + 2 * t:8 + 2 * t, 6 + 2 * t:8 + 2 * t] = v["resid"][t]
    mean_x = np.zeros(batch + (n_x,))
    mean_x[..., :4] = v["means"]
    a = np.array(np.broadcast_to(v["init"], batch + (2,)), dtype=float)  # wave 1: initial_mean + e
    b = np.zeros(batch + (2, n_x))
    b[..., 0, 4] = b[..., 1, 5] = 1.0
    rows_a, rows_b = [a], [b]
    for t in range(2, T + 1):
        growth = np.zeros((2, n_x))
        growth[0, 0], growth[0, 1] = 1.0, t - 1.0
        growth[1, 2], growth[1, 3] = 1.0, t - 1.0
        shock = np.zeros((2, n_x))
        shock[0, 6 + 2 * (t - 2)] = shock[1, 7 + 2 * (t - 2)] = 1.0
        a = (lag @ a[..., None])[..., 0]
        b = growth + lag @ b + shock
        rows_a.append(a)
        rows_b.append(b)
    A, B = np.stack(rows_a, axis=-2), np.stack(rows_b, axis=-3)  # (..., T, 2), (..., T, 2, n_x)
    mean_b = (B @ mean_x[..., None, :, None])[..., 0]  # (..., T, 2)
    mean = np.concatenate([A[..., 0] + mean_b[..., 0], A[..., 1] + mean_b[..., 1]], axis=-1)
    coef = np.concatenate([B[..., 0, :], B[..., 1, :]], axis=-2)  # process-major rows
    return mean, coef @ cov_x @ np.swapaxes(coef, -1, -2)


def _factor(S):
    # a Cholesky factor also of a singular block (a boundary estimate)
    w, v = np.linalg.eigh(0.5 * (S + S.T))
    return np.linalg.cholesky((v * np.maximum(w, 0.0)) @ v.T + 1e-12 * np.eye(len(S)))


def _pack(v):
    return np.concatenate([v["means"], v["lag"].ravel(), v["init"], _factor(v["S"])[np.tril_indices(6)]]
                          + [_factor(r)[np.tril_indices(2)] for r in v["resid"]])


def _unpack(x, T):
    x = np.asarray(x)
    batch = x.shape[:-1]
    L = np.zeros(batch + (6, 6))
    L[..., *np.tril_indices(6)] = x[..., 10:31]
    resid = []
    for t in range(T - 1):
        R = np.zeros(batch + (2, 2))
        R[..., *np.tril_indices(2)] = x[..., 31 + 3 * t:34 + 3 * t]
        resid.append(R @ np.swapaxes(R, -1, -2))
    return {"means": x[..., :4], "lag": x[..., 4:8].reshape(batch + (2, 2)), "init": x[..., 8:10],
            "S": L @ np.swapaxes(L, -1, -2), "resid": resid}


def _loglik(v, Y, T):
    mean, cov = _moments(v, T)
    try:
        return float(np.sum(stats.multivariate_normal.logpdf(Y, mean, cov)))
    except (np.linalg.LinAlgError, ValueError):
        return -np.inf


def _reference(Y, T, starts):
    """The best maximum SciPy's BFGS finds from ``starts``, scored by ``logpdf``. Its
    gradient is central differences of the objective, all 2p points evaluated together."""
    n, k = Y.shape
    ybar = Y.mean(axis=0)
    C = (Y - ybar).T @ (Y - ybar) / n

    def objective(X):
        # -1/n sum_i log N(y_i; mu, Sigma) = 1/2 (k log 2pi + log det Sigma
        #                                         + tr(Sigma^-1 (C + (ybar - mu)(ybar - mu)')))
        mean, cov = _moments(_unpack(X, T), T)
        sign, logdet = np.linalg.slogdet(cov)
        d = ybar - mean
        scatter = C + d[..., :, None] * d[..., None, :]
        with np.errstate(all="ignore"):
            value = 0.5 * (k * np.log(2 * np.pi) + logdet
                           + np.trace(np.linalg.solve(cov, scatter), axis1=-2, axis2=-1))
        return np.where(sign > 0, value, 1e10)

    def grad(x, h=1e-6):
        E = h * np.eye(len(x))
        return (objective(x + E) - objective(x - E)) / (2 * h)

    best = None
    for v in starts:
        x = optimize.minimize(lambda z: float(objective(z)), _pack(v), jac=grad, method="BFGS",
                              options={"gtol": 1e-8, "maxiter": 5000}).x
        ll = _loglik(_unpack(x, T), Y, T)
        assert -float(objective(x)) * n == pytest.approx(ll, abs=1e-8)  # the two forms agree
        best = ll if best is None else max(best, ll)
    return best


def _case(slope_var2, n_units, T, seed):
    spec = bl.model("bivariate-alt")
    truth = _truth(slope_var2, T)
    structure = build_structure(spec, outcomes=["y1", "y2"], n_waves=T)
    df = bl.simulate(spec, _named(truth, structure), n_units=n_units, n_waves=T, seed=seed)
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y1", "y2"])
    Y = np.concatenate([panel.y[:, :, 0], panel.y[:, :, 1]], axis=1)
    return spec, structure, panel, Y, truth


def _check(slope_var2, n_units, T, seed, seconds):
    spec, structure, panel, Y, truth = _case(slope_var2, n_units, T, seed)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", bl.BoundaryWarning)
        ml = bl.fit_ml(spec, panel)
    took = time.perf_counter() - t0
    assert ml.converged, ml.message
    estimate = _from_named(ml.params.to_dict(), structure, T)
    # the two implementations agree on the likelihood at bayeslong's estimate
    assert _loglik(estimate, Y, T) == pytest.approx(ml.loglik, abs=1e-6)
    jitter = np.random.default_rng(seed)
    shaken = {**truth, "lag": truth["lag"] + jitter.uniform(-0.1, 0.1, (2, 2))}
    reference = _reference(Y, T, [truth, estimate, shaken])
    # expected: the best SciPy maximum of the naive likelihood (polished from bayeslong's
    # own point, among others); bayeslong neither falls short of it nor exceeds it
    assert ml.loglik >= reference - 1e-4
    assert ml.loglik <= reference + 1e-4
    assert took < seconds, took
    return ml


def test_bivariate_alt_interior_maximum_matches_scipy_maximum():
    # every variance well inside the space, in the truth and in the estimate
    ml = _check(0.04, n_units=500, T=6, seed=5, seconds=10)
    assert not ml.boundary


def test_bivariate_alt_truth_inside_estimate_on_the_edge_matches_scipy_maximum():
    # the truth is inside the space, but at T = 5 and N = 300 the maximum puts the factor
    # block on its edge (singular); single-process starts alone once stopped below it
    # (measured -4150.82 against -4149.90), and a log-scale search crept along a flat ridge
    _check(0.04, n_units=300, T=5, seed=3, seconds=10)


def test_bivariate_alt_near_zero_slope_variance_matches_scipy_maximum():
    # hard case: the second process's slope variance is 0.0005 (sd 0.022 against a
    # residual sd of 0.63), so its estimate sits at or next to the edge of the space
    _check(0.0005, n_units=125, T=6, seed=7, seconds=10)


def test_bivariate_alt_zero_slope_variance_is_a_boundary_maximum():
    # the second process's slope does not vary at all: the maximum is on the boundary (a
    # singular factor block) or next to it; either way bayeslong reaches SciPy's maximum
    # and says converged
    ml = _check(0.0, n_units=200, T=5, seed=11, seconds=10)
    assert "converged" in ml.message


def test_a_fit_that_does_not_converge_says_so(monkeypatch):
    # Newton's method cut to two iterations cannot reach the maximum: the result must say
    # converged=False, explain in words what happened and what to try, and warn
    import bayeslong.infer.ml as ml_module

    original = ml_module.maximise
    monkeypatch.setattr(ml_module, "maximise",
                        lambda *a, **k: original(*a, **{**k, "max_iter": 2}))
    spec, _, panel, _, _ = _case(0.04, n_units=200, T=5, seed=2)
    with pytest.warns(bl.ConvergenceWarning, match="not converged.*Try more starts"):
        ml = bl.fit_ml(spec, panel, starts=2)
    assert not ml.converged
    assert ml.message.startswith("not converged")
    assert not ml.starts["converged"].any()
