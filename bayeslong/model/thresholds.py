"""Categorical indicators: latent responses, thresholds and the constraints that identify them.

A binary or ordinal variable v with categories 1..C is the coarsened form of a continuous
latent response (docs/model-family.md, "Categorical indicators"):

    y*[i,v,t] = nu[v,t] + lambda[v,t] eta[i,k,t] + eps[i,v,t]
    y[i,v,t]  = c   exactly when   tau[v,c-1] < y*[i,v,t] <= tau[v,c]     (tau_0 = -inf, tau_C = inf)

eps is standard normal (``link="probit"``, the default) or standard logistic (``"logit"``).
The structural part (growth factors, lags, covariates) acts on eta unchanged. A process
observed directly by one categorical variable has y* = eta + eps.

Identification (each is a fixed value, not an estimate; Muthén 1984 for the latent
response formulation, Mehta, Neale & Flay 2004 for the longitudinal case):

- Scale: the error of every latent response has a fixed variance (1 for the probit,
  pi^2/3 for the logit); for an indicator of a process with several indicators its
  ``unique_var`` is that fixed value (and its unique factors are uncorrelated over waves).
- Location: the first threshold of every categorical variable is 0 at every wave; the
  intercepts and latent means of the continuous model stay free. Fixing a threshold rather
  than an intercept keeps every parameter of the continuous model (growth means, wave
  intercepts, the marker's origin) in place with its meaning, works the same way for a
  process observed by one variable (which has no intercept of its own), and makes a binary
  variable the familiar probit with an intercept.
- A wave disturbance that nothing carries forward (no lag or loading reaches it from a
  later wave) and that is uncorrelated with every other disturbance adds to y* exactly as
  eps does, so the two cannot be told apart: such a ``resid_var`` of a process observed by
  one categorical variable is fixed at 0 and eps is that wave's residual. In ``waves-apart``
  and ``random-effects`` this gives the ordered probit regression and the random-intercept
  probit (Butler & Moffitt 1982); in ``alt`` with ``residuals = "free"`` it fixes the last
  wave's disturbance variance.
- Thresholds are equal over waves by default (``thresholds = "equal"``, parameters
  ``threshold[v,c]``), the ordinal form of scalar invariance: they carry the first wave's
  scale and origin to the later waves. ``thresholds = "free"`` gives each wave its own
  (``threshold[v,c,t]``).

``threshold[v,c]`` is the cut between categories c and c+1 (c = 2..C-1; the cut between
1 and 2 is 0). A binary variable has no threshold parameter.

References
----------
Butler, J. S. & Moffitt, R. (1982). A computationally efficient quadrature procedure for the
one-factor multinomial probit model. Econometrica 50(3), 761-764. doi:10.2307/1912613
Mehta, P. D., Neale, M. C. & Flay, B. R. (2004). Squeezing interval change from ordinal
panel data: latent growth curves with ordinal outcomes. Psychological Methods 9(3),
301-333. doi:10.1037/1082-989X.9.3.301
Muthén, B. (1984). A general structural equation model with dichotomous, ordered
categorical, and continuous latent variable indicators. Psychometrika 49(1), 115-132.
doi:10.1007/BF02294210
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from bayeslong.errors import SpecError
from bayeslong.model.spec import Spec, check_spec
from bayeslong.model.structure import Matrix, Structure, build_structure, structure_for

#: Variance of the latent response's error under each link.
ERROR_VARIANCE = {"probit": 1.0, "logit": float(np.pi**2 / 3.0)}


def threshold_name(variable: str, c: int, t: int | None = None) -> str:
    """``threshold[v,c]``, the cut between categories c and c+1 (``threshold[v,c,t]`` at wave t)."""
    return f"threshold[{variable},{c}]" if t is None else f"threshold[{variable},{c},{t}]"


@dataclass(frozen=True, eq=False)
class Categorical:
    """The categorical part of a model on a panel design (see module notes).

    Attributes
    ----------
    structure : Structure
        The engine's structure with the latent responses' errors in Theta (fixed), so that
        ``implied_moments`` gives the moments of the latent responses y*.
    link : {"probit", "logit"}
    variables : tuple of str
        The categorical observed variables, in observed order.
    n_categories : dict
        Variable -> C.
    rows : dict
        Variable -> its T rows in the observed vector (``structure.observed``).
    thresholds : tuple of str
        The free threshold parameters.
    cuts : dict
        Variable -> (T, C-1) integer array: entry [t, c-1] is the position in ``thresholds``
        of the cut between categories c and c+1 at wave t+1, or -1 for the fixed 0.
    pinned : dict
        Parameters of ``structure`` fixed by identification, name -> value.
    """

    structure: Structure
    link: str
    variables: tuple
    n_categories: dict
    rows: dict
    thresholds: tuple
    cuts: dict
    pinned: dict

    @property
    def error_variance(self) -> float:
        return ERROR_VARIANCE[self.link]

    @cached_property
    def free(self) -> tuple:
        """Positions (in ``structure.names``) of the parameters that are not pinned."""
        return tuple(i for i, n in enumerate(self.structure.names) if n not in self.pinned)

    @property
    def names(self) -> tuple:
        """The estimated parameters: the structure's free ones, then the thresholds."""
        return tuple(self.structure.names[i] for i in self.free) + self.thresholds

    def full_theta(self, theta_free) -> np.ndarray:
        """The structure's parameter vector (..., n_params) from the free values (NumPy)."""
        theta_free = np.asarray(theta_free, dtype=float)
        out = np.empty(theta_free.shape[:-1] + (self.structure.n_params,))
        for i, name in enumerate(self.structure.names):
            if name in self.pinned:
                out[..., i] = self.pinned[name]
        out[..., list(self.free)] = theta_free
        return out

    def cut_values(self, tau) -> dict:
        """Variable -> (..., T, C+1) cut points -inf, tau_1 = 0, ..., tau_(C-1), inf (NumPy)."""
        tau = np.asarray(tau, dtype=float)
        ext = np.concatenate([tau, np.zeros(tau.shape[:-1] + (1,))], axis=-1)
        out = {}
        for v in self.variables:
            inner = ext[..., self.cuts[v]]  # index -1 picks the appended 0
            inf = np.full(inner.shape[:-1] + (1,), np.inf)
            out[v] = np.concatenate([-inf, inner, inf], axis=-1)
        return out


