"""Implied mean and covariance of the outcomes, written once for two array backends.

Notes
-----
With latents eta = a + B eta + G w + zeta (Psi) and outcomes y = nu + Lam eta + eps
(Theta), conditional on the covariates w (docs/engine.md, "Matrix form"):

    E[y | w]   = c + D w,   c = nu + Lam (I - B)^-1 a,   D = Lam (I - B)^-1 G
    Cov[y | w] = Sigma      = Lam (I - B)^-1 Psi (I - B)^-T Lam' + Theta

The latents' own moments given w, E[eta | w] = (I - B)^-1 (a + G w),
Cov[eta | w] = Phi = (I - B)^-1 Psi (I - B)^-T and Cov[eta, y | w] = Phi Lam', come from
:func:`latent_moments`, built on the same helper. This is the only place these formulas
are written.

The formulas take an array backend (``xp``): :data:`PYTENSOR` builds the symbolic graph
that the sampler differentiates; :data:`NUMPY` evaluates the very same code on arrays, with
any number of leading batch axes on ``theta`` (draws, or the complex-step directions of
:func:`moment_jacobian`). The numeric path needs no compilation, which is what keeps a
maximum-likelihood fit, an identification check and the post-sampling work fast in a fresh
process (the first ML fit costs what a mixed-model library's does).

References
----------
Bollen, K. A. (1989). Structural Equations with Latent Variables, ch. 8. Wiley.
doi:10.1002/9781118619179
Squire, W. & Trapp, G. (1998). Using complex variables to estimate derivatives of real
functions. SIAM Review 40(1), 110-112. doi:10.1137/S003614459631241X (complex step).
"""

from __future__ import annotations

from functools import lru_cache
from types import SimpleNamespace

import numpy as np

from bayeslong.model.structure import Structure


@lru_cache(maxsize=256)
def _gather_plan(structure: Structure):
    # every matrix's entries in one flat gather: (name, shape, start, stop), fixed, index;
    # and the linear-combination entries (Matrix.terms) as a scatter onto their positions
    parts, fixed, index, start = [], [], [], 0
    t_pos, t_idx, t_coef = [], [], []
    for name, m in structure.matrices.items():
        parts.append((name, m.fixed.shape, start, start + m.fixed.size))
        fixed.append(m.fixed.ravel())
        index.append(m.index.ravel())
        for pos, k, coef in m.terms:
            t_pos.append(start + pos)
            t_idx.append(k)
            t_coef.append(coef)
        start += m.fixed.size
    positions = np.unique(np.array(t_pos, dtype=np.int64))
    scatter = (np.array(t_pos)[:, None] == positions[None, :]).astype(float) if t_pos else None
    terms = (positions, np.array(t_idx, dtype=np.int64), np.array(t_coef), scatter)
    return parts, np.concatenate(fixed), np.concatenate(index), terms


def _np_matrices(structure: Structure, theta) -> dict:
    theta = np.asarray(theta)
    batch = theta.shape[:-1]
    ext = np.concatenate([theta, np.zeros(batch + (1,), dtype=theta.dtype)], axis=-1)
    parts, fixed, index, (positions, t_idx, t_coef, scatter) = _gather_plan(structure)
    flat = fixed + ext[..., index]
    if scatter is not None:
        flat[..., positions] += (ext[..., t_idx] * t_coef) @ scatter
    return {name: flat[..., a:b].reshape(batch + shape) for name, shape, a, b in parts}


def _pt_matrices(structure: Structure, theta) -> dict:
    import pytensor.tensor as pt

    theta = pt.as_tensor_variable(theta)
    ext = pt.concatenate([theta, pt.zeros((1,), dtype=theta.dtype)])
    out = {}
    for name, m in structure.matrices.items():
        value = pt.as_tensor_variable(m.fixed) + ext[m.index]
        if m.terms:
            pos, k, coef = (np.array(v) for v in zip(*m.terms))
            flat = pt.inc_subtensor(pt.zeros(m.fixed.size, dtype=theta.dtype)[pos.astype(np.int64)],
                                    ext[k.astype(np.int64)] * coef)
            value = value + flat.reshape(m.fixed.shape)
        out[name] = value
    return out


