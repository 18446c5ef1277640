"""Trust-region Newton's method for maximum likelihood, in Cholesky coordinates.

What :func:`bayeslong.infer.ml.fit_ml` runs from each start. The covariance blocks are in
plain Cholesky coordinates (:class:`bayeslong.model.transform.Cholesky`), so a variance at
zero is an interior point and a maximum there is an ordinary stationary point. The
curvature is the expected information while far from the maximum (Fisher scoring: cheap
and positive semi-definite in the natural parameters) and the exact Hessian close to it
(so a misspecified model, where the two differ, still converges quadratically). Each
iteration takes the better of two steps: a trust-region step on the eigen-decomposition
of the curvature, uphill even where the curvature is indefinite or singular (a saddle, a
flat ridge, a zero pivot's free rotation), and Newton's step in the natural parameters
with the covariance blocks projected onto the positive semi-definite cone (which lands
on the boundary face it points to). When Newton's method creeps towards a nearly
singular block, the face with that pivot at zero is maximised on its own. Convergence is
judged by the Newton decrement g' H^-1 g, which is scale-free (it is twice the gain the
quadratic model still promises), not by the size of the steps, which along a flat ridge
stay large while the log-likelihood no longer changes.

References
----------
Moré, J. J. & Sorensen, D. C. (1983). Computing a trust region step. SIAM Journal on
Scientific and Statistical Computing 4(3), 553-572.
Nocedal, J. & Wright, S. J. (2006). Numerical Optimization, 2nd ed., ch. 4 (trust regions)
and 3.5 (the Newton decrement as stopping rule: Boyd, S. & Vandenberghe, L. 2004, Convex
Optimization, 9.5.1). Springer.
Lee, S.-Y. & Jennrich, R. I. (1979). A study of algorithms for covariance structure
analysis with specific comparisons using factor analysis. Psychometrika 44(1), 99-113.
"""

from __future__ import annotations

import numpy as np

from bayeslong.infer.likelihood import (
    loglik_grad_hessian,
    loglik_grad_information,
    pattern_values,
)
from bayeslong.model.moments import moments_at

CREEP = ("Newton's method slowed to a creep (a flat ridge, or a variance heading to zero "
         "with the likelihood nearly flat there)")

#: Newton decrement g' H^-1 g (log-likelihood units) below which a run has converged.
DECREMENT_TOL = 1e-8
#: below this decrement a converged run is not polished by a last Newton step
POLISH_ABOVE = 1e-14


def hessian(f, theta, data, grad=None) -> np.ndarray:
    """Hessian of the log-likelihood by differences of the analytic gradient.

    Central differences by default (relative error about 1e-10); given the gradient at
    ``theta``, forward differences (half the evaluations; relative error about 1e-5, ample
    for standard errors, which match statsmodels' analytic ones to 1e-5 on sleepstudy,
    see tests/infer/test_ml.py).
    """
    p = len(theta)
    H = np.zeros((p, p))
    for i in range(p):
        h = 1e-5 * max(abs(theta[i]), 1e-2)
        e = np.zeros(p)
        e[i] = h
        if grad is None:
            H[:, i] = (f(theta + e, *data)[1] - f(theta - e, *data)[1]) / (2 * h)
        else:
            H[:, i] = (f(theta + e, *data)[1] - grad) / h
    return 0.5 * (H + H.T)


def _trust_step(M, g, radius):
    """Maximiser of g's - s'Ms/2 over ||D s|| <= radius, D = sqrt(diag M) (scaled).

    Returns the step and the Newton decrement parts: ``(step, decrement, flat, lowest)``
    with ``decrement`` = sum over clearly positive eigenvalues of (v'g)^2 / w, ``flat`` the
    gradient's norm along the other eigenvectors (scaled), ``lowest`` the smallest
    eigenvalue over the largest (negative: not a maximum).
    """
    diag = np.abs(np.diag(M))
    d = np.sqrt(np.maximum(diag, 1e-12 * max(diag.max(), 1e-300)))
    Ms = M / np.outer(d, d)
    gs = g / d
    w, V = np.linalg.eigh(0.5 * (Ms + Ms.T))
    gv = V.T @ gs
    top = max(abs(w).max(), 1e-300)
    pos = w > 1e-10 * top
    decrement = float(np.sum(gv[pos] ** 2 / w[pos]))
    flat = float(np.sqrt(np.sum(gv[~pos] ** 2)))
    lowest = float(w.min() / top)

    def length(lam):
        return float(np.linalg.norm(gv / (w + lam)))

    if w.min() > 1e-10 * top and length(0.0) <= radius:
        lam = 0.0
    else:
        # the norm of the step falls as lam rises past -min(w): bisect on log(lam - lo)
        lo = max(0.0, -w.min())
        a, b = lo + 1e-12 * top, lo + top + np.linalg.norm(gv) / max(radius, 1e-300)
        if length(a) <= radius:
            lam = a
        else:
            for _ in range(80):
                mid = np.sqrt(a * b) if a > 0 else 0.5 * (a + b)
                a, b = (mid, b) if length(mid) > radius else (a, mid)
                if b - a <= 1e-10 * b:
                    break
            lam = b
    step = V @ (gv / (w + lam))
    return step / d, decrement, flat, lowest, float(np.linalg.norm(step))


