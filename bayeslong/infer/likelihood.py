"""Marginal log-likelihood from pattern-grouped sufficient statistics.

Notes
-----
For the units of one missing-data pattern p, with u_i = (1, w_i, y_i) (missing outcome
entries set to 0) and M_p = sum_i u_i u_i' (docs/engine.md):

    R_p = A M_p A',   A = [-c, -D, I]
    loglik_p = -n_p/2 (q_p log 2pi + log det Sigma_oo) - 1/2 tr(Sigma_oo^-1 R_oo)

where o are the pattern's observed entries and q_p their number. All patterns are one
batched computation: a missing entry's row and column of Sigma are replaced by the identity
and its residual by zero, so its log-determinant term is log 1 = 0 and its trace term 0.
The computation has the same structure for every dataset of a spec and number of waves, and
one gradient costs the same whatever the number of units.

:func:`loglik_terms` evaluates it (with its gradient in the moments) on NumPy arrays, for
maximum likelihood and, through the Op of :mod:`bayeslong.infer.loglik_op`, for PyMC's sampler;
nutpie's numba backend runs the same formulas as a compiled loop kernel.

References
----------
Jöreskog, K. G. (1967). Some contributions to maximum likelihood factor analysis.
Psychometrika 32(4), 443-482. doi:10.1007/BF02289658 (the trace form of the likelihood).
Arbuckle, J. L. (1996). Full information estimation in the presence of incomplete data.
In Marcoulides & Schumacker (eds.), Advanced Structural Equation Modeling (pattern-wise FIML).
"""

from __future__ import annotations

from functools import partial

import numpy as np

LOG_2PI = float(np.log(2.0 * np.pi))

#: Smallest sqrt(1 - R^2) of an observed entry on the others before it for which a pattern
#: covariance counts as positive definite (see _pattern_parts).
SINGULAR = 1e-7


def mvn_logpdf(x, mean, cov) -> np.ndarray:
    """Log density of N(mean, cov) at x, broadcasting over leading axes (Cholesky form).

    The NumPy form of the Gaussian log density for work after sampling (per-unit terms,
    forecasts, checks), where draws and units are stacked axes; the model itself uses
    :func:`loglik_terms`. Both are checked against ``scipy.stats.multivariate_normal``.
    """
    x, mean, cov = (np.asarray(a, dtype=float) for a in (x, mean, cov))
    chol = np.linalg.cholesky(cov)
    r = x - mean
    # invert each factor once at its own shape, then broadcast a product over the units:
    # a broadcast solve would copy the factor once per unit
    z = (np.linalg.inv(chol) @ r[..., None])[..., 0]
    logdet = 2.0 * np.sum(np.log(np.diagonal(chol, axis1=-2, axis2=-1)), axis=-1)
    return -0.5 * (r.shape[-1] * np.log(2.0 * np.pi) + logdet + np.sum(z**2, axis=-1))


def unit_cross(outcomes: np.ndarray, covariates: np.ndarray):
    """Per-unit augmented cross-products and masks (each unit its own pattern).

    Returns ``counts`` (N,), ``cross`` (N, U, U) and ``masks`` (N, Y) for
    :func:`pattern_values`, so per-unit terms use the same formula as the total.
    """
    mask = ~np.isnan(outcomes)
    u = np.concatenate([np.ones((len(outcomes), 1)), covariates, np.where(mask, outcomes, 0.0)], axis=1)
    return np.ones(len(outcomes)), np.einsum("ni,nj->nij", u, u), mask.astype(float)


def pattern_arrays(patterns):
    """``(counts, cross, masks)`` as float arrays from :meth:`bayeslong.data.Panel.patterns`."""
    return (np.asarray(patterns.counts, dtype=float), np.asarray(patterns.cross, dtype=float),
            np.asarray(patterns.masks, dtype=float))


