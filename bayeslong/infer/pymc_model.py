"""Spec + Panel + priors -> a PyMC model with the marginal, pattern-grouped likelihood.

The model has one random variable per prior (no person-level latents): the parameters with
a ``value`` prior are variables named by the parameter itself; each variance is the square
of a standard deviation ``<name>__sd``; each covariance block of two or more variables has
an LKJ correlation matrix. The parameter vector theta is assembled by
:func:`bayeslong.priors.assemble_theta`, and every parameter appears in the model under its
own name (a deterministic where it is not itself a random variable).

The likelihood is ``pm.Potential("loglik", pattern_loglik(...))``, the total over patterns
(:func:`bayeslong.infer.loglik_op.pattern_loglik`, one Op with an analytic gradient), with the pattern
counts, cross-products and masks as ``pm.Data`` inputs, and all prior hyperparameters in the
``pm.Data`` vector ``prior_hyper``: a model of one structure and one set of prior families
serves every dataset of the same design and every choice of prior values (docs/engine.md).
"""

from __future__ import annotations

import numpy as np
import pymc as pm
import pytensor.tensor as pt
from pymc.logprob.transforms import Transform

from bayeslong.dims import PARAMETER
from bayeslong.errors import SpecError
from bayeslong.infer import pooling as pool_terms
from bayeslong.infer.likelihood import pattern_arrays
from bayeslong.infer.loglik_op import pattern_loglik
from bayeslong.infer.priors import (
    CPC_TRANSFORM,
    PriorSet,
    assemble_theta,
    family_dist,
    lkj_name,
    lkj_sd_name,
    resolve_priors,
)
from bayeslong.model.moments import implied_moments
from bayeslong.model.structure import structure_for

#: Names of the data inputs of every model built here.
DATA_NAMES = ("counts", "cross", "masks", "prior_hyper")


def model_inputs(panel, prior_set: PriorSet) -> dict[str, np.ndarray]:
    """The values of the model's data inputs for ``panel`` and the prior values."""
    counts, cross, masks = pattern_arrays(panel.patterns())
    return {"counts": counts, "cross": cross, "masks": masks, "prior_hyper": prior_set.hyper}


def build_model(spec, panel, priors: dict | PriorSet | None = None) -> pm.Model:
    """Build the PyMC model of ``spec`` on ``panel``.

    Parameters
    ----------
    spec : Spec
    panel : Panel
    priors : dict or PriorSet, optional
        Overrides of the default priors (see :func:`bayeslong.priors.resolve_priors`), or an
        already resolved set.

    Returns
    -------
    pymc.Model
        Free variables: one per ``value`` prior (named by the parameter), one ``<name>__sd``
        per variance outside covariance blocks and one ``lkj(...)`` (the packed Cholesky
        factor of the covariance, with the members' SD priors) per block of size > 1. Deterministics
        carry the remaining parameter names, so every name of ``structure.names`` is in the
        model. Data: ``counts``, ``cross``, ``masks``, ``prior_hyper``.

    Raises
    ------
    SpecError
        Invalid priors (from :func:`~bayeslong.priors.resolve_priors`), or a prior factory
        that returns a variable with another name.

    Notes
    -----
    log p(theta | y) = sum_p loglik_p(c, D, Sigma) + log p(theta) + const, where log p(theta)
    includes the pooling of residual log-SDs over waves (a potential named
    ``residual_pooling``; :mod:`bayeslong.infer.pooling`), and
    ``loglik_p`` is :func:`bayeslong.infer.loglik_op.pattern_loglik` at the implied moments
    (c, D, Sigma) of :func:`bayeslong.moments.implied_moments` (docs/engine.md).
    """
    structure = structure_for(spec, panel)
    prior_set = priors if isinstance(priors, PriorSet) else resolve_priors(structure, panel, priors)
    inputs = model_inputs(panel, prior_set)
    slices = prior_set.hyper_slices()
    with pm.Model(coords={PARAMETER: list(structure.names)}) as model:
        data = {name: pm.Data(name, value) for name, value in inputs.items()}
        hyper = data["prior_hyper"]
        values, corr = {}, {}
        in_lkj = {int(i) for b in prior_set.blocks for i in np.diag(structure.blocks[b].index)}
        for i, p in enumerate(prior_set.priors):
            if p.target == "correlation" or i in in_lkj:
                continue
            if p.factory is not None:
                rv = p.factory(p.rv_name)
                if getattr(rv, "name", None) != p.rv_name:
                    raise SpecError(
                        f"the prior factory for {p.parameter!r} returned a variable named "
                        f"{getattr(rv, 'name', None)!r}; it must use the name it is given, "
                        f"{p.rv_name!r} (e.g. lambda name: pm.HalfNormal(name, 5))")
            else:
                sl = slices[p.parameter]
                cls, kwargs = family_dist(p.family, [hyper[j] for j in range(sl.start, sl.stop)])
                rv = cls(p.rv_name, **kwargs)
            values[p.rv_name] = rv
        for b in prior_set.blocks:
            corr[b] = lkj_block(structure, prior_set, b, hyper, slices, values)
        theta = assemble_theta(prior_set, values, corr, pt.stack)
        for i, p in enumerate(prior_set.priors):
            if p.target != "value":  # variances and covariances are not themselves RVs
                pm.Deterministic(p.parameter, theta[i])
        if prior_set.pooling:  # residual log-SDs pooled over waves (infer/pooling.py)
            taus = [hyper[slices[g.name].start] for g in prior_set.pooling]
            pm.Potential(pool_terms.POOLING_KEY,
                         pool_terms.log_density(prior_set.pooling, theta, taus, pt))
        c, D, Sigma = implied_moments(structure, theta)
        pm.Potential("loglik", pattern_loglik(c, D, Sigma, data["counts"], data["cross"],
                                              data["masks"]))
    return model