def categorize(ystar, cuts) -> np.ndarray:
    """Category positions 0..C-1 of latent responses: the number of inner cuts below each.

    ``ystar`` (..., T) and ``cuts`` (..., T, C+1) as :meth:`Categorical.cut_values` gives
    them (broadcast over leading axes); y = c exactly when tau_(c-1) < y* <= tau_c.
    """
    ystar = np.asarray(ystar, dtype=float)
    return (ystar[..., None] > np.asarray(cuts)[..., 1:-1]).sum(axis=-1)


def categorical_structure(spec: Spec, panel, *, with_error: bool = True) -> Categorical:
    """The :class:`Categorical` part of ``spec`` on ``panel``'s design (see module notes).

    ``with_error=False`` leaves the latent responses' errors out of Theta (and pins the
    unique variances of categorical indicators at 0): simulation draws them itself, from
    the link's own distribution.
    """
    spec = check_spec(spec)
    if not getattr(panel, "categories", None):
        raise SpecError("the panel has no categorical variables; declare them at intake with "
                        "categorical={'name': 'ordinal'} (or 'binary', or the labels in order)")
    return _categorical(spec, structure_for(spec, panel), dict(panel.categories), with_error)


def categorical_design(spec: Spec, *, outcomes, n_waves, time_varying=(), time_invariant=(),
                       indicators=None, n_categories: dict, with_error: bool = True) -> Categorical:
    """:func:`categorical_structure` from a design's names (simulation): ``n_categories`` maps
    each categorical variable to its number of categories."""
    structure = build_structure(spec, outcomes=outcomes, n_waves=n_waves,
                                time_varying=time_varying, time_invariant=time_invariant,
                                indicators=indicators)
    return _categorical(spec, structure, {v: tuple(range(int(c))) for v, c in n_categories.items()},
                        with_error)