def _pattern_parts(c, D, Sigma, counts, cross, masks):
    # per-pattern values and the pieces their derivatives need; None where a pattern's
    # covariance is not finite or not positive definite (no density there)
    n_y = Sigma.shape[0]
    eye = np.eye(n_y)
    if not (np.all(np.isfinite(Sigma)) and np.all(np.isfinite(c)) and np.all(np.isfinite(D))):
        return None
    A = np.concatenate([-c[:, None], -D, eye], axis=1)  # (Y, U)
    AM = A @ cross  # (P, Y, U)
    R = AM @ A.T  # (P, Y, Y)
    complete = bool(masks.all())  # no masking needed (the common case of complete waves)
    if complete:
        S = Sigma[None]
    else:
        both = masks[:, :, None] * masks[:, None, :]
        S = Sigma * both + eye * (1.0 - masks)[:, None, :]
    try:
        chol = np.linalg.cholesky(S)
    except np.linalg.LinAlgError:
        return None
    pivots = np.diagonal(chol, axis1=1, axis2=2)
    # pivot_i / sqrt(S_ii) = sqrt(1 - R^2_i), R^2_i the squared multiple correlation of
    # entry i on the entries before it (the Cholesky factor of the correlation matrix):
    # scale-free. Below 1e-7 the covariance is singular to double precision (two observed
    # variables perfectly correlated, e.g. two indicators whose unique variances are both
    # zero), and its log density is rounding noise (seen: +1.8e31), not a likelihood.
    scaled = pivots / np.sqrt(np.diagonal(S, axis1=1, axis2=2))
    if not pivots.min() > 0 or scaled.min() < SINGULAR:
        return None
    logdet = 2.0 * np.sum(np.log(pivots), axis=1)
    W = np.linalg.inv(S)  # Sigma_oo^-1 in the observed block, 0 elsewhere
    if not complete:
        W = W * both
    q = masks.sum(axis=1)
    values = -0.5 * counts * (q * LOG_2PI + logdet) - 0.5 * np.sum(W * R, axis=(1, 2))
    return values, W, R, AM


def pattern_values(c, D, Sigma, counts, cross, masks) -> np.ndarray:
    """NumPy log-likelihood of each pattern group, shape (P,); all -inf where undefined.

    With :func:`unit_cross` (one pattern per unit) these are the per-unit terms.
    """
    parts = _pattern_parts(c, D, Sigma, counts, cross, masks)
    return parts[0] if parts is not None else np.full(len(counts), -np.inf)


def loglik_terms(c, D, Sigma, counts, cross, masks):
    """NumPy total log-likelihood over patterns, and its gradient in the moments.

    All patterns are one batched computation (see the module notes), with the analytic
    derivatives with respect to the moments (Magnus & Neudecker 1999, ch. 15): with
    W_p = Sigma_oo^-1 embedded in zeros (a Y x Y matrix),

        dL/dSigma = 1/2 sum_p (W_p R_p W_p - n_p W_p)
        dL/dA     = -sum_p W_p A M_p,  so dL/dc = (sum_p W_p A M_p)[:, 0] and
                                           dL/dD = (sum_p W_p A M_p)[:, 1:1+W].

    Maximum likelihood calls it directly, and the sampler's Op
    (:mod:`bayeslong._loglik_op`) in PyTensor's C backend.

    Returns
    -------
    loglik : float
        -inf when a pattern's covariance is not positive definite or not finite.
    grad_c, grad_D, grad_Sigma : numpy arrays shaped like c, D, Sigma (None at -inf)

    References
    ----------
    Magnus, J. R. & Neudecker, H. (1999). Matrix Differential Calculus with Applications in
    Statistics and Econometrics, rev. ed., ch. 15 (the normal log-likelihood). Wiley.
    """
    parts = _pattern_parts(c, D, Sigma, counts, cross, masks)
    if parts is None:
        return -np.inf, None, None, None
    values, W, R, AM = parts
    WAM = np.sum(W @ AM, axis=0)  # (Y, U)
    grad_S = 0.5 * np.sum(W @ R @ W - counts[:, None, None] * W, axis=0)
    return float(np.sum(values)), WAM[:, 0], WAM[:, 1:1 + D.shape[1]], grad_S


def _with_jacobian(structure, theta, counts, cross, masks):
    # loglik, gradient in theta (chain rule through the exact moment Jacobian), the
    # Jacobian itself and Sigma; the gradient is None where the likelihood is -inf
    from bayeslong.model.moments import moment_jacobian

    (c, D, Sigma), jac = moment_jacobian(structure, theta)
    loglik, gc, gD, gS = loglik_terms(c, D, Sigma, counts, cross, masks)
    if not np.isfinite(loglik):
        return -np.inf, None, jac, Sigma
    dc, dD, dS = jac
    grad = dc @ gc + np.einsum("pyw,yw->p", dD, gD) + np.einsum("pyz,yz->p", dS, gS)
    return loglik, grad, jac, Sigma