def _pt_eye(n: int):
    import pytensor.tensor as pt  # imported on first use: numeric work never needs PyTensor

    return pt.eye(n)


#: NumPy backend: ``theta`` may carry leading batch axes (..., n_params).
NUMPY = SimpleNamespace(
    matrices=_np_matrices,
    mv=lambda M, v: (M @ v[..., None])[..., 0],
    t=lambda X: np.swapaxes(X, -1, -2),
    eye=np.eye,
)

#: PyTensor backend: ``theta`` is a symbolic vector.
PYTENSOR = SimpleNamespace(
    matrices=_pt_matrices,
    mv=lambda M, v: M @ v,
    t=lambda X: X.T,
    eye=_pt_eye,
)


def model_matrices(structure: Structure, theta, xp=PYTENSOR) -> dict:
    """The seven model matrices as functions of the parameter vector ``theta``.

    Entry ``[i, j]`` of a matrix is ``fixed[i, j] + theta[index[i, j]]``; index -1 picks a
    zero appended to ``theta``, so fixed entries keep their value.
    """
    return xp.matrices(structure, theta)


def _latent_part(m: dict, structure: Structure, xp):
    # the reduced form of the latents, shared by the outcome and the latent moments:
    # eta = (I - B)^-1 (a + G w + zeta), so E = (I-B)^-1 a + (I-B)^-1 G w, Cov = (I-B)^-1 Psi (I-B)^-T
    total = _total_effects(m["B"], len(structure.latents), structure.path_depth, xp)
    return xp.mv(total, m["a"]), total @ m["G"], total @ m["Psi"] @ xp.t(total)


def _total_effects(B, n_latent: int, depth: int, xp):
    """(I - B)^-1 for a recursive system, as a finite product of matrix products.

    Every model here is recursive (no loops among the latents), so B is nilpotent with
    B^k = 0 for k = ``Structure.path_depth`` (at most the number of latents), and
    (I - B)^-1 = I + B + ... + B^(k-1) = (I + B)(I + B^2)(I + B^4)... with 2^m >= k
    factors' worth of powers. Only matrix
    products: cheap to differentiate, free of per-call LAPACK look-ups, and analytic (so the
    complex step of :func:`moment_jacobian` is exact).
    """
    eye = xp.eye(n_latent)
    total, power = eye + B, B
    reach = 2
    while reach < depth:
        power = power @ power
        total = total @ (eye + power)
        reach *= 2
    return total


def implied_moments(structure: Structure, theta, xp=PYTENSOR):
    """Return ``(c, D, Sigma)``: intercepts, covariate slopes and covariance of y given w.

    Parameters
    ----------
    structure : Structure
        Parameter table of a spec on a panel design.
    theta : pytensor vector, or numpy array (..., n_params) with ``xp=NUMPY``
        Free parameters in ``structure.names`` order.
    xp : backend, default PYTENSOR

    Returns
    -------
    c : (..., Y)
    D : (..., Y, W)
    Sigma : (..., Y, Y)
    """
    m = model_matrices(structure, theta, xp)
    alpha, Gamma, Phi = _latent_part(m, structure, xp)
    c = m["nu"] + xp.mv(m["Lam"], alpha)
    D = m["Lam"] @ Gamma
    Sigma = m["Lam"] @ Phi @ xp.t(m["Lam"]) + m["Theta"]
    return c, D, 0.5 * (Sigma + xp.t(Sigma))