def _project(tr, theta):
    """``theta`` with each covariance block moved to the nearest positive semi-definite
    matrix in the Frobenius norm (its negative eigenvalues set to zero; Higham, N. J.
    1988, Computing a nearest symmetric positive semidefinite matrix, Linear Algebra and
    its Applications 103, 103-118)."""
    theta = np.array(theta, dtype=float)
    for idx, rows, cols, slots in tr.blocks:
        w, V = np.linalg.eigh(theta[idx])
        if w.min() < 0:
            theta[slots] = ((V * np.maximum(w, 0.0)) @ V.T)[rows, cols]
    return theta


def _small_pivots(tr, u, threshold: float = 1e-2) -> list[int]:
    """Slots of u of the pivots whose face a nearly singular block is heading to.

    A block of rank one less has a null vector v; its zero pivot is that of the last
    variable in v (the leading sub-block up to it is the first singular one). Near
    singular means an eigenvalue of the block's correlation matrix under ``threshold``
    (the variances themselves can differ by orders of magnitude, e.g. a slope's and a
    level's). Smallest eigenvalue first.
    """
    found = []
    for idx, rows, cols, slots in tr.blocks:
        L = tr.factor(u[slots], rows, cols, len(idx))
        S = L @ L.T
        sd = np.sqrt(np.maximum(np.diag(S), 1e-300))
        w, V = np.linalg.eigh(S / np.outer(sd, sd))
        for k in np.flatnonzero(w < threshold):
            # short of the limit, v's small entries are not yet zero: try the last clear
            # entry's pivot first, then the last non-negligible one's
            for share in (0.1, 1e-2):
                d = int(np.flatnonzero(np.abs(V[:, k]) > share * np.abs(V[:, k]).max())[-1])
                found.append((w[k], int(slots[(rows == d) & (cols == d)][0])))
    return list(dict.fromkeys(slot for _, slot in sorted(found, key=lambda x: x[0])))


def maximise(structure, f, u, data, tr, *, max_iter: int = 60, exact_after: int = 20,
             tol: float = DECREMENT_TOL) -> dict:
    """Maximise the log-likelihood from ``u``, in the Cholesky coordinates of ``tr``.

    A run of :func:`_newton` first. When it has not converged and a block is close to
    singular, the maximum may be on the boundary with a Lagrange multiplier near zero:
    there the log-likelihood is quartic, not quadratic, in the pivot, and Newton's method
    only creeps towards it. Then the face with that pivot held at zero is maximised (a
    smooth problem of its own: the block of one rank less), and the unrestricted method
    restarts from the face's maximum; it accepts it at once when it is a maximum of the
    whole problem (gradient zero and curvature negative semi-definite in every Cholesky
    coordinate: the Karush-Kuhn-Tucker conditions of the semi-definite constraint) and
    otherwise leaves the face uphill. The best end point counts.

    Returns a dict: ``u``, ``theta``, ``loglik``, ``converged``, ``decrement``,
    ``iterations``, ``hessian`` (exact Hessian in theta at the end, or None) and
    ``reason`` (why it stopped, in words).
    """
    run = _newton(structure, f, u, data, tr, max_iter=max_iter, exact_after=exact_after,
                  tol=tol, creep=True)
    used, tried = run["iterations"], set()
    while not run["converged"] and np.isfinite(run["loglik"]) and used < 4 * max_iter:
        for slot in [p for p in _small_pivots(tr, run["u"]) if p not in tried][:3]:
            tried.add(slot)
            fixed = np.zeros(len(u), dtype=bool)
            fixed[slot] = True
            start = run["u"].copy()
            start[slot] = 0.0
            face = _newton(structure, f, start, data, tr, max_iter=max_iter, exact_after=0,
                           tol=tol, fixed=fixed)
            used += face["iterations"]
            if not np.isfinite(face["loglik"]):
                continue
            full = _newton(structure, f, face["u"], data, tr, max_iter=max_iter, exact_after=0,
                           tol=tol, creep=True)
            used += full["iterations"]
            if full["converged"] and full["loglik"] >= run["loglik"] - 1e-6:
                full["iterations"] = used
                return full
        if run["reason"] != CREEP:
            break  # the run ended for another reason than creeping: no use going on
        # no face was the maximum: the run goes on where it stopped (and may creep again,
        # closer to the face it heads for)
        more = _newton(structure, f, run["u"], data, tr, max_iter=max_iter, exact_after=0,
                       tol=tol, creep=True)
        used += more["iterations"]
        run = more if more["loglik"] >= run["loglik"] else run
        if more is not run:
            break
    run["iterations"] = used
    return run