def loglik_and_grad(structure, theta, counts, cross, masks):
    """Total log-likelihood at ``theta`` and its gradient, in NumPy (nothing to compile).

    The moments and their Jacobian come from :func:`bayeslong.moments.moment_jacobian`
    (the one moment formula, exact complex-step derivatives); the likelihood and its
    derivatives in the moments from :func:`loglik_terms`. The chain rule joins them.
    Returns ``(-inf, zeros)`` where the likelihood is not defined.
    """
    loglik, grad, _, _ = _with_jacobian(structure, theta, counts, cross, masks)
    return (loglik, grad) if grad is not None else (-np.inf, np.zeros(len(theta)))


def expected_information(dc, dD, dS, Sigma, counts, cross, masks) -> np.ndarray:
    """Expected (Fisher) information of theta for the pattern likelihood, given w.

    For the units of pattern p with observed entries o, mean mu_i = c + D w_i and
    W_p = Sigma_oo^-1 embedded in zeros (Jennrich & Sampson 1976; Lee & Jennrich 1979):

        I_kl = sum_p [ tr(W_p Q_k X_p Q_l') + n_p / 2 tr(W_p dSigma_k W_p dSigma_l) ]

    with Q_k = [dc_k, dD_k] the derivative of (c, D) and X_p = sum_i (1, w_i)(1, w_i)' the
    covariate block of the pattern's cross-products.

    Parameters
    ----------
    dc, dD, dS : (p, Y), (p, Y, W), (p, Y, Y) derivatives of the moments
        (:func:`bayeslong.moments.moment_jacobian`).

    References
    ----------
    Jennrich, R. I. & Sampson, P. F. (1976). Newton-Raphson and related algorithms for
    maximum likelihood variance component estimation. Technometrics 18(1), 11-17.
    Lee, S.-Y. & Jennrich, R. I. (1979). A study of algorithms for covariance structure
    analysis with specific comparisons using factor analysis. Psychometrika 44(1), 99-113.
    """
    n_y, n_w = Sigma.shape[0], dD.shape[-1]
    eye = np.eye(n_y)
    both = masks[:, :, None] * masks[:, None, :]
    W = np.linalg.inv(Sigma * both + eye * (1.0 - masks)[:, None, :]) * both  # (P, Y, Y)
    Q = np.concatenate([dc[..., None], dD], axis=-1)  # (p, Y, 1+W)
    X = cross[:, :1 + n_w, :1 + n_w]  # (P, 1+W, 1+W)
    k = len(dc)
    # products as flat matrix products (einsum's path search costs more than the sums here)
    WQX = W[:, None] @ Q[None] @ X[:, None]  # (P, p, Y, 1+W)
    info = WQX.transpose(1, 0, 2, 3).reshape(k, -1) @ np.broadcast_to(
        Q[None], WQX.shape[:1] + Q.shape).transpose(1, 0, 2, 3).reshape(k, -1).T
    WS = W[:, None] @ dS[None]  # (P, p, Y, Y)
    WSn = (WS * counts[:, None, None, None]).transpose(1, 0, 2, 3).reshape(k, -1)
    info += 0.5 * WSn @ WS.transpose(1, 0, 3, 2).reshape(k, -1).T
    return 0.5 * (info + info.T)


def loglik_grad_information(structure, theta, counts, cross, masks):
    """``(loglik, gradient, expected information)`` at ``theta`` (NumPy; for Fisher scoring).

    ``(-inf, None, None)`` where the likelihood is not defined.
    """
    loglik, grad, (dc, dD, dS), Sigma = _with_jacobian(structure, theta, counts, cross, masks)
    if grad is None:
        return -np.inf, None, None
    return loglik, grad, expected_information(dc, dD, dS, Sigma, counts, cross, masks)


def loglik_function(structure):
    """``f(theta, counts, cross, masks) -> (loglik, gradient)`` in NumPy.

    What maximum likelihood and the Laplace approximation call: no compilation, so the
    first fit in a fresh process costs no more than the next. The sampler uses the
    PyTensor graph of :func:`bayeslong.infer.loglik_op.pattern_loglik` instead
    (:func:`bayeslong.infer.loglik_op.compiled_loglik_function`
    compiles it the same way); tests hold both to ``scipy.stats.multivariate_normal``.
    """
    return partial(loglik_and_grad, structure)


