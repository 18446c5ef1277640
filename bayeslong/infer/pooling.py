"""Partial pooling of the wave-specific residual log-SDs: a default joint prior term.

For each outcome process with two or more free per-wave residual variances
``resid_var[t]`` (``resid_var[y,t]`` with several processes), the log prior gains

    -1/2 sum_t (l_t - mean(l))^2 / tau^2,    l_t = log SD of resid_var[t] = log(resid_var[t]) / 2,

which shrinks the residual log-SDs towards their common value. The term is at most 0, so
it multiplies the product of the variances' own SD priors by a factor at most 1: the prior
stays proper, and exact draws come from rejection sampling of the independent priors
(accept a draw with probability exp(term); :func:`accept`). It only involves the
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


#: Most candidate draws that :func:`sd_draws` tries before it gives up.
MAX_CANDIDATES = 100_000_000


def sd_draws(pools, priors, draws: int, rng, family_dist) -> dict:
    """SD draws of the pooled residual variances (``rv_name -> (draws,)``): exact rejection.

    Candidates come from the variances' own (independent) SD priors (``priors``: the prior
    set's :class:`~bayeslong.infer.priors.Prior` list; ``family_dist`` its PyMC classes) in
    batches; each is kept with probability exp(pooling terms) <= 1 (:func:`accept`), so the
    kept ones follow the pooled prior exactly. The SDs of other parameters and the LKJ
    correlations are independent of these a priori and drawn apart. The acceptance rate
    falls with the number of pooled waves (docs/priors.md, "Pooled residual variances"):
    past :data:`MAX_CANDIDATES` candidates it raises.
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
        if tried >= MAX_CANDIDATES:
            got = sum(len(v) for v in kept)
            raise SpecError(
                f"prior draws under the pooling of residual log-SDs: {got} of {draws} draws "
                f"kept from {tried:,} candidates (acceptance {got / tried:.2g}); with this many "
                "waves the exact rejection sampler is too slow. Raise tau or switch the pooling "
                f"off: priors={{{POOLING_KEY!r}: None}} (docs/priors.md)")
        out = np.stack([np.asarray(o, dtype=float) for o in fn()], axis=1)  # (batch, members)
        ok = accept(pools, dict(zip(members, out.T)), rng)
        kept.append(out[ok])
        tried += batch
    sds = np.concatenate(kept)[:draws]
    return {priors[k].rv_name: sds[:, j] for j, k in enumerate(members)}


def describe(pool: Pooling, structure) -> str:
    """What the prior table shows under "on"."""
    members = ", ".join(structure.names[k] for k in pool.members)
    return f"log SDs of {members} (shrunk towards their mean)"