def _categorical(spec: Spec, structure: Structure, categories: dict, with_error: bool) -> Categorical:
    link = spec.measurement["link"]
    per_wave = spec.measurement["thresholds"] == "free"
    error = ERROR_VARIANCE[link] if with_error else 0.0
    T = structure.n_waves
    indicators = structure.indicators or {k: (k,) for k in structure.outcomes}
    observed = [n for g in indicators.values() for n in g]
    names = structure.names
    Theta = structure.matrices["Theta"]
    theta_fixed = Theta.fixed.copy()
    pinned: dict[str, float] = {}
    rows, n_cat, cuts, thresholds = {}, {}, {}, []
    for v in observed:
        if v not in categories:
            continue
        j = observed.index(v)
        r = np.arange(j * T, (j + 1) * T)
        rows[v], n_cat[v] = r, len(categories[v])
        process = next(k for k, g in indicators.items() if v in g)
        single = len(indicators[process]) == 1
        off = Theta.index[np.ix_(r, np.arange(Theta.index.shape[0]))].copy()
        off[np.arange(T), r] = -1
        if (off >= 0).any():
            raise SpecError(
                f"categorical indicator {v!r} has unique covariances over waves in model "
                f"'{spec.name}'; with a categorical indicator choose unique_covariance='none' "
                "(the latent responses' errors are uncorrelated over waves)")
        for t, row in enumerate(r):
            k = int(Theta.index[row, row])
            if k >= 0 and not single:
                pinned[names[k]] = error  # the unique variance is the response's error
            else:
                theta_fixed[row, row] += error
        if single:
            for k in _uncarried_disturbances(structure, r):
                pinned[names[k]] = 0.0
        c_count = n_cat[v]
        table = np.full((T, c_count - 1), -1, dtype=np.int64)
        for c in range(2, c_count):
            for t in range(T):
                name = threshold_name(v, c, t + 1 if per_wave else None)
                if name not in thresholds:
                    thresholds.append(name)
                table[t, c - 1] = thresholds.index(name)
        cuts[v] = table
    theta_m = Matrix(theta_fixed, Theta.index.copy(), list(Theta.terms))
    new = dataclasses.replace(structure, matrices={**structure.matrices, "Theta": theta_m})
    return Categorical(structure=new, link=link, variables=tuple(rows), n_categories=n_cat,
                       rows=rows, thresholds=tuple(thresholds), cuts=cuts, pinned=pinned)


def _uncarried_disturbances(structure: Structure, rows: np.ndarray) -> list[int]:
    """Variance parameters confounded with the latent responses' errors (module notes).

    A variance on the diagonal of Psi (the latent disturbance of a latent that loads only on
    these rows) or of Theta (measurement error, as in dual change) whose block is 1 x 1,
    at every place it fills: the latent it belongs to is carried by nothing (its column of
    B is empty).
    """
    m = structure.matrices
    Psi, Theta, B, Lam = m["Psi"], m["Theta"], m["B"], m["Lam"]
    places: dict[int, list[bool]] = {}
    for row in rows:
        k = int(Theta.index[row, row])
        if k >= 0:
            alone = (Theta.index[row] >= 0).sum() == 1
            places.setdefault(k, []).append(bool(alone))
    latents = {int(l) for row in rows for l in np.flatnonzero((Lam.index[row] >= 0) | (Lam.fixed[row] != 0))}
    for l in latents:
        k = int(Psi.index[l, l])
        if k < 0:
            continue
        loads_here_only = set(np.flatnonzero((Lam.index[:, l] >= 0) | (Lam.fixed[:, l] != 0))) <= set(rows)
        carried = bool(((B.index[:, l] >= 0) | (B.fixed[:, l] != 0)).any())
        alone = (Psi.index[l] >= 0).sum() == 1
        places.setdefault(k, []).append(loads_here_only and not carried and alone)
    # a parameter that fills a place elsewhere (another process, a carried wave) stays free
    for l in range(Psi.index.shape[0]):
        k = int(Psi.index[l, l])
        if k in places and l not in latents:
            places[k].append(False)
    return [k for k, ok in places.items() if all(ok)]