class PartialCorrelations(Transform):
    """A q x q correlation matrix (PyMC's LKJCorr value: the strict upper triangle, row by
    row) from its canonical partial correlations z = tanh(y), y unconstrained.

    Row r of the Cholesky factor L of the correlation matrix: L_rc = z_rc w_c for c < r and
    L_rr = w_r, with w_c = prod_{k<c} sqrt(1 - z_rk^2) (Lewandowski, Kurowicka & Joe 2009).
    log |d corr / d y| = sum_rc (1 + (q - c - 2) / 2) log(1 - z_rc^2): the Jacobian of the
    canonical partial correlations to the correlation matrix (Joe 2006, J. Multivariate
    Analysis 97(10), as the inverse of its eq. 11) and of tanh. The generic kernel writes
    the same density (docs/engine.md); the tests hold the Jacobian to finite differences.
    """

    name = CPC_TRANSFORM
    ndim_supp = 1

    def __init__(self, q: int):
        self.q = q

    def _factor(self, y):
        q, pos = self.q, 0
        rows = [[pt.ones(())] + [pt.zeros(())] * (q - 1)]
        for r in range(1, q):
            row, rest = [], pt.ones(())
            for _ in range(r):
                z = pt.tanh(y[pos])
                row.append(z * pt.sqrt(rest))
                rest = rest * (1.0 - z * z)
                pos += 1
            rows.append(row + [pt.sqrt(rest)] + [pt.zeros(())] * (q - r - 1))
        return pt.stack([pt.stack(row) for row in rows])

    def backward(self, value, *inputs):
        L = self._factor(value)
        C = L @ L.T
        return C[np.triu_indices(self.q, 1)]

    def forward(self, value, *inputs):
        q = self.q
        C = corr_matrix(value, q)
        L = pt.linalg.cholesky(C)
        out = []
        for r in range(1, q):
            rest = pt.ones(())
            for c in range(r):
                out.append(pt.arctanh(L[r, c] / pt.sqrt(rest)))
                rest = rest - L[r, c] ** 2
        return pt.stack(out)

    def log_jac_det(self, value, *inputs):
        q, pos, total = self.q, 0, pt.zeros(())
        for r in range(1, q):
            for c in range(r):
                a = pt.abs(value[pos])
                total = total + (1.0 + 0.5 * (q - c - 2.0)) * 2.0 * (
                    np.log(2.0) - a - pt.log1p(pt.exp(-2.0 * a)))
                pos += 1
        return total


def corr_matrix(vec, q: int):
    """The q x q correlation matrix of its strict upper triangle ``vec`` (row by row)."""
    return pm.LKJCorr.vec_to_corr_mat(vec, q)


