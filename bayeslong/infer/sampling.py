"""Bayesian fitting with NUTS: sampling, per-unit log-likelihood, diagnostics, save/load.

:func:`fit` builds the model of :mod:`bayeslong.build` (marginal likelihood, no
person-level latents), samples it with NUTS, adds one log-likelihood term per unit for
every draw, checks convergence and returns a :class:`Fit`.

Compile once per machine (docs/engine.md): the default sampler runs one numba log density
for every structure, loaded from numba's disk cache (:mod:`bayeslong.infer.generic_logp`).
The PyMC paths compile once per model structure: that compiled sampler is cached by the
structure and the prior families, and a refit with another dataset of the same design or
other prior values only swaps the model's data inputs.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from bayeslong.arguments import acceptance_rate, seed_value, whole_number
from bayeslong.dims import UNIT, WAVE
from bayeslong.errors import SpecError
from bayeslong.infer import pooling as pool_terms
from bayeslong.infer.diagnostics import (  # noqa: F401  (their home before; imported from here)
    EBFMI_MIN,
    ESS_PER_CHAIN,
    RHAT_MAX,
    diagnose,
    flagged,
    warn_convergence,
)
from bayeslong.infer.priors import PriorSet, resolve_priors
from bayeslong.infer.progress import PymcCounter, SamplingProgress, run_nutpie
from bayeslong.model.spec import Spec
from bayeslong.model.structure import Structure, structure_for

#: Sampler names accepted by :func:`fit`: ``generic`` is nutpie on the generic kernel
#: compiled once per machine (:mod:`bayeslong.infer.generic_logp`), ``nutpie`` nutpie on
#: the PyMC model's graph compiled per structure, ``pymc`` PyMC's NUTS.
SAMPLERS = ("auto", "generic", "nutpie", "pymc")

#: Target acceptance rates: the first run's (nutpie's and PyMC's default), and the careful
#: re-run's after a first run that failed a convergence check (docs/engine.md).
FIRST_TARGET_ACCEPT = 0.8
CAREFUL_TARGET_ACCEPT = 0.95
#: The careful re-run keeps this many times the draws per chain (the ESS thresholds are
#: absolute: a posterior that mixes slowly but correctly needs more draws; docs/engine.md)
CAREFUL_DRAWS_FACTOR = 3

# --------------------------------------------------------------------------------------------
# the Fit object
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True, eq=False)
class Fit:
    """The result of :func:`fit`.

    Attributes
    ----------
    spec : Spec
    panel : Panel
    structure : Structure
    seed : int
    idata : arviz.InferenceData
        ``posterior``: one variable per parameter, named as in ``structure.names``, dims
        (chain, draw). ``log_likelihood``: variable ``y`` with dims (chain, draw, unit),
        the log density of each unit's observed outcomes given its covariates.
        ``sample_stats``, ``observed_data`` (outcomes, dims unit x wave) and
        ``constant_data`` (covariates).
    prior_set : PriorSet
    sampler : str
        The sampler that ran (``generic``, ``nutpie`` or ``pymc``).
    timing : dict
        Seconds spent compiling (0 when a cached compile was reused), sampling and
        computing the per-unit log-likelihood.
    """

    spec: Spec
    panel: object
    structure: Structure
    seed: int
    idata: object
    prior_set: PriorSet
    sampler: str = ""
    timing: dict = field(default_factory=dict)

    @property
    def target_accept(self) -> float | None:
        """The target acceptance rate of the run kept (None for a fit saved before it was recorded)."""
        value = self.idata.posterior.attrs.get("bayeslong_target_accept")
        return None if value is None else float(value)

    @property
    def rerun(self) -> str:
        """Why the fit was sampled a second time at a higher target acceptance ("" if not)."""
        return str(self.idata.posterior.attrs.get("bayeslong_rerun", "") or "")

    def theta_draws(self) -> np.ndarray:
        """Return the draws as an array (chains * draws, n_params) in ``structure.names`` order."""
        post = self.idata.posterior
        return np.stack([post[name].values.reshape(-1) for name in self.structure.names], axis=1)

    def priors(self) -> pd.DataFrame:
        """Return the prior table: family, arguments, what it is on, and default/user source."""
        return self.prior_set.table()

    def diagnostics(self) -> pd.DataFrame:
        """Return convergence diagnostics per parameter, with the sampler's run-level checks.

        Returns
        -------
        pandas.DataFrame
            Indexed by parameter: ``r_hat``, ``ess_bulk``, ``ess_tail`` (ArviZ, rank-normalised,
            Vehtari et al. 2021) and ``flag`` (the failed criteria, empty when none). The
            frame's ``attrs`` hold ``divergences`` (count after warm-up), ``ebfmi`` (one per
            chain), ``treedepth_share`` (share of draws that hit the maximum tree depth)
            and ``thresholds``.
        """
        return diagnose(self.idata, self.structure.names)

    def summary(self) -> pd.DataFrame:
        """Return posterior mean, SD, 90% interval, R-hat and ESS per parameter, flags marked."""
        import arviz as az

        table = az.summary(self.idata, var_names=list(self.structure.names), hdi_prob=0.9,
                           kind="stats")
        diag = self.diagnostics()
        table = table.join(diag[["r_hat", "ess_bulk", "ess_tail", "flag"]])
        table.index.name = "parameter"
        return table

    def save(self, path) -> Path:
        """Write the fit to a netCDF file; :func:`load_fit` reads it back.

        The spec, the priors (the user's overrides and the full table) and the panel's
        labels are stored as JSON in the attributes; the outcome and covariate arrays are
        in ``observed_data`` and ``constant_data``, so the panel is restored exactly.
        Prior factories (callables) cannot be stored; they are recorded by name.
        """
        path = Path(path)
        idata = self.idata.copy()
        idata.posterior.attrs.update(self.file_attrs())
        idata.to_netcdf(str(path), engine="h5netcdf")
        return path

    def file_attrs(self) -> dict:
        """What :meth:`save` stores beside the draws (JSON text and numbers)."""
        return {
            "bayeslong_spec": json.dumps(self.spec.to_dict()),
            "bayeslong_priors": json.dumps({k: list(v) for k, v in self.prior_set.user_spec().items()}),
            "bayeslong_prior_table": json.dumps(self.prior_set.to_dict()),
            "bayeslong_panel": json.dumps(_panel_labels(self.panel)),
            "bayeslong_seed": int(self.seed),
            "bayeslong_sampler": self.sampler,
        }

    def __repr__(self) -> str:
        post = self.idata.posterior
        return (f"Fit({self.spec}, sampler={self.sampler!r}, chains={post.sizes['chain']}, "
                f"draws={post.sizes['draw']}, n_units={self.panel.n_units})")


def _panel_labels(panel) -> dict:
    def plain(v):
        return v.item() if hasattr(v, "item") else v

    labels = {"units": [plain(u) for u in panel.units], "waves": [plain(w) for w in panel.waves],
              "outcomes": list(panel.outcomes), "time_varying": list(panel.time_varying),
              "time_invariant": list(panel.time_invariant)}
    if getattr(panel, "has_indicators", False):
        labels["indicators"] = {k: list(v) for k, v in panel.indicators.items()}
    if getattr(panel, "categories", None):
        labels["categories"] = {k: [plain(c) for c in v] for k, v in panel.categories.items()}
    return labels


def load_fit(path) -> Fit:
    """Read a fit written by :meth:`Fit.save`: the spec, the priors (user factories are not
    restorable: their rows fall back to the defaults, with a warning) and the panel.

    Raises
    ------
    SpecError
        The file was not written by :meth:`Fit.save`, or holds a fit with categorical
        variables (``bayeslong.load_fit``, infer/fitting.py, reads those).
    """
    return fit_from_file(*read_fit_file(path), path)


def fit_from_file(idata, attrs, spec, panel, path) -> Fit:
    """The :class:`Fit` of a file read by :func:`read_fit_file`."""
    if getattr(panel, "categories", None):
        raise SpecError(f"{str(path)!r} holds a fit with categorical variables; read it with "
                        "bl.load_fit, which rebuilds its thresholds")
    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel, stored_priors(attrs, path))
    return Fit(spec=spec, panel=panel, structure=structure, seed=int(attrs["bayeslong_seed"]),
               idata=idata, prior_set=prior_set, sampler=str(attrs.get("bayeslong_sampler", "")),
               timing={})


def read_fit_file(path):
    """``(idata, attrs, spec, panel)`` of a file written by :meth:`Fit.save`.

    The panel is rebuilt from the file's observed and constant data and the labels stored
    in its attributes (indicators and categories included).
    """
    import arviz as az

    from bayeslong.data import Panel

    path = Path(path)
    if not path.is_file():
        raise SpecError(f"no fit file at {str(path)!r}; give the path that Fit.save wrote")
    idata = az.from_netcdf(str(path), engine="h5netcdf")
    attrs = idata.posterior.attrs
    if "bayeslong_spec" not in attrs:
        raise SpecError(f"{str(path)!r} is a netCDF file without a bayeslong fit in it "
                        "(no spec in its attributes); write fits with Fit.save")
    spec = Spec.from_dict(json.loads(attrs["bayeslong_spec"]))
    labels = json.loads(attrs["bayeslong_panel"])
    obs = idata.observed_data
    indicators = labels.get("indicators")
    names = [n for g in indicators.values() for n in g] if indicators else labels["outcomes"]
    if not all(n in obs for n in names):  # a fit that stored one variable per process
        names, indicators = labels["outcomes"], None
    y = np.stack([obs[name].values for name in names], axis=-1)
    const = idata.constant_data if "constant_data" in idata.groups() else None
    n, t = y.shape[:2]
    x = (np.stack([const[name].values for name in labels["time_varying"]], axis=-1)
         if labels["time_varying"] else np.empty((n, t, 0)))
    z = (np.stack([const[name].values for name in labels["time_invariant"]], axis=-1)
         if labels["time_invariant"] else np.empty((n, 0)))
    categories = {k: tuple(v) for k, v in labels.get("categories", {}).items()} or None
    panel = Panel(units=tuple(labels["units"]), waves=tuple(labels["waves"]),
                  outcomes=tuple(labels["outcomes"]), time_varying=tuple(labels["time_varying"]),
                  time_invariant=tuple(labels["time_invariant"]), y=y, x=x, z=z,
                  indicators=indicators, categories=categories)
    return idata, attrs, spec, panel


def stored_priors(attrs, path) -> dict:
    """The user's prior overrides stored by :meth:`Fit.save` (warns about lost factories)."""
    user = {k: tuple(v) for k, v in json.loads(attrs["bayeslong_priors"]).items()}
    table = json.loads(attrs["bayeslong_prior_table"])
    if not any(v["family"] == pool_terms.FAMILY for v in table.values()):
        # saved before the pooling of residual log-SDs was a default (or without it): keep
        # the prior the fit was made under; a model without pooled variances ignores this
        user.setdefault(pool_terms.POOLING_KEY, ("off",))
    lost = [k for k, v in table.items() if v["family"] == "callable"]
    if lost:
        warnings.warn(f"the fit in {str(path)!r} used prior factories for {', '.join(lost)}; "
                      "factories are not stored, so the prior table shows the defaults there",
                      UserWarning, stacklevel=3)
    return user


def unit_loglik(structure: Structure, panel, theta: np.ndarray, *, chunk: int | None = None) -> np.ndarray:
    """Log density of each unit's observed outcomes at each draw, shape (S, N).

    Parameters
    ----------
    structure : Structure
    panel : Panel
    theta : (S, n_params) array of draws
    chunk : int, optional
        Draws per batch; by default as many as keep each intermediate (chunk x N x Y)
        near 5 million numbers (40 MB).

    Notes
    -----
    The implied moments (c, D, Sigma) of every draw come from the one moment formula
    (:func:`bayeslong.moments.implied_moments`, NumPy backend, vectorised over draws).
    Units are grouped by missing-data pattern. For the observed entries o of a pattern, the
    trace form of the likelihood with one unit per "pattern" (u_i = (1, w_i, y_io),
    A = [-c_o, -D_o, I], W = Sigma_oo^-1):

        log p(y_io | w_i) = -1/2 (q log 2 pi + log det Sigma_oo) - 1/2 u_i' (A' W A) u_i,

    so for all units and draws at once the quadratic forms are one matrix product of the
    units' u_i u_i' with the draws' A' W A (upper triangles, off-diagonal terms doubled). This is
    :func:`bayeslong.likelihood.pattern_values` on :func:`~bayeslong.likelihood.unit_cross`,
    batched; the tests check both against ``scipy.stats.multivariate_normal``. Measured at
    N = 10,000 and 1,000 draws: 2.7 s with a stacked Cholesky solve per unit and draw.
    """
    from bayeslong.infer.likelihood import LOG_2PI
    from bayeslong.model.moments import NUMPY, implied_moments

    theta = np.atleast_2d(np.asarray(theta, dtype=float))
    ys = panel.outcome_matrix()
    w = panel.covariate_matrix()
    patterns = panel.patterns()
    if chunk is None:
        chunk = max(1, int(5e6 // panel.n_units))
    out = np.empty((len(theta), panel.n_units))
    groups = []
    for p in range(patterns.n_patterns):
        units = np.flatnonzero(patterns.unit_pattern == p)
        o = patterns.masks[p].astype(bool)
        u = np.concatenate([np.ones((len(units), 1)), w[units], ys[units][:, o]], axis=1)
        rows, cols = np.triu_indices(u.shape[1])  # symmetric: the upper triangle suffices
        units = slice(units[0], units[-1] + 1) if np.all(np.diff(units) == 1) else units
        groups.append((units, o, rows, cols, u[:, rows] * u[:, cols]))
    for start in range(0, len(theta), chunk):
        c, D, Sigma = implied_moments(structure, theta[start:start + chunk], NUMPY)
        S = len(c)
        for units, o, rows, cols, uu in groups:
            q = int(o.sum())
            chol = np.linalg.cholesky(Sigma[:, o][:, :, o])
            logdet = 2.0 * np.sum(np.log(np.diagonal(chol, axis1=1, axis2=2)), axis=1)
            Linv = np.linalg.inv(chol)
            A = np.concatenate([-c[:, o, None], -D[:, o, :], np.broadcast_to(np.eye(q), (S, q, q))],
                               axis=2)  # (S, q, U)
            LA = Linv @ A
            quad = np.swapaxes(LA, 1, 2) @ LA  # A' W A, (S, U, U)
            packed = quad[:, rows, cols] * np.where(rows == cols, -0.5, -1.0)
            const = (-0.5 * (q * LOG_2PI + logdet))[:, None]
            if isinstance(units, slice):  # write in place: no (draws x units) temporaries
                view = out[start:start + chunk, units]
                np.matmul(packed, uu.T, out=view)  # -1/2 of each unit's quadratic form
                view += const
            else:
                out[start:start + chunk, units] = packed @ uu.T + const
    return out


# --------------------------------------------------------------------------------------------
# sampling
# --------------------------------------------------------------------------------------------
@contextlib.contextmanager
def _one_thread():
    """One BLAS/OpenMP thread here and in every worker started inside (docs/engine.md).

    Environment variables reach worker processes started afresh; threadpoolctl limits the
    libraries already loaded in this process (and forked workers inherit that).
    """
    from bayeslong.threads import THREAD_VARS, single_thread

    saved = {k: os.environ.get(k) for k in THREAD_VARS}
    os.environ.update({k: "1" for k in THREAD_VARS})
    try:
        with single_thread():
            yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _nutpie_available() -> bool:
    from importlib.util import find_spec

    return find_spec("nutpie") is not None


def _choose(sampler: str, prior_set: PriorSet | None = None) -> str:
    if sampler not in SAMPLERS:
        raise SpecError(f"`sampler` must be one of {', '.join(SAMPLERS)}; got {sampler!r}")
    factory = prior_set is not None and prior_set.has_callable
    if sampler == "auto":
        # the generic kernel when every prior has an array form (docs/engine.md, "Compile
        # once per machine"); a prior given as a PyMC factory needs the PyMC model
        if not _nutpie_available():
            return "pymc"
        return "nutpie" if factory else "generic"
    if sampler == "generic" and factory:
        raise SpecError("sampler='generic' cannot take a prior given as a PyMC factory; "
                        "use sampler='nutpie' or 'pymc', or give the prior as (family, *args)")
    if sampler in ("nutpie", "generic") and not _nutpie_available():
        raise SpecError(f"sampler={sampler!r} needs the nutpie package; install it with "
                        "`pip install nutpie` (or `pip install bayeslong[fast]`), or use sampler='pymc'")
    return sampler


#: Cache of built models and compiled samplers: (structure, prior families) -> entry.
_COMPILED: dict = {}


def _start_point(model, structure, panel, prior_set, seed: int = 0) -> dict:
    """Start values on the model's variables from :func:`bayeslong.model.start.sampler_start`.

    Variances start at the start values, correlations at 0.
    """
    from bayeslong.infer.priors import lkj_name, lkj_sd_name
    from bayeslong.model.start import sampler_start

    theta = sampler_start(structure, panel, seed)
    sd = np.sqrt(np.maximum(theta, 1e-6))
    in_lkj = set()
    point = {}
    for b in prior_set.blocks:
        diag = [int(i) for i in np.diag(structure.blocks[b].index)]
        in_lkj.update(diag)
        q = len(diag)
        point[lkj_sd_name(prior_set, b)] = sd[diag[:1]] if len(set(diag)) == 1 else sd[diag]
        point[lkj_name(prior_set, b)] = np.zeros(q * (q - 1) // 2)
    for i, p in enumerate(prior_set.priors):
        if p.factory is not None or i in in_lkj:
            continue
        if p.target == "value":
            point[p.rv_name] = float(theta[i])
        elif p.target == "sd":
            point[p.rv_name] = float(sd[i])
    return point


def _entry(spec, panel, structure, prior_set):
    from bayeslong.infer.pymc_model import build_model

    key = None if prior_set.has_callable else (structure, prior_set.key)
    if key is not None and key in _COMPILED:
        return _COMPILED[key], False
    entry = {"model": build_model(spec, panel, prior_set)}
    if key is not None:
        _COMPILED[key] = entry
    return entry, True


def _sample_nutpie(entry, inputs, start, *, draws, tune, chains, cores, seed, progressbar, names,
                   target_accept):
    import nutpie
    from pymc.initial_point import make_initial_point_fn

    report = progressbar if callable(progressbar) else None
    compile_s = 0.0
    if "nutpie" not in entry:
        if report is not None:
            report(SamplingProgress(stage="compiling", sampler="nutpie"))
        t0 = time.perf_counter()
        # explicit start values for every variable: without them the initial-point function
        # draws from the LKJ block's SD distribution, which fails in nutpie 0.16
        entry["nutpie"] = nutpie.compile_pymc_model(entry["model"], backend="numba",
                                                    var_names=list(names), jitter_rvs=set(),
                                                    initial_points=start)
        compile_s = time.perf_counter() - t0
    model = entry["model"]
    ip = make_initial_point_fn(model=model, overrides=start, jitter_rvs=set(),
                               return_transformed=True)(0)
    init = np.concatenate([np.asarray(ip[model.rvs_to_values[rv].name], dtype=float).ravel()
                           for rv in model.free_RVs])
    # nutpie keeps the start values given at compile time inside the compiled model (its
    # initial-point function) and ignores init_mean for PyMC models, so a compiled model
    # reused for another panel or other priors would start every chain at the first fit's
    # point; this fit's own start replaces it
    compiled = dataclasses.replace(entry["nutpie"].with_data(**inputs),
                                   initial_point_func=lambda seed: init.copy())
    t0 = time.perf_counter()
    idata = run_nutpie(compiled, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed,
                       init_mean=init, progressbar=progressbar, target_accept=target_accept)
    return idata, compile_s, time.perf_counter() - t0


def _sample_pymc(entry, inputs, start, *, draws, tune, chains, cores, seed, progressbar, names,
                 target_accept):
    import pymc as pm

    model = entry["model"]
    t0 = time.perf_counter()
    # Chains run in this process, one after the other: PyMC's worker processes send each
    # draw's statistics through a pipe, and when a log-density evaluation fails at a wild
    # warm-up point (recorded as a divergence) the stored exception holds PyTensor nodes
    # that cannot be pickled, which ended whole fits ("Can't pickle local object").
    counter = None
    if callable(progressbar):  # draws per chain for the caller (infer/progress.py)
        progressbar(SamplingProgress(stage="compiling", sampler="pymc"))
        counter = PymcCounter(chains, draws + tune, progressbar)
    with model:
        pm.set_data(inputs)
        idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=1, random_seed=seed,
                          initvals=start, progressbar=progressbar is True, var_names=list(names),
                          compute_convergence_checks=False, return_inferencedata=True,
                          callback=counter, target_accept=target_accept)
    if counter is not None:
        counter.finish()
    return idata, 0.0, time.perf_counter() - t0


def fit(spec: Spec, panel, *, draws: int = 1000, tune: int = 1000, chains: int = 4, seed: int = 1,
        priors: dict | None = None, sampler: str = "auto", progressbar=True,
        cores: int | None = None, target_accept: float | None = None) -> Fit:
    """Fit ``spec`` to ``panel`` by NUTS on the marginal likelihood.

    Parameters
    ----------
    spec : Spec
    panel : Panel
    draws, tune : int, default 1000
        Draws kept and warm-up iterations per chain.
    chains : int, default 4
    seed : int, default 1
    priors : dict, optional
        Overrides by parameter name (see :func:`bayeslong.priors.resolve_priors`).
    sampler : {"auto", "generic", "nutpie", "pymc"}
        ``generic``: nutpie on the generic log density, one numba kernel for every model
        structure, compiled once per machine and loaded from numba's disk cache
        (:mod:`bayeslong.infer.generic_logp`; docs/engine.md, "Compile once per machine").
        ``nutpie``: nutpie on the PyMC model's graph, compiled by numba per structure
        (20-50 s with numba's cache warm, minutes with it empty). ``pymc``: PyMC's NUTS.
        ``auto`` is ``generic`` when nutpie is installed and no prior is a PyMC factory,
        ``nutpie`` when one is, PyMC's NUTS without nutpie. Measured with
        ``bench/first_fit.py`` (alt, N = 120, T = 5, 4 chains x 1000 draws, fresh process,
        2-core machine under load) and ``bench/sampler_speed.py``: see docs/engine.md.
        If nutpie cannot start, the fit goes on with PyMC's NUTS (with a warning).
    progressbar : bool or callable, default True
        ``True`` shows the sampler's own progress bar, ``False`` nothing. A callable
        receives a :class:`bayeslong.infer.progress.SamplingProgress` when compilation
        starts, about twice a second while sampling (iterations done per chain, tuning
        included) and when sampling ends; ``bayeslong run`` passes one that writes to stderr.
    cores : int, optional
        Chains run in parallel (default: min(chains, CPU count)); each uses one BLAS thread.
    target_accept : float, optional
        The sampler's target acceptance rate (0 < value < 1). By default the fit samples at
        0.8 and, when that run fails a convergence check, samples once more at 0.95 with
        three times the draws per chain (``CAREFUL_DRAWS_FACTOR``) and keeps that run (a smaller
        step follows curved or narrow posteriors that the first run could not, and the
        extra draws reach the absolute ESS thresholds where mixing is slow; docs/engine.md,
        "The careful re-run"). A re-run fit so has 3 x ``draws`` draws per chain. A value given here is used
        as it is, without a re-run. ``Fit.target_accept`` and ``Fit.rerun`` say what ran.

    Returns
    -------
    Fit

    Raises
    ------
    SpecError
        Invalid priors, sampler or sizes.

    Warns
    -----
    ConvergenceWarning
        R-hat >= 1.01, bulk or tail ESS <= 100 per chain, divergences, or E-BFMI < 0.3;
        the message names the parameters and thresholds.

    Notes
    -----
    Chains start at the data-based start values of :func:`bayeslong.model.start.start_values`
    (correlations at 0). After sampling, ``idata.log_likelihood["y"]`` holds
    :func:`unit_loglik` for every draw: the same pattern log-likelihood with one pattern per
    unit.

    References
    ----------
    Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., & Bürkner, P.-C. (2021).
    Rank-normalization, folding, and localization: an improved R-hat for assessing
    convergence of MCMC. Bayesian Analysis 16(2), 667-718. doi:10.1214/20-BA1221
    Betancourt, M. (2016). Diagnosing suboptimal cotangent disintegrations in Hamiltonian
    Monte Carlo. arXiv:1604.00695
    """
    for label, value, low in (("draws", draws, 1), ("tune", tune, 0), ("chains", chains, 1)):
        whole_number(value, label, least=low, where="fit")
    seed_value(seed, where="fit")
    acceptance_rate(target_accept, where="fit",
                    left_out=f"{FIRST_TARGET_ACCEPT} with a careful re-run at "
                             f"{CAREFUL_TARGET_ACCEPT} when needed")
    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel, priors)
    which = _choose(sampler, prior_set)
    cores = min(int(chains), os.cpu_count() or 1) if cores is None else int(cores)
    settings = dict(draws=int(draws), tune=int(tune), chains=int(chains), cores=cores,
                    seed=int(seed), progressbar=progressbar, names=structure.names)
    state = {}

    def pymc_entry():
        # the PyMC model and its inputs, built on first need (the generic path needs neither)
        if not state:
            from bayeslong.infer.pymc_model import model_inputs

            t0 = time.perf_counter()
            state["entry"], _ = _entry(spec, panel, structure, prior_set)
            state["build"] = time.perf_counter() - t0
            state["inputs"] = model_inputs(panel, prior_set)
            state["start"] = _start_point(state["entry"]["model"], structure, panel, prior_set,
                                          seed=int(seed))
        return state["entry"], state["inputs"], state["start"]

    def run(which, accept):
        if which == "generic":
            from bayeslong.infer.generic_logp import sample as sample_generic

            return sample_generic(structure, prior_set, panel, **settings, target_accept=accept)
        run = _sample_nutpie if which == "nutpie" else _sample_pymc
        return run(*pymc_entry(), **settings, target_accept=accept)

    accept = FIRST_TARGET_ACCEPT if target_accept is None else float(target_accept)
    rerun = ""
    with _one_thread(), warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=RuntimeWarning)
        warnings.filterwarnings("ignore", category=FutureWarning)
        try:
            raw, compile_s, sample_s = run(which, accept)
        except RuntimeError as err:
            # nutpie 0.16 sometimes rejects a start point whose log density and gradient
            # are finite (seen on a 40-unit ALT panel, "bad initial gradient"); PyMC's NUTS
            # samples the same model from the same start, so the fit goes on with it
            if which not in ("nutpie", "generic") or "initializ" not in str(err):
                raise
            warnings.warn(f"model '{spec.name}': nutpie could not start ({str(err).splitlines()[0]}); "
                          "sampling with PyMC's NUTS instead", UserWarning, stacklevel=2)
            which = "pymc"
            raw, compile_s, sample_s = run(which, accept)
        if target_accept is None:
            problems = flagged(diagnose(raw, structure.names))
            if problems:  # docs/engine.md, "The careful re-run"
                more = CAREFUL_DRAWS_FACTOR * settings["draws"]
                rerun = (f"the run at target_accept {accept} failed the convergence checks "
                         f"({problems}); sampled again at {CAREFUL_TARGET_ACCEPT} with {more} "
                         "draws per chain")
                accept = CAREFUL_TARGET_ACCEPT
                settings["draws"] = more
                raw, more_compile, more_sample = run(which, accept)
                compile_s, sample_s = compile_s + more_compile, sample_s + more_sample
    build_s = state.get("build", 0.0)
    t0 = time.perf_counter()
    with _one_thread():  # tiny batched matrices: BLAS threads only cost here
        idata = _tidy(raw, structure, panel, prior_set)
    loglik_s = time.perf_counter() - t0
    idata.posterior.attrs.update({"bayeslong_target_accept": accept, "bayeslong_rerun": rerun})
    result = Fit(spec=spec, panel=panel, structure=structure, seed=int(seed), idata=idata,
                 prior_set=prior_set, sampler=which,
                 timing={"build": build_s, "compile": compile_s, "sample": sample_s,
                         "loglik": loglik_s})
    warn_convergence(result.diagnostics())
    return result


def _tidy(raw, structure: Structure, panel, prior_set) -> object:
    """Keep the parameters, add log_likelihood, observed_data and constant_data."""
    import xarray as xr

    post = raw.posterior[list(structure.names)]
    post = post.drop_vars([c for c in post.coords if c not in ("chain", "draw")])
    post.attrs = dict(raw.posterior.attrs)
    theta = np.stack([post[n].values for n in structure.names], axis=-1)
    nc, nd = theta.shape[:2]
    ll = unit_loglik(structure, panel, theta.reshape(nc * nd, -1)).reshape(nc, nd, panel.n_units)
    units = list(panel.units)
    loglik = xr.Dataset({"y": (("chain", "draw", UNIT), ll)},
                        coords={"chain": post.chain.values, "draw": post.draw.values, UNIT: units})
    return inference_data(raw, post, loglik, panel, panel.observed_names)


def inference_data(raw, post, loglik, panel, observed_names):
    """The fit's InferenceData: posterior, per-unit log-likelihood, the sampler's statistics,
    the observed variables (``observed_names``, in the order of ``panel.y``'s last axis) and
    the covariates, all on the dims unit and wave."""
    import arviz as az
    import xarray as xr

    units, waves = list(panel.units), list(panel.waves)
    obs = xr.Dataset({name: ((UNIT, WAVE), panel.y[:, :, k]) for k, name in enumerate(observed_names)},
                     coords={UNIT: units, WAVE: waves})
    const = {name: ((UNIT, WAVE), panel.x[:, :, j]) for j, name in enumerate(panel.time_varying)}
    const.update({name: ((UNIT,), panel.z[:, j]) for j, name in enumerate(panel.time_invariant)})
    groups = {"posterior": post, "log_likelihood": loglik, "observed_data": obs}
    if "sample_stats" in raw.groups():
        groups["sample_stats"] = raw.sample_stats
    if const:
        groups["constant_data"] = xr.Dataset(const, coords={UNIT: units, WAVE: waves})
    return az.InferenceData(**groups)
