"""Partial pooling of the wave-specific residual log-SDs: a default joint prior term.

For each outcome process with two or more free per-wave residual variances
``resid_var[t]`` (``resid_var[y,t]`` with several processes), the log prior gains

    -1/2 sum_t (l_t - mean(l))^2 / tau^2,    l_t = log SD of resid_var[t] = log(resid_var[t]) / 2,

which shrinks the residual log-SDs towards their common value. The term is at most 0, so
it multiplies the product of the variances' own SD priors by a factor at most 1: the prior
stays proper, and exact draws come from rejection sampling of the independent priors
(accept a draw with probability exp(term); :func:`accept`), or on many waves through an
auxiliary mean (:func:`mean_draws`). It only involves the
deviations from the mean, so the common level of the residual SDs keeps its own priors.
Models with equal residual variances over waves have one such parameter per process and no
term. docs/priors.md, "Pooled residual variances"; docs/engine.md, "Leave-future-out refits
on four waves" (why, and the benchmarks that chose tau).

The term is written here once for NumPy and PyTensor (:func:`log_density`, ``xp`` the array
module); the generic numba kernel (:mod:`bayeslong.infer.generic_kernel`) writes the same
sum with its gradient, held to the PyMC model to 1e-10 by the tests.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from bayeslong.errors import SpecError

#: The key of ``priors={...}`` that sets tau (a positive number) or switches pooling off.
POOLING_KEY = "residual_pooling"

#: The default scale tau of the pooling (docs/engine.md, "Leave-future-out refits on four
#: waves": chosen on the boundary bench's 20 panels, checked on 20 fresh ones).
DEFAULT_TAU = 0.25

#: The family name the prior table shows for the pooling term.
FAMILY = "pooled log-SD"


@dataclass(frozen=True)
class Pooling:
    """The pooling term of one outcome process.

    Attributes
    ----------
    outcome : str
    members : tuple of int
        Positions (``structure.names``) of its free per-wave residual variances (>= 2).
    tau : float
    source : {"default", "user"}
    """

    outcome: str
    members: tuple
    tau: float
    source: str = "default"

    @property
    def name(self) -> str:
        return f"{POOLING_KEY}[{self.outcome}]"


def residual_groups(structure) -> list[tuple[str, tuple[int, ...]]]:
    """``(outcome, positions)`` of every process with >= 2 free residual variances."""
    groups: dict[str, list[int]] = {}
    several = len(structure.outcomes) > 1
    for i, name in enumerate(structure.names):
        if name.split("[")[0] != "resid_var":
            continue
        keys = name[name.index("[") + 1: name.rindex("]")].split(",") if "[" in name else []
        outcome = keys[0] if several and keys else structure.outcomes[0]
        groups.setdefault(outcome, []).append(i)
    return [(k, tuple(v)) for k, v in groups.items() if len(v) >= 2]


def parse_tau(value) -> float | None:
    """The tau of a user value (a positive number, or a 1-tuple of one), None for off.

    Raises
    ------
    SpecError
        Anything else: a negative, zero or non-finite number, a string other than "off",
        a family tuple.
    """
    if isinstance(value, (tuple, list)) and len(value) == 1:
        value = value[0]
    if value is None or value is False or (isinstance(value, str)
                                           and value.lower() in ("off", "none")):
        return None
    ok = isinstance(value, (int, float, np.floating, np.integer)) and not isinstance(value, bool)
    if not ok or not math.isfinite(float(value)) or float(value) <= 0:
        raise SpecError(
            f"priors[{POOLING_KEY!r}] must be a positive number, the scale tau of the pooling "
            f"of the residual log-SDs over waves (default {DEFAULT_TAU}), or None / 'off' to "
            f"switch the pooling off; got {value!r}")
    return float(value)


def poolings(structure, value=DEFAULT_TAU, source: str = "default") -> tuple[Pooling, ...]:
    """The pooling terms of a structure at ``value`` (tau, or off: none)."""
    tau = parse_tau(value)
    if tau is None:
        return ()
    return tuple(Pooling(outcome=o, members=m, tau=tau, source=source)
                 for o, m in residual_groups(structure))


def log_density(pools, theta, taus=None, xp=np):
    """The pooling terms at ``theta`` (natural parameters on the last axis), summed.

    ``taus``: one tau per term (PyTensor scalars in the PyMC model, where tau is a model
    input); default the terms' own. ``xp``: ``numpy`` or ``pytensor.tensor``.
    """
    total = 0.0
    for j, pool in enumerate(pools):
        tau = pool.tau if taus is None else taus[j]
        logsd = 0.5 * xp.log(xp.stack([theta[..., k] for k in pool.members], axis=-1))
        dev = logsd - logsd.mean(axis=-1, keepdims=True)
        total = total - 0.5 * (dev ** 2).sum(axis=-1) / tau ** 2
    return total


def accept(pools, sds: dict, rng) -> np.ndarray:
    """Rejection step: which candidate draws to keep (boolean over draws).

    ``sds``: parameter position -> SD draws from the independent priors. A draw is kept
    with probability exp(pooling terms) <= 1, so the kept draws follow the pooled prior
    exactly.
    """
    n = len(next(iter(sds.values())))
    theta = np.zeros((n, 1 + max(sds)))
    for k, v in sds.items():
        theta[:, k] = np.asarray(v, dtype=float) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        lp = log_density(pools, theta)
    return np.log(rng.uniform(size=n)) < np.nan_to_num(lp, nan=-np.inf)


#: When rejection would need more candidates than this for the draws asked for (estimated
#: from a first batch), :func:`sd_draws` draws by the auxiliary mean (:func:`mean_draws`).
REJECTION_BUDGET = 5_000_000

#: Points of the grid on which :func:`mean_draws` lays out the auxiliary mean's density.
GRID_POINTS = 3001


def sd_draws(pools, priors, draws: int, rng, family_dist) -> dict:
    """SD draws of the pooled residual variances (``rv_name -> (draws,)``).

    Rejection first: candidates come from the variances' own (independent) SD priors
    (``priors``: the prior set's :class:`~bayeslong.infer.priors.Prior` list; ``family_dist``
    its PyMC classes) in batches, and each is kept with probability exp(pooling terms) <= 1
    (:func:`accept`), so the kept ones follow the pooled prior exactly. The acceptance rate
    falls with the number of pooled waves (docs/priors.md, "Pooled residual variances");
    when the first batch says that more than :data:`REJECTION_BUDGET` candidates would be
    needed, every draw comes from :func:`mean_draws` instead. The SDs of other parameters
    and the LKJ correlations are independent of these a priori and drawn apart.
    """
    import pymc as pm

    members = [k for g in pools for k in g.members]
    batch = 20_000
    dists = []
    for k in members:
        p = priors[k]
        if p.factory is not None:
            raise SpecError(f"prior draws: {p.parameter!r} has a PyMC factory prior and is "
                            "pooled with other residual variances; give it a (family, *args) "
                            f"prior, or switch the pooling off with priors={{{POOLING_KEY!r}: "
                            "None}")
        cls, kwargs = family_dist(p.family, p.args)
        dists.append(cls.dist(**kwargs, size=batch))
    fn = pm.pytensorf.compile([], dists, random_seed=int(rng.integers(2**31)))
    kept, tried = [], 0
    while sum(len(v) for v in kept) < draws:
        out = np.stack([np.asarray(o, dtype=float) for o in fn()], axis=1)  # (batch, members)
        ok = accept(pools, dict(zip(members, out.T)), rng)
        kept.append(out[ok])
        tried += batch
        if tried == batch and (ok.sum() + 1) / batch * REJECTION_BUDGET < draws:
            sds = np.concatenate([mean_draws(g, priors, draws, rng, family_dist) for g in pools],
                                 axis=1)
            break
    else:
        sds = np.concatenate(kept)[:draws]
    return {priors[k].rv_name: sds[:, j] for j, k in enumerate(members)}


def mean_draws(pool: Pooling, priors, draws: int, rng, family_dist) -> np.ndarray:
    """SD draws of one pooling term through an auxiliary mean: shape (draws, members).

    With h_t the density of the log-SD l_t under its own prior, the pooled prior is
    prod_t h_t(l_t) exp(-sum_t (l_t - mean l)^2 / (2 tau^2)), the marginal of
    prod_t h_t(l_t) exp(-(l_t - m)^2 / (2 tau^2)) over an auxiliary m (the integral of
    exp(-sum_t (l_t - m)^2 / (2 tau^2)) over m is the pooling factor times a constant). So m
    is drawn from its marginal, proportional to prod_t Z_t(m) with Z_t the convolution of h_t
    with N(0, tau^2), laid out on a grid of :data:`GRID_POINTS` points (a draw is a grid cell
    by its probability, then uniform within the cell: the one approximation), and then each
    l_t independently from h_t(l) N(l; m, tau^2), exactly, by rejection from N(m, tau^2)
    with the bound max h_t (its grid maximum times e^0.05). Any number of waves costs the
    same; docs/priors.md, "Pooled residual variances".
    """
    import pymc as pm
    import pytensor
    import pytensor.tensor as pt
    from scipy.special import logsumexp

    x = pt.dvector("logsd")
    logh = []
    for k in pool.members:
        cls, kwargs = family_dist(priors[k].family, priors[k].args)
        logh.append(pytensor.function([x], pm.logp(cls.dist(**kwargs), pt.exp(x)) + x))

    def values(f, grid):
        with np.errstate(all="ignore"):
            v = np.asarray(f(grid), dtype=float)
        return np.where(np.isfinite(v), v, -np.inf)

    coarse = np.linspace(-60.0, 40.0, 2001)
    live = np.zeros(coarse.shape, dtype=bool)
    for f in logh:
        v = values(f, coarse)
        live |= v > v.max() - 40.0
    tau = pool.tau
    grid = np.linspace(coarse[live].min() - 8 * tau, coarse[live].max() + 8 * tau, GRID_POINTS)
    step = grid[1] - grid[0]
    on_grid = [values(f, grid) for f in logh]
    kernel = -0.5 * ((grid[:, None] - grid[None, :]) / tau) ** 2  # (m, l)
    log_m = sum(logsumexp(kernel + v[None, :], axis=1) for v in on_grid)
    prob = np.exp(log_m - log_m.max())
    cells = rng.choice(len(grid), size=draws, p=prob / prob.sum())
    m = grid[cells] + (rng.uniform(size=draws) - 0.5) * step
    out = np.empty((draws, len(pool.members)))
    for j, (f, v) in enumerate(zip(logh, on_grid)):
        bound = v.max() + 0.05
        todo = np.arange(draws)
        while todo.size:
            cand = m[todo] + tau * rng.standard_normal(todo.size)
            ok = np.log(rng.uniform(size=todo.size)) < values(f, cand) - bound
            out[todo[ok], j] = cand[ok]
            todo = todo[~ok]
    return np.exp(out)


def describe(pool: Pooling, structure) -> str:
    """What the prior table shows under "on"."""
    members = ", ".join(structure.names[k] for k in pool.members)
    return f"log SDs of {members} (shrunk towards their mean)"