def _nonlinear_parameters(structure) -> np.ndarray:
    # parameters in B or Lam: the only ones the moments are not linear in (a, G, Psi, nu
    # and Theta enter linearly, and two of them never multiply each other)
    # (a parameter counts also where it fills a linear-combination entry, Matrix.terms)
    idx = np.concatenate([structure.matrices[m].index.ravel() for m in ("B", "Lam")]
                         + [np.array([k for _, k, _ in structure.matrices[m].terms], dtype=np.int64)
                            for m in ("B", "Lam")])
    return np.unique(idx[idx >= 0])


def loglik_grad_hessian(structure, theta, counts, cross, masks):
    """``(loglik, gradient, Hessian)`` at ``theta``: the exact observed information, in NumPy.

    The Hessian is the chain rule's two parts,

        H = (first moment derivatives)' (Hessian of the likelihood in the moments) (same)
            + sum_j dL/dm_j d2 m_j / dtheta dtheta'.

    The first part is analytic: for a pattern with W = Sigma_oo^-1, R = A M A', and moment
    derivatives S_k = dSigma_k, A_k = [-dc_k, -dD_k, 0] (Magnus & Neudecker 1999, ch. 15),

        H_kl = n/2 tr(W S_l W S_k) - tr(W S_l W S_k W R) + tr(W S_k W A_l M A')
               + tr(W S_l W A_k M A') - tr(W A_k M A_l'),

    whose expectation is minus the expected information. The second part is non-zero only
    in the rows and columns of parameters in B or Lam (the moments are linear in all
    others, which never multiply each other): central differences of the exact
    (complex-step) gradient of sum_j dL/dm_j m_j(theta) in those directions. So the exact
    Hessian costs a few gradients, not two per parameter. ``(-inf, None, None)`` where
    the likelihood is not defined.
    """
    from bayeslong.model.moments import moment_jacobian

    (c, D, Sigma), (dc, dD, dS) = moment_jacobian(structure, theta)
    loglik, gc, gD, gS = loglik_terms(c, D, Sigma, counts, cross, masks)
    if not np.isfinite(loglik):
        return -np.inf, None, None
    grad = dc @ gc + np.einsum("pyw,yw->p", dD, gD) + np.einsum("pyz,yz->p", dS, gS)
    _, W, R, AM = _pattern_parts(c, D, Sigma, counts, cross, masks)
    k, n_y = len(theta), Sigma.shape[0]
    Ak = np.concatenate([-dc[..., None], -dD, np.zeros((k, n_y, n_y))], axis=-1)  # (p, Y, U)
    H = np.zeros((k, k))
    for p_ in range(len(counts)):
        Wp = W[p_]
        WS = Wp @ dS  # (p, Y, Y)
        flat = WS.reshape(k, -1)
        flat_t = WS.transpose(0, 2, 1).reshape(k, -1)
        H += 0.5 * counts[p_] * flat @ flat_t.T
        H -= flat @ (WS @ (Wp @ R[p_])).transpose(0, 2, 1).reshape(k, -1).T
        Z = Wp @ (Ak @ AM[p_].T)  # W A_l M A', (p, Y, Y)
        T3 = flat @ Z.transpose(0, 2, 1).reshape(k, -1).T  # tr(W S_k Z_l)
        H += T3 + T3.T
        H -= (Wp @ Ak @ cross[p_]).reshape(k, -1) @ Ak.reshape(k, -1).T
    weights = (gc, gD, gS)
    second = np.zeros((k, k))  # sum_j dL/dm_j d2 m_j, set (not added) row and column-wise
    for j in _nonlinear_parameters(structure):
        h = 1e-5 * max(abs(theta[j]), 1e-2)
        cols = []
        for sign in (1.0, -1.0):
            shifted = np.array(theta, dtype=float)
            shifted[j] += sign * h
            _, (ec, eD, eS) = moment_jacobian(structure, shifted)
            cols.append(ec @ weights[0] + np.einsum("pyw,yw->p", eD, weights[1])
                        + np.einsum("pyz,yz->p", eS, weights[2]))
        col = (cols[0] - cols[1]) / (2 * h)
        second[:, j] = col
        second[j, :] = col
    H += 0.5 * (second + second.T)
    return float(loglik), grad, 0.5 * (H + H.T)