def _newton(structure, f, u, data, tr, *, max_iter: int, exact_after: int, tol: float,
            fixed=None, creep: bool = False) -> dict:
    """Trust-region Newton's method in the Cholesky coordinates ``u`` of ``tr``.

    The curvature in u is M = J' I(theta) J - C, with J = d theta / d u, I the expected
    information (Fisher scoring) and C = sum_k g_k d2 theta_k / du du'
    (:meth:`~bayeslong.model.transform.Cholesky.curvature`); once the decrement falls
    below 1, the scoring steps stop shrinking it by at least a factor 3, or after
    ``exact_after`` iterations, I is replaced by the exact observed information
    (:func:`~bayeslong.infer.likelihood.loglik_grad_hessian`) for the rest of the run.
    Each iteration also tries Newton's step in the natural parameters (see
    ``natural_step``) and keeps whichever of the two steps gains more. Converged when, at
    the exact Hessian, M is positive semi-definite (relative tolerance 1e-6), the Newton
    decrement is below ``tol`` and the gradient along M's null directions (a zero pivot's
    free rotation) is below 1e-6: the first- and second-order conditions of a maximum;
    a run converged with a decrement above ``POLISH_ABOVE`` takes one last Newton step.
    Coordinates marked in ``fixed`` stay where they are (a face of the boundary). With
    ``creep``, the run stops early when Newton's method has lost its pace (after 12 exact
    iterations and close to a maximum, the decrement below 1 has not fallen by a factor
    100 over the last 6), for :func:`maximise` to try the faces.
    """
    def value(theta):
        c, D, S = moments_at(structure, theta)
        with np.errstate(all="ignore"):
            return float(np.sum(pattern_values(c, D, S, *data)))

    def natural_step(uu, ll, g_theta, info):
        # Newton's (or scoring's) step in the natural parameters, halved at most twice;
        # a covariance block it leaves outside the positive semi-definite cone is
        # projected back onto it (negative eigenvalues set to zero: the nearest such
        # matrix, Higham 1988), which lands on the boundary face the step points to. Kept
        # when the likelihood rises by a tenth of what the quadratic model predicts for
        # the projected step. In theta the covariance parameters enter Sigma linearly, so
        # a curved valley of the Cholesky coordinates near a small pivot is straight here
        # (measured: 150 creeping trust-region steps in u, where this step crossed the
        # valley at once).
        theta0 = tr.to_natural(uu)
        try:
            chol = np.linalg.cholesky(info)
        except np.linalg.LinAlgError:
            # the observed information is indefinite here: scoring's expected information
            # (positive definite for an identified model) gives the direction instead
            with np.errstate(all="ignore"):
                info = loglik_grad_information(structure, theta0, *data)[2]
            try:
                chol = np.linalg.cholesky(info)
            except (np.linalg.LinAlgError, ValueError):
                return None
        s = np.linalg.solve(chol.T, np.linalg.solve(chol, g_theta))
        for t in (1.0, 0.5, 0.25):
            theta = _project(tr, theta0 + t * s)
            delta = theta - theta0
            model = float(g_theta @ delta - 0.5 * delta @ info @ delta)
            if not model > 0:
                continue
            new = value(theta)
            if np.isfinite(new) and new - ll >= 0.1 * model:
                return tr.from_natural(theta), new
        return None

    def curvature(uu, exact):
        theta = tr.to_natural(uu)
        with np.errstate(all="ignore"):
            if exact:
                ll, g, H = loglik_grad_hessian(structure, theta, *data)
                info = None if H is None else -H
            else:
                ll, g, info = loglik_grad_information(structure, theta, *data)
                H = None
        if g is None or info is None or not np.isfinite(ll) or not np.all(np.isfinite(info)):
            return None
        J = tr.jacobian(uu)
        M = J.T @ info @ J - tr.curvature(g)
        gu = J.T @ g
        if held:
            # held coordinates: no gradient, unit curvature, so no step moves them
            gu[fixed] = 0.0
            M[fixed, :] = 0.0
            M[:, fixed] = 0.0
            M[fixed, fixed] = 1.0
        return float(ll), gu, 0.5 * (M + M.T), H, g, info

    held = fixed is not None and bool(np.any(fixed))
    out = {"u": u, "theta": tr.to_natural(u), "loglik": -np.inf, "converged": False,
           "decrement": np.inf, "iterations": 0, "hessian": None,
           "reason": "the log-likelihood is not defined at the start"}
    exact = False
    state = curvature(u, exact)
    if state is None:
        return out
    ll, g, M, H, g_theta, info = state
    radius, previous, history = None, None, []
    reason = f"no convergence within {max_iter} iterations"
    for it in range(max_iter):
        out.update(u=u, loglik=ll, iterations=it, hessian=H)
        if radius is None:
            radius = 10.0 * np.sqrt(len(u))
        step, decrement, flat, lowest, length = _trust_step(M, g, radius)
        out["decrement"] = decrement
        if exact and decrement < tol and flat < 1e-6 and lowest > -1e-6:
            out["converged"] = True
            reason = "converged"
            if decrement > POLISH_ABOVE:
                # one more Newton step, kept when it does not lower the log-likelihood
                # beyond rounding: a decrement just under tol still leaves the estimates
                # about sqrt(tol) standard errors from the maximum (measured: 1e-5 in a lag
                # whose SE is 0.12), and Newton's quadratic convergence removes that for
                # the price of one Hessian, so that estimates agree across machines
                polished = curvature(u + step, exact)
                if polished is not None and polished[0] >= ll - 1e-9 * max(1.0, abs(ll)):
                    u = u + step
                    ll, g, M, H, g_theta, info = polished
                    out["decrement"] = _trust_step(M, g, radius)[1]
            break
        if exact:
            history.append(decrement)
            if creep and len(history) >= 12 and history[-1] < 1.0 and history[-1] > 1e-2 * history[-7]:
                reason = CREEP
                break
        if not exact and (decrement < 1.0 or it >= exact_after
                          or (previous is not None and decrement > previous / 3.0)):
            exact = True
            state = curvature(u, exact)
            if state is None:
                reason = "the exact Hessian could not be computed"
                break
            ll, g, M, H, g_theta, info = state
            continue
        # two candidates: Newton's step in the natural parameters and the trust-region
        # step in u; the higher log-likelihood wins (one cheap evaluation each)
        moved = None if held else natural_step(u, ll, g_theta, info)
        predicted = float(g @ step - 0.5 * step @ M @ step)
        new_ll = value(tr.to_natural(u + step))
        gain = new_ll - ll if np.isfinite(new_ll) else -np.inf
        rho = gain / predicted if predicted > 0 else (1.0 if gain >= 0 else -1.0)
        if rho < 0.25:
            radius = 0.25 * length
        elif length > 0.9 * radius and (rho > 0.75 or step @ M @ step <= 0):
            # a good model, or a step along negative curvature that still gained a
            # quarter of its promise (the likelihood is no longer curved there, so the
            # region's size, not the model, limits the step): widen the region
            radius = min(4.0 * radius, 1e8)
        ok = rho > 1e-4 or (gain >= 0 and predicted < 1e-12 * max(1.0, abs(ll)))
        if moved is not None and not (ok and gain > moved[1] - ll):
            target = moved[0]
        elif ok:
            target = u + step
        else:
            if radius < 1e-10:
                reason = ("stalled: no step, however short, raised the log-likelihood (the "
                          "curvature is not a guide here: a ridge or the edge of the region "
                          "where the implied covariance is positive definite)")
                break
            continue
        u, previous = target, decrement
        state = curvature(u, exact)
        if state is None:
            reason = "the curvature could not be computed at the new point"
            break
        ll, g, M, H, g_theta, info = state
    else:
        out["iterations"] = max_iter
    out.update(u=u, theta=tr.to_natural(u), loglik=ll, hessian=H if exact else None,
               reason=reason)
    return out
