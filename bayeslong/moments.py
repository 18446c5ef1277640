"""Implied mean and covariance of the outcomes, written once in PyTensor.

Notes
-----
With latents eta = a + B eta + G w + zeta (Psi) and outcomes y = nu + Lam eta + eps
(Theta), conditional on the covariates w (DESIGN section 1, matrix form):

    E[y | w]   = c + D w,   c = nu + Lam (I - B)^-1 a,   D = Lam (I - B)^-1 G
    Cov[y | w] = Sigma      = Lam (I - B)^-1 Psi (I - B)^-T Lam' + Theta

This is the only place these formulas are written. Numeric values (start values,
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
    n_latent = len(structure.latents)
    total = pt.linalg.inv(pt.eye(n_latent) - m["B"])  # (I - B)^-1, recursive systems: always exists
    lam_total = m["Lam"] @ total
    c = m["nu"] + lam_total @ m["a"]
    D = lam_total @ m["G"]
    Sigma = lam_total @ m["Psi"] @ lam_total.T + m["Theta"]
    return c, D, 0.5 * (Sigma + Sigma.T)


@lru_cache(maxsize=64)
def _compiled(structure: Structure):
    theta = pt.dvector("theta")
    c, D, Sigma = implied_moments(structure, theta)
    return pytensor.function([theta], [c, D, Sigma], mode="FAST_COMPILE")


def moments_at(structure: Structure, theta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Numeric ``(c, D, Sigma)`` at ``theta`` (compiled from :func:`implied_moments`)."""
    c, D, Sigma = _compiled(structure)(np.asarray(theta, dtype=float))
    return c, D, Sigma
