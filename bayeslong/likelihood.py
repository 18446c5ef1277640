"""Marginal log-likelihood from pattern-grouped sufficient statistics.

Notes
-----
For the units of one missing-data pattern p, with u_i = (1, w_i, y_i) (missing outcome
entries set to 0) and M_p = sum_i u_i u_i' (DESIGN section 2):

    R_p = A M_p A',   A = [-c, -D, I]
    loglik_p = -n_p/2 (q_p log 2pi + log det Sigma_oo) - 1/2 tr(Sigma_oo^-1 R_oo)

where o are the pattern's observed entries and q_p their number. All patterns are one
batched computation: a missing entry's row and column of Sigma are replaced by the identity
and its residual by zero, so its log-determinant term is log 1 = 0 and its trace term 0.
The graph has the same structure for every dataset of a spec and number of waves, and one
gradient costs the same whatever the number of units. Per-unit terms (for LOO and WAIC) are
the same computation with one "pattern" per unit (``counts`` = 1, ``cross`` = u_i u_i').

References
----------
Jöreskog, K. G. (1967). Some contributions to maximum likelihood factor analysis.
Psychometrika 32(4), 443-482. doi:10.1007/BF02289658 (the trace form of the likelihood).
Arbuckle, J. L. (1996). Full information estimation in the presence of incomplete data.
In Marcoulides & Schumacker (eds.), Advanced Structural Equation Modeling (pattern-wise FIML).
"""

from __future__ import annotations

import numpy as np
import pytensor.tensor as pt

LOG_2PI = float(np.log(2.0 * np.pi))



def pattern_loglik(c, D, Sigma, counts, cross, masks):
    """Log-likelihood of each pattern group, shape (P,).

    Parameters
    ----------
    c, D, Sigma : tensors from :func:`bayeslong.moments.implied_moments`
    counts : (P,) tensor, units per pattern
    cross : (P, U, U) tensor, augmented cross-products per pattern
    masks : (P, Y) tensor of 0/1, observed outcome entries per pattern
    """
    n_y = Sigma.shape[0]
    eye = pt.eye(n_y)
    A = pt.concatenate([-c[:, None], -D, eye], axis=1)  # (Y, U)
    R = pt.matmul(pt.matmul(A[None], cross), A.T[None])  # (P, Y, Y)
    both = masks[:, :, None] * masks[:, None, :]
    S = Sigma[None] * both + eye[None] * (1.0 - masks)[:, None, :]
    # log-determinant from the Cholesky factor (PyTensor rewrites a batched log(det) into an
    # op without batch support; eigenvalues would give NaN gradients at the repeated
    # eigenvalues of the identity rows of missing entries). A covariance that is not finite
    # or not positive definite gives NaN here and -inf below, never an exception.
    bad = pt.any(pt.isnan(S) | pt.isinf(S), axis=(1, 2))[:, None, None]
    S = pt.switch(bad, eye[None], S)
    chol = pt.linalg.cholesky(S, on_error="nan")
    pivots = pt.diagonal(chol, axis1=1, axis2=2)
    logdet = 2.0 * pt.sum(pt.log(pivots), axis=1)
    # numerically singular (a variance underflowed to ~0) counts as failed too
    failed = bad[:, 0, 0] | pt.isnan(logdet) | pt.lt(pt.min(pivots, axis=1), 1e-100)
    # an exception inside a sampler's log density ends up in its messages, which cannot be
    # pickled: invert the identity in place of a failed pattern, which scores -inf anyway
    # (a blend, not a switch: PyTensor lifts the inverse through a switch onto both branches)
    f = pt.cast(failed, "float64")[:, None, None]
    trace = pt.sum(pt.linalg.inv(S * (1.0 - f) + eye[None] * f) * (R * both), axis=(1, 2))
    q = pt.sum(masks, axis=1)
    loglik = -0.5 * counts * (q * LOG_2PI + logdet) - 0.5 * trace
    # a covariance that is not positive definite has no density: -inf, never a number
    return pt.switch(failed, -np.inf, loglik)


def mvn_logpdf(x, mean, cov) -> np.ndarray:
    """Log density of N(mean, cov) at x, broadcasting over leading axes (Cholesky form).

    The NumPy form of the Gaussian log density for work after sampling (per-unit terms,
    forecasts, checks), where draws and units are stacked axes; the model itself uses
    :func:`pattern_loglik`. Both are checked against ``scipy.stats.multivariate_normal``.
    """
    x, mean, cov = (np.asarray(a, dtype=float) for a in (x, mean, cov))
    chol = np.linalg.cholesky(cov)
    r = x - mean
    z = np.linalg.solve(chol, r[..., None])[..., 0]
    logdet = 2.0 * np.sum(np.log(np.diagonal(chol, axis1=-2, axis2=-1)), axis=-1)
    return -0.5 * (r.shape[-1] * np.log(2.0 * np.pi) + logdet + np.sum(z**2, axis=-1))


def unit_cross(outcomes: np.ndarray, covariates: np.ndarray):
    """Per-unit augmented cross-products and masks (each unit its own pattern).

    Returns ``counts`` (N,), ``cross`` (N, U, U) and ``masks`` (N, Y) for
    :func:`pattern_loglik`, so per-unit terms use the same formula as the total.
    """
    mask = ~np.isnan(outcomes)
    u = np.concatenate([np.ones((len(outcomes), 1)), covariates, np.where(mask, outcomes, 0.0)], axis=1)
    return np.ones(len(outcomes)), np.einsum("ni,nj->nij", u, u), mask.astype(float)


def pattern_arrays(patterns):
    """``(counts, cross, masks)`` as float arrays from :meth:`bayeslong.data.Panel.patterns`."""
    return (np.asarray(patterns.counts, dtype=float), np.asarray(patterns.cross, dtype=float),
            np.asarray(patterns.masks, dtype=float))


_LOGLIK: dict = {}


def loglik_function(structure):
    """Compiled ``f(theta, counts, cross, masks) -> (loglik, gradient)``.

    Compiled once per structure; data are inputs, so every panel of the same design
    reuses it (DESIGN section 2).
    """
    import pytensor

    from bayeslong.moments import implied_moments

    if structure not in _LOGLIK:
        theta = pt.dvector("theta")
        counts, cross, masks = pt.dvector("counts"), pt.dtensor3("cross"), pt.dmatrix("masks")
        c, D, Sigma = implied_moments(structure, theta)
        total = pt.sum(pattern_loglik(c, D, Sigma, counts, cross, masks))
        _LOGLIK[structure] = pytensor.function(
            [theta, counts, cross, masks], [total, pytensor.grad(total, theta)],
            on_unused_input="ignore")
    return _LOGLIK[structure]
