"""Implied mean and covariance of the outcomes, written once in PyTensor.

Notes
-----
With latents eta = a + B eta + G w + zeta (Psi) and outcomes y = nu + Lam eta + eps
(Theta), conditional on the covariates w (DESIGN section 1, matrix form):

    E[y | w]   = c + D w,   c = nu + Lam (I - B)^-1 a,   D = Lam (I - B)^-1 G
    Cov[y | w] = Sigma      = Lam (I - B)^-1 Psi (I - B)^-T Lam' + Theta

The latents' own moments given w, E[eta | w] = (I - B)^-1 (a + G w),
Cov[eta | w] = Phi = (I - B)^-1 Psi (I - B)^-T and Cov[eta, y | w] = Phi Lam', come from
:func:`latent_moments`, built on the same helper. This is the only place these formulas are written. Numeric values (start values,
identification, simulation checks, per-unit terms) come from compiling this graph.

References
----------
Bollen, K. A. (1989). Structural Equations with Latent Variables, ch. 8. Wiley.
doi:10.1002/9781118619179
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pytensor
import pytensor.tensor as pt

from bayeslong.structure import Matrix, Structure


def _filled(m: Matrix, theta_ext) -> pt.TensorVariable:
    # index -1 picks the appended zero, so fixed entries keep their value
    return pt.as_tensor_variable(m.fixed) + theta_ext[m.index]


def model_matrices(structure: Structure, theta) -> dict[str, pt.TensorVariable]:
    """The seven model matrices as PyTensor expressions of the parameter vector ``theta``."""
    theta_ext = pt.concatenate([pt.as_tensor_variable(theta), pt.zeros((1,), dtype=theta.dtype)])
    return {name: _filled(m, theta_ext) for name, m in structure.matrices.items()}


def _latent_part(m: dict, n_latent: int):
    # the reduced form of the latents, shared by the outcome and the latent moments:
    # eta = (I - B)^-1 (a + G w + zeta), so E = (I-B)^-1 a + (I-B)^-1 G w, Cov = (I-B)^-1 Psi (I-B)^-T
    total = _total_effects(m["B"], n_latent)
    return total @ m["a"], total @ m["G"], total @ m["Psi"] @ total.T


def _total_effects(B, n_latent: int):
    """(I - B)^-1 for a recursive system, as a finite product of matrix products.

    Every model here is recursive (no loops among the latents), so B is nilpotent with
    B^L = 0 for L latents and (I - B)^-1 = I + B + ... + B^(L-1)
    = (I + B)(I + B^2)(I + B^4)... with 2^m >= L factors' worth of powers. Only matrix
    products: cheap to differentiate and free of per-call LAPACK look-ups.
    """
    eye = pt.eye(n_latent)
    total, power = eye + B, B
    reach = 2
    while reach < n_latent:
        power = power @ power
        total = total @ (eye + power)
        reach *= 2
    return total


def implied_moments(structure: Structure, theta):
    """Return ``(c, D, Sigma)``: intercepts, covariate slopes and covariance of y given w.

    Parameters
    ----------
    structure : Structure
        Parameter table of a spec on a panel design.
    theta : pytensor vector
        Free parameters in ``structure.names`` order.

    Returns
    -------
    c : (Y,) tensor
    D : (Y, W) tensor
    Sigma : (Y, Y) tensor
    """
    m = model_matrices(structure, theta)
    alpha, Gamma, Phi = _latent_part(m, len(structure.latents))
    c = m["nu"] + m["Lam"] @ alpha
    D = m["Lam"] @ Gamma
    Sigma = m["Lam"] @ Phi @ m["Lam"].T + m["Theta"]
    return c, D, 0.5 * (Sigma + Sigma.T)


def latent_moments(structure: Structure, theta):
    """Return the latents' moments given w and their covariance with the outcomes.

    Parameters
    ----------
    structure : Structure
    theta : pytensor vector
        Free parameters in ``structure.names`` order.

    Returns
    -------
    alpha : (L,) tensor
        Latent intercepts, ``E[eta | w] = alpha + Gamma w``.
    Gamma : (L, W) tensor
        Latent covariate slopes.
    Phi : (L, L) tensor
        ``Cov[eta | w] = (I - B)^-1 Psi (I - B)^-T``.
    cross : (L, Y) tensor
        ``Cov[eta, y | w] = Phi Lam'`` (the measurement errors are uncorrelated with eta).

    Notes
    -----
    Latents are in ``structure.latents`` order. These are the same reduced-form matrices
    :func:`implied_moments` maps to the outcomes (one helper serves both), so the
    conditional distribution of a unit's latent trajectory given its outcomes (Gaussian
    conditioning on the joint of (eta, y)) can never disagree with the likelihood.
    """
    m = model_matrices(structure, theta)
    alpha, Gamma, Phi = _latent_part(m, len(structure.latents))
    Phi = 0.5 * (Phi + Phi.T)
    return alpha, Gamma, Phi, Phi @ m["Lam"].T


@lru_cache(maxsize=64)
def _compiled(structure: Structure):
    theta = pt.dvector("theta")
    c, D, Sigma = implied_moments(structure, theta)
    return pytensor.function([theta], [c, D, Sigma], mode="FAST_COMPILE")


def moments_at(structure: Structure, theta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Numeric ``(c, D, Sigma)`` at ``theta`` (compiled from :func:`implied_moments`)."""
    c, D, Sigma = _compiled(structure)(np.asarray(theta, dtype=float))
    return c, D, Sigma
