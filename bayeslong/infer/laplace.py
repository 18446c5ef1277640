"""A quick normal approximation of the posterior around the ML fit (a test stand-in).

Used by the tests of :mod:`bayeslong.compare` and :mod:`bayeslong.check` to get a
:class:`bayeslong.fit.Fit`-shaped object in seconds: draws theta ~ N(theta_ML, I(theta_ML)^-1)
(the Laplace approximation under a flat prior; Gelman et al. 2013, BDA3 section 4.1),
rejecting draws whose covariance blocks are not positive definite, and stores one
log-likelihood term per unit (the normal density of the unit's observed entries under the
implied moments). It is not a sampler and carries no priors; use :func:`bayeslong.fit`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from bayeslong.dims import UNIT
from bayeslong.infer.likelihood import loglik_function, mvn_logpdf, pattern_arrays
from bayeslong.infer.ml import fit_ml, hessian
from bayeslong.model.moments import moment_draws, unit_means
from bayeslong.model.spec import Spec
from bayeslong.model.structure import Structure, structure_for


def unit_loglik(structure: Structure, panel, thetas: np.ndarray) -> np.ndarray:
    """Per-unit log-likelihood at each row of ``thetas``, shape (S, N).

    Each unit's observed entries are scored by the normal density of the implied moments,
    vectorised over draws and grouped by missing-data pattern (the tests check it against
    :func:`bayeslong.likelihood.pattern_values` on :func:`unit_cross`).
    """
    mom = moment_draws(structure, np.atleast_2d(thetas))
    ys = panel.outcome_matrix()
    mean = unit_means(mom, panel.covariate_matrix())
    seen = ~np.isnan(ys)
    out = np.empty((len(mean), len(ys)))
    groups: dict = {}
    for i in range(len(ys)):
        groups.setdefault(seen[i].tobytes(), []).append(i)
    for idx in groups.values():
        obs = seen[idx[0]]
        out[:, idx] = mvn_logpdf(ys[idx][:, obs][None], mean[:, idx][:, :, obs],
                                 mom["Sigma"][:, None][:, :, obs][:, :, :, obs])
    return out


@dataclass(frozen=True, kw_only=True, eq=False)
class ApproxFit:
    """A Fit-shaped object holding normal-approximation draws (see module docstring)."""

    spec: Spec
    panel: object
    structure: Structure
    seed: int
    idata: object
    ml: object = field(repr=False)

    def theta_draws(self) -> np.ndarray:
        post = self.idata.posterior
        return np.stack([post[n].values.reshape(-1) for n in self.structure.names], axis=1)

    def summary(self) -> pd.DataFrame:
        t = self.theta_draws()
        return pd.DataFrame({"mean": t.mean(0), "sd": t.std(0, ddof=1)}, index=list(self.structure.names))


def approximate_fit(spec: Spec, panel, *, draws: int = 500, chains: int = 2, seed: int = 1) -> ApproxFit:
    """Fit ``spec`` by ML and draw from the normal approximation of the posterior."""
    import arviz as az

    structure = structure_for(spec, panel)
    ml = fit_ml(spec, panel, starts=2, seed=seed, check=False)  # speed: tests fit identified models
    mode = ml.params.to_numpy()
    f = loglik_function(structure)
    H = hessian(f, mode, pattern_arrays(panel.patterns()))
    cov = np.linalg.inv(-H)
    cov = 0.5 * (cov + cov.T)
    rng = np.random.default_rng(seed)
    need = draws * chains
    kept: list[np.ndarray] = []
    while len(kept) < need:
        cand = rng.multivariate_normal(mode, cov, size=need)
        ok = [all(np.linalg.eigvalsh(b.matrix(t)).min() > 0 for b in structure.blocks) for t in cand]
        kept.extend(cand[np.array(ok, dtype=bool)])
    thetas = np.array(kept[:need])
    ll = unit_loglik(structure, panel, thetas)
    posterior = {n: thetas[:, j].reshape(chains, draws) for j, n in enumerate(structure.names)}
    idata = az.from_dict(
        posterior=posterior,
        log_likelihood={"y": ll.reshape(chains, draws, -1)},
        coords={UNIT: list(panel.units)},
        dims={"y": [UNIT]},
    )
    return ApproxFit(spec=spec, panel=panel, structure=structure, seed=seed, idata=idata, ml=ml)