def _uniform_corr_draw(q: int, rng, size=None) -> np.ndarray:
    # LKJ(1) draws by the canonical partial correlations, z_rc ~ 2 Beta(b_c, b_c) - 1 with
    # b_c = (q - c) / 2 (Lewandowski, Kurowicka & Joe 2009): the strict upper triangle
    shape = () if size is None else tuple(np.atleast_1d(size))
    out = np.empty(shape + (q * (q - 1) // 2,))
    iu = np.triu_indices(q, 1)
    for idx in np.ndindex(*shape):
        L = np.zeros((q, q))
        L[0, 0] = 1.0
        for r in range(1, q):
            rest = 1.0
            for c in range(r):
                z = 2.0 * rng.beta((q - c) / 2.0, (q - c) / 2.0) - 1.0
                L[r, c] = z * np.sqrt(rest)
                rest *= 1.0 - z * z
            L[r, r] = np.sqrt(rest)
        out[idx] = (L @ L.T)[iu]
    return out


def uniform_correlations(name: str, q: int):
    """A q x q correlation matrix (its strict upper triangle) uniform over correlation
    matrices, LKJ(1), sampled by :class:`PartialCorrelations`.

    PyMC's ``LKJCorr`` would do, but its log density checks positive definiteness with an
    Op that nutpie's compiled graph runs in Python (object mode); here every value of the
    transform is a correlation matrix, so the density is the normalising constant alone.
    """
    from bayeslong.infer.generic_logp import lkj_norm

    norm = lkj_norm(q)
    m = q * (q - 1) // 2
    return pm.CustomDist(name, np.zeros(m), signature="(m)->(m)",
                         logp=lambda value, _zero: norm + 0.0 * pt.sum(value),
                         random=lambda _zero, rng=None, size=None: _uniform_corr_draw(q, rng, size),
                         default_transform=PartialCorrelations(q))


def lkj_block(structure, prior_set: PriorSet, b: int, hyper, slices: dict, values: dict):
    """The random variables of covariance block ``b``: its SDs (put into ``values`` by name)
    and its correlation matrix (returned), under the members' SD priors and LKJ(eta).

    The members' SD priors share a family (resolve_priors checks): one vector of SDs, on
    the family's default transform, apart from the correlation matrix, which is sampled as
    its canonical partial correlations (:class:`PartialCorrelations`); a block whose
    variances are one parameter (strict invariance) has one SD. SDs and
    correlations on separate axes keep the posterior free of the funnel a covariance-scale
    Cholesky factor has when a variance nears zero (docs/priors.md). PyMC's LKJ needs a
    constant eta: the matrix is drawn with eta = 1 (uniform over correlation matrices) and
    LKJ(eta)'s density det(C)^(eta - 1) is added as a potential, which keeps eta a model
    input (the normalising constant depends on eta only).
    """
    diag = [int(i) for i in np.diag(structure.blocks[b].index)]
    members = [prior_set.priors[i] for i in diag]
    q = len(members)
    if len(set(diag)) == 1:  # one variance on the whole diagonal: one SD (docs/priors.md)
        first = members[0]
        cls, kwargs = family_dist(first.family, [hyper[slices[first.parameter].start + j]
                                                 for j in range(len(first.args))])
        values[first.rv_name] = cls(lkj_sd_name(prior_set, b), **kwargs, shape=1)[0]
    else:
        args = [pt.stack([hyper[slices[m.parameter].start + j] for m in members])
                for j in range(len(members[0].args))]
        cls, kwargs = family_dist(members[0].family, args)
        sds = cls(lkj_sd_name(prior_set, b), **kwargs, shape=q)
        for r, m in enumerate(members):
            values[m.rv_name] = sds[r]
    first = next(p for p in prior_set.priors if p.target == "correlation" and p.block == b)
    eta = hyper[slices[first.parameter].start]
    vec = uniform_correlations(lkj_name(prior_set, b), q)
    C = corr_matrix(vec, q)
    log_det_corr = 2.0 * pt.sum(pt.log(pt.diagonal(pt.linalg.cholesky(C))))
    pm.Potential(f"{lkj_name(prior_set, b)}_eta", (eta - 1.0) * log_det_corr)
    return C
