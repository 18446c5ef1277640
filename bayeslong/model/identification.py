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
from bayeslong.model.moments import moment_jacobian
from bayeslong.model.spec import Spec
from bayeslong.model.start import start_values
from bayeslong.model.structure import Structure, structure_for
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
    key = (structure, points, seed, tol)
    if key not in _RESULTS:  # the answer depends on the design only, so it is kept
        with single_thread():
            _RESULTS[key] = _identify(spec, panel, points=points, seed=seed, tol=tol)
    return _RESULTS[key]


def _identify(spec, panel, *, points, seed, tol) -> Identification:
    structure = structure_for(spec, panel)
    tr = Unconstrained(structure)
    rng = np.random.default_rng(seed)
    u0 = tr.from_natural(start_values(structure, panel))
    best = None
    for _ in range(points):
        u = u0 + rng.normal(0.0, 0.5, size=u0.shape)
        J = _moment_jacobian(structure, tr.to_natural(u))
        J = J / np.maximum(np.linalg.norm(J, axis=0), 1e-300)
        _, s, vt = np.linalg.svd(J, full_matrices=True)
        rank = int(np.sum(s > tol * s.max()))
        if best is None or rank > best[0]:
            best = (rank, vt[rank:], J.shape[0])
    rank, null, n_moments = best
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
