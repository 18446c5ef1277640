"""Local identification by the rank of the Jacobian of the implied moments.

Notes
-----
A parameter vector theta is locally identified when the map theta -> (c, D, vech Sigma)
has a Jacobian of full column rank near it (Rothenberg 1971, Theorem 6). The rank is
taken at several random admissible points (a random point is regular with probability
one), after scaling each column to unit length. Parameters with weight in the null space
are the ones the moments cannot tell apart.

References
----------
Rothenberg, T. J. (1971). Identification in parametric models. Econometrica 39(3),
577-591. doi:10.2307/1913267
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bayeslong.arguments import seed_value, whole_number
from bayeslong.model.moments import NUMPY, implied_moments, moment_jacobian
from bayeslong.model.spec import Spec
from bayeslong.model.start import start_values
from bayeslong.model.structure import Structure, structure_for
from bayeslong.model.thresholds import Categorical, categorical_structure
from bayeslong.model.transform import Unconstrained
from bayeslong.threads import single_thread

_RESULTS: dict = {}


@dataclass(frozen=True, kw_only=True)
class Identification:
    """Result of :func:`identify`.

    Attributes
    ----------
    identified : bool
    deficient : tuple of str
        Parameters in the null space of the Jacobian (empty when identified).
    rank, n_params, n_moments : int
    advice : str
        What to do about it, in words.
    """

    identified: bool
    deficient: tuple[str, ...]
    rank: int
    n_params: int
    n_moments: int
    advice: str = ""

    def __bool__(self) -> bool:
        return self.identified


def _measurement_advice(spec, structure, deficient) -> str:
    """Why latent means are deficient below scalar invariance (model/measurement.py)."""
    several = any(len(g) > 1 for g in (structure.indicators or {}).values())
    level = spec.measurement["invariance"]
    means = [n for n in deficient if n.split("[")[0].endswith("_mean") or n.startswith("intercept")]
    if several and level == "approximate":
        return ("Under approximate invariance the common values and the per-wave deviations "
                "of loadings and intercepts are told apart only by the deviations' prior: the "
                "Bayesian fit (bl.fit) is identified through it, maximum likelihood is not. ")
    if not several or not means:
        return ""
    if level in ("configural", "metric"):
        return (f"Under {level} invariance the indicators' intercepts are free at every wave "
                "after the first, the marker's too, so the latent's mean cannot move over waves "
                "in a way the data show: growth means and wave intercepts need "
                "invariance='scalar' (or a partial release of indicators other than the marker). ")
    return ("Released intercepts leave no indicator whose intercept is equal over waves, so "
            "the latent's mean cannot move over waves in a way the data show: keep at least "
            "one indicator's intercept invariant. ")


def _moment_jacobian(structure: Structure, theta) -> np.ndarray:
    """d(c, vec D, vech Sigma)/d theta, shape (n_moments, n_params), exact (complex step)."""
    _, (dc, dD, dS) = moment_jacobian(structure, theta)
    rows, cols = np.tril_indices(len(structure.observed))
    return np.concatenate([dc, dD.reshape(len(dc), -1), dS[:, rows, cols]], axis=1).T


def identify(spec: Spec, panel, *, points: int = 3, seed: int = 0, tol: float = 1e-8) -> Identification:
    """Check local identification of ``spec`` on ``panel``'s design.

    Parameters
    ----------
    spec : Spec
    panel : Panel
        Only its design is used (waves, outcome and covariate names), not its values
        beyond the scale of the start values.
    points : int
        Random parameter points at which the rank is taken; the largest rank counts.
    tol : float
        Singular values below ``tol`` times the largest count as zero.

    Returns
    -------
    Identification
    """
    points = whole_number(points, "points", where="identify")
    seed = seed_value(seed, where="identify")
    structure = structure_for(spec, panel)
    categories = tuple(sorted((str(k), len(v)) for k, v in
                              (getattr(panel, "categories", None) or {}).items()))
    key = (structure, categories, points, seed, tol)
    if key not in _RESULTS:  # the answer depends on the design only, so it is kept
        run = _identify_categorical if categories else _identify
        with single_thread():
            _RESULTS[key] = run(spec, panel, points=points, seed=seed, tol=tol)
    return _RESULTS[key]


def _best_rank(jacobians, tol: float):
    """``(rank, null-space rows, rows)`` of the highest-rank Jacobian among ``jacobians``,
    each column scaled to unit length, singular values below ``tol`` times the largest
    counted as zero."""
    best = None
    for J in jacobians:
        J = J / np.maximum(np.linalg.norm(J, axis=0), 1e-300)
        _, sv, vt = np.linalg.svd(J, full_matrices=True)
        rank = int(np.sum(sv > tol * sv.max()))
        if best is None or rank > best[0]:
            best = (rank, vt[rank:], J.shape[0])
    return best


def _identify(spec, panel, *, points, seed, tol) -> Identification:
    structure = structure_for(spec, panel)
    tr = Unconstrained(structure)
    rng = np.random.default_rng(seed)
    u0 = tr.from_natural(start_values(structure, panel))
    rank, null, n_moments = _best_rank(
        (_moment_jacobian(structure, tr.to_natural(u0 + rng.normal(0.0, 0.5, size=u0.shape)))
         for _ in range(points)), tol)
    p = structure.n_params
    deficient = ()
    advice = ""
    if rank < p:
        weight = np.abs(null).max(axis=0)
        deficient = tuple(n for n, w in zip(structure.names, weight) if w > 1e-3)
        advice = (_measurement_advice(spec, structure, deficient)
                  + "Fix one of them, drop the term, or choose a model that restricts it"
                  + (" (a time-invariant covariate cannot be separated from a level factor "
                     "that is free to depend on it: leave z out of this model)"
                     if spec.level_covariates == "every-wave" and panel.time_invariant else "")
                  + "; more waves help when the count of moments is short "
                  f"({n_moments} moments for {p} parameters).")
    return Identification(identified=rank == p, deficient=deficient, rank=rank,
                          n_params=p, n_moments=n_moments, advice=advice)


def _standardised(cat: Categorical, x) -> np.ndarray:
    """What categorical data identify, as a function of (free parameters, thresholds).

    For a categorical response only the location and scale-free quantities reach the
    categories' probabilities: each cut standardised by its response's mean and SD,
    (tau - c) / sd, the covariate effects over the SD, and the responses' correlations;
    a continuous variable keeps its mean, effects and variance (docs/model-family.md,
    "Categorical variables"). ``x`` may be complex (the complex step).
    """
    structure = cat.structure
    n_free = len(cat.free)
    theta = np.zeros(x.shape[:-1] + (structure.n_params,), dtype=x.dtype)
    for name, value in cat.pinned.items():
        theta[..., structure.names.index(name)] = value
    theta[..., list(cat.free)] = x[..., :n_free]
    c, D, Sigma = implied_moments(structure, theta, NUMPY)
    Y = c.shape[-1]
    sd = np.ones(x.shape[:-1] + (Y,), dtype=x.dtype)
    is_cat = np.zeros(Y, dtype=bool)
    for v in cat.variables:
        is_cat[cat.rows[v]] = True
        sd[..., cat.rows[v]] = np.sqrt(Sigma[..., cat.rows[v], cat.rows[v]])
    out = [np.where(is_cat, 0.0, c), D / sd[..., :, None]]
    tau = np.concatenate([x[..., n_free:], np.zeros(x.shape[:-1] + (1,), dtype=x.dtype)], axis=-1)
    for v in cat.variables:
        r = cat.rows[v]
        cut = tau[..., cat.cuts[v]]  # (..., T, C-1), index -1 is the fixed 0
        out.append((cut - c[..., r, None]) / sd[..., r, None])
    corr = Sigma / (sd[..., :, None] * sd[..., None, :])
    iu = np.triu_indices(Y)
    keep = ~(is_cat[iu[0]] & (iu[0] == iu[1]))  # a categorical response's variance is 1
    out.append(corr[..., iu[0][keep], iu[1][keep]])
    return np.concatenate([o.reshape(x.shape[:-1] + (-1,)) for o in out], axis=-1)


def _identify_categorical(spec, panel, *, points, seed, tol) -> Identification:
    """Rank of the Jacobian of :func:`_standardised` (exact, by the complex step) at random
    admissible points: the categorical form of :func:`_identify` (Rothenberg 1971; the
    standardised thresholds and response correlations are what ordinal data identify,
    Muthen 1984)."""
    cat = categorical_structure(spec, panel)
    structure = cat.structure
    tr = Unconstrained(structure)
    rng = np.random.default_rng(seed)
    u0 = tr.from_natural(start_values(structure_for(spec, panel), panel))
    n_free, n_tau = len(cat.free), len(cat.thresholds)

    def jacobians():
        for _ in range(points):
            theta = tr.to_natural(u0 + rng.normal(0.0, 0.5, size=u0.shape))
            # thresholds increasing from the fixed first cut 0, in the responses' SD units
            tau = np.cumsum(rng.uniform(0.3, 1.0, size=max(n_tau, 1)))[:n_tau]
            x = np.concatenate([theta[list(cat.free)], tau])
            step = 1e-30
            g = _standardised(cat, x[None] + 1j * step * np.eye(len(x)))
            yield (g.imag / step).T

    rank, null, n_moments = _best_rank(jacobians(), tol)
    p = n_free + n_tau
    deficient, advice = (), ""
    if rank < p:
        weight = np.abs(null).max(axis=0)
        deficient = tuple(n for n, w in zip(cat.names, weight) if w > 1e-3)
        advice = ("categorical data fix only each response's standardised thresholds and the "
                  "responses' correlations (and the covariates' standardised effects), so these "
                  "parameters cannot be told apart: " + ", ".join(deficient) + ". Keep the "
                  "thresholds equal over waves (thresholds='equal'), give the model equal "
                  "residual variances (residuals='equal'), fix one of them, or add waves "
                  f"({n_moments} identified quantities for {p} parameters).")
    return Identification(identified=rank == p, deficient=deficient, rank=rank,
                          n_params=p, n_moments=n_moments, advice=advice)