def latent_moments(structure: Structure, theta, xp=PYTENSOR, matrices=None):
    """Return the latents' moments given w and their covariance with the outcomes.

    Parameters
    ----------
    structure : Structure
    theta : pytensor vector, or numpy array (..., n_params) with ``xp=NUMPY``
        Free parameters in ``structure.names`` order.
    xp : backend, default PYTENSOR
    matrices : dict, optional
        ``model_matrices(structure, theta, xp)`` when the caller has them already.

    Returns
    -------
    alpha : (..., L)
        Latent intercepts, ``E[eta | w] = alpha + Gamma w``.
    Gamma : (..., L, W)
        Latent covariate slopes.
    Phi : (..., L, L)
        ``Cov[eta | w] = (I - B)^-1 Psi (I - B)^-T``.
    cross : (..., L, Y)
        ``Cov[eta, y | w] = Phi Lam'`` (the measurement errors are uncorrelated with eta).

    Notes
    -----
    Latents are in ``structure.latents`` order. These are the same reduced-form matrices
    :func:`implied_moments` maps to the outcomes (one helper serves both), so the
    conditional distribution of a unit's latent trajectory given its outcomes (Gaussian
    conditioning on the joint of (eta, y)) can never disagree with the likelihood.
    """
    m = model_matrices(structure, theta, xp) if matrices is None else matrices
    alpha, Gamma, Phi = _latent_part(m, structure, xp)
    Phi = 0.5 * (Phi + xp.t(Phi))
    return alpha, Gamma, Phi, Phi @ xp.t(m["Lam"])


def moments_at(structure: Structure, theta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Numeric ``(c, D, Sigma)`` at ``theta``, shape (n_params,) or (..., n_params)."""
    return implied_moments(structure, np.asarray(theta, dtype=float), NUMPY)


def moment_jacobian(structure: Structure, theta, step: float = 1e-30):
    """Moments at ``theta`` and their exact derivatives, by the complex step.

    For an analytic f, f(theta + i h e_k) = f(theta) + i h df/dtheta_k + O(h^2), so
    Im f / h is the derivative to machine precision for any tiny h (no subtraction, no
    step-size trade-off). The moments use sums and matrix products only, hence are analytic;
    all n_params directions go through one batched NumPy evaluation.

    Returns
    -------
    (c, D, Sigma) : numpy arrays at theta
    (dc, dD, dSigma) : derivatives, shapes (p, Y), (p, Y, W), (p, Y, Y)
    """
    theta = np.asarray(theta, dtype=float)
    p = theta.shape[-1]
    directions = theta + 1j * step * np.eye(p)
    values = implied_moments(structure, np.concatenate([theta[None] + 0j, directions]), NUMPY)
    return (tuple(v[0].real for v in values), tuple(v[1:].imag / step for v in values))


_MOMENT_KEYS = ("c", "D", "Sigma", "alpha", "Gamma", "Phi", "cross")


def moment_draws(structure: Structure, thetas: np.ndarray) -> dict[str, np.ndarray]:
    """Implied outcome and latent moments at each row of ``thetas``, vectorised over draws.

    Parameters
    ----------
    structure : Structure
    thetas : numpy.ndarray, shape (S, n_params)
        Parameter draws in ``structure.names`` order.

    Returns
    -------
    dict of numpy.ndarray
        ``c`` (S, Y), ``D`` (S, Y, W), ``Sigma`` (S, Y, Y) from
        :func:`~bayeslong.moments.implied_moments`; ``alpha`` (S, L), ``Gamma`` (S, L, W),
        ``Phi`` (S, L, L), ``cross`` (S, L, Y) from :func:`~bayeslong.moments.latent_moments`.

    Notes
    -----
    The one moment formula (:mod:`bayeslong.moments`) evaluated with its NumPy backend on
    the stacked draws: the same formulas as the likelihood, with nothing to compile.
    """
    thetas = np.atleast_2d(np.asarray(thetas, dtype=float))
    values = [*implied_moments(structure, thetas, NUMPY), *latent_moments(structure, thetas, NUMPY)]
    return dict(zip(_MOMENT_KEYS, values, strict=True))


def unit_means(moments: dict, covariates: np.ndarray, which: str = "y") -> np.ndarray:
    """``E[y | w]`` (or of the latents, ``which="latent"``) per draw and unit, shape (S, N, Y)."""
    c, D = (moments["c"], moments["D"]) if which == "y" else (moments["alpha"], moments["Gamma"])
    return c[:, None, :] + np.einsum("syw,nw->sny", D, covariates)
