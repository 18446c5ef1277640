"""How much of a reported lag comes from the prior, the first wave, the model and the sample size.

:func:`lag_sensitivity` refits one panel along four axes and tabulates the lag (the
carry-over effect) for each setting:

- **prior**: a grid of lag priors and of scales of the variance priors;
- **first wave**: ``initial="predetermined"`` against ``"endogenous"`` for every model that
  allows both (same likelihood maximum for the classic hybrid model, possibly different
  posteriors under priors in small samples, docs/model-family.md);
- **specification**: the lag across every catalog model that has one (for the dual change
  model the lag is 1 + proportional_change, its coefficient of the previous wave);
- **deviation SD**: for a default model with approximate invariance of its indicators
  (``invariance="approximate"``), refits with several SDs of the per-wave deviations'
  prior, from nearly exact (scalar) invariance to nearly free (configural) loadings and
  intercepts (Muthén & Asparouhov 2012; docs/model-family.md, "Approximate invariance");
- **power-scaling**: prior and likelihood power-scaling sensitivity of every parameter of
  the default fit, without refitting (Kallioinen et al. 2024).

:func:`plan` simulates replications of a design at several sample sizes and reports how
well the lag is recovered (bias, posterior SD, interval coverage, power).

On a panel with categorical variables every refit is a categorical fit (``bl.fit``); the
specification axis fits only the models that the categories identify (:func:`bayeslong.identify`;
the others are skipped with its reason, :data:`CATEGORICAL_SKIPS`), the first-wave axis
refits the first model only, and power-scaling is computed on the draws that carry the
marginal log-likelihood (:func:`power_scaling`; docs/comparison.md, "Lag sensitivity with
categorical variables").

Fits run through :func:`bayeslong.batch.run_many`: in this process by default for
:func:`lag_sensitivity` (refits of one structure reuse its compiled model), in a local
process pool by default for :func:`plan`, or on any executor given (e.g. a Dask cluster's).

References
----------
Muthén, B. & Asparouhov, T. (2012). Bayesian structural equation modeling: a more flexible
representation of substantive theory. Psychological Methods 17(3), 313-335.
doi:10.1037/a0026802
Kallioinen, N., Paananen, T., Bürkner, P.-C., & Vehtari, A. (2024). Detecting and diagnosing
prior and likelihood sensitivity with power-scaling. Statistics and Computing 34, 57.
doi:10.1007/s11222-023-10366-5
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from bayeslong.data.panel import check_panel
from bayeslong.errors import SpecError
# log_prior_draws and power_scaling are re-exported: they were this module's public names
from bayeslong.evaluate.power_scaling import (  # noqa: F401
    PSENS_THRESHOLD,
    log_prior_draws,
    power_scaling,
    power_scaling_summary,
)
from bayeslong.infer.batch import (
    BatchResult,
    SerialExecutor,
    Task,
    TaskResult,
    run_many,
    summarise_draws,
)
from bayeslong.infer.pooling import POOLING_KEY, residual_groups
from bayeslong.model.spec import Spec, catalog, check_spec, model
from bayeslong.model.structure import structure_for

#: Default grid of lag priors: tight at 0, the default width, off-centre, and flat-ish.
LAG_PRIORS = (("normal", 0.0, 0.1), ("normal", 0.0, 0.5), ("normal", 0.5, 0.2),
              ("normal", 0.0, 10.0))

#: Default factors applied to the scale of every standard-deviation prior.
VARIANCE_SCALES = (0.5, 2.0)

#: Default SDs of the per-wave deviations' prior for the deviation-SD axis (approximate
#: invariance): a tenth, twice and five times the default 0.05 (model/spec.py, DEVIATION_SD),
#: and 1, which leaves loadings and intercepts nearly free by wave.
DEVIATION_SDS = (0.005, 0.1, 0.25, 1.0)

#: Why a setting is not run on a panel with categorical variables (docs/comparison.md, "Lag
#: sensitivity with categorical variables"): a model of the specification axis that the
#: categories do not identify (:func:`bayeslong.identify`) is not fitted.
CATEGORICAL_SKIPS = {
    "specification": "not run for model '{model}': it is not identified with these categorical "
                     "variables (bl.identify: rank {rank} of {n_params} parameters; not "
                     "separable: {deficient}). {advice}",
}

#: Axes of the sensitivity table, in display order.
AXES = ("default", "prior", "deviation SD", "first wave", "specification", "power-scaling")


# --- the lag of a model ----------------------------------------------------------------------
def lag_parameter(spec: Spec, outcomes) -> str | None:
    """Name of the model's (auto)regression parameter of the first outcome, or None.

    ``lag`` for one process, ``lag[y<-y]`` for two; ``proportional_change`` for the dual
    change model. None when the model has no constant lag.
    """
    if spec.options["lag"] != "constant":
        return None
    outcomes = tuple(outcomes)
    return spec.lag_name if spec.processes == 1 else f"{spec.lag_name}[{outcomes[0]}<-{outcomes[0]}]"


def lag_models(panel) -> list[str]:
    """Catalog models with a constant lag for the panel's number of outcomes (``alt`` first).

    A model written for several processes serves any K >= 2 (:func:`catalog_spec`).
    """
    K = len(panel.outcomes)
    names = [n for n in catalog() if (model(n).processes == K or model(n).processes >= 2 <= K)
             and model(n).options["lag"] == "constant"]
    first = "alt" if len(panel.outcomes) == 1 else "bivariate-alt"
    return sorted(names, key=lambda n: (n != first, n))


def catalog_spec(name: str, panel):
    """``model(name)``, given the panel's number of processes when it is written for several."""
    spec = model(name)
    K = len(panel.outcomes)
    return spec if spec.processes == K or spec.processes < 2 or K < 2 else model(name, processes=K)


# --- priors --------------------------------------------------------------------------------
def _prior_label(prior) -> str:
    family, *args = prior
    return f"{family}({', '.join(f'{a:g}' for a in args)})"


def scaled_variance_priors(spec: Spec, panel, factor: float, priors: dict | None = None) -> dict:
    """Prior overrides that multiply the scale of every standard-deviation prior by ``factor``.

    Variances have their priors on their standard deviations (see :mod:`bayeslong.priors`);
    scaling an SD prior by f scales the implied variance prior by f^2. On a panel with
    categorical variables the priors are the categorical fit's (its latent scale, without
    the variances it fixes); the thresholds' gap priors are not SD priors and stay as given. Location-free
    families scale their scale argument (halfnormal sigma, halfstudent_t sigma, exponential
    1/lam, gamma 1/beta, uniform both bounds); lognormal shifts mu by log f.
    """
    prior_set, pinned = _prior_set_for(spec, panel, priors)
    out = dict(priors or {})
    f = float(factor)
    for p in prior_set.priors:
        if p.target != "sd" or p.family == "callable" or p.parameter in pinned:
            continue
        rule = {"halfnormal": lambda a: (a[0] * f,), "halfstudent_t": lambda a: (a[0], a[1] * f),
                "exponential": lambda a: (a[0] / f,), "gamma": lambda a: (a[0], a[1] / f),
                "uniform": lambda a: (a[0] * f, a[1] * f),
                "lognormal": lambda a: (a[0] + float(np.log(f)), a[1])}[p.family]
        out[p.parameter] = (p.family, *rule(p.args))
    return out


def _has_categories(panel) -> bool:
    """Whether the panel has a categorical (binary or ordinal) variable."""
    return bool(getattr(panel, "categories", None))


def _prior_set_for(spec: Spec, panel, priors: dict | None):
    """``(PriorSet, fixed parameters)`` of a fit of ``spec`` to ``panel`` under ``priors``."""
    if _has_categories(panel):
        from bayeslong.infer.categorical import categorical_priors
        from bayeslong.model.thresholds import categorical_structure

        cat = categorical_structure(spec, panel)
        return categorical_priors(cat, panel, priors)[0], dict(cat.pinned)
    from bayeslong.infer.priors import resolve_priors

    return resolve_priors(structure_for(spec, panel), panel, priors), {}


def _prior_names(spec: Spec, panel) -> tuple[str, ...]:
    """Names a prior override may give for ``spec`` on ``panel``: with categorical variables
    the parameters the categorical model estimates and its thresholds, not those it fixes
    (``categorical.names``; the categorical fit refuses a prior for a fixed parameter)."""
    if _has_categories(panel):
        from bayeslong.model.thresholds import categorical_structure

        return tuple(categorical_structure(spec, panel).names)
    structure = structure_for(spec, panel)
    # the pooling's scale, where the model has residual variances to pool (infer/pooling.py)
    pooled = (POOLING_KEY,) if residual_groups(structure) else ()
    return tuple(structure.names) + pooled


# --- the sensitivity table -------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True, eq=False)
class LagSensitivity:
    """Result of :func:`lag_sensitivity`.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per axis and setting: ``axis``, ``setting``, ``model``, ``parameter`` (the
        model's lag parameter), ``mean``, ``sd``, ``q5``, ``q95`` of the lag (for dual
        change: of 1 + proportional_change), ``shift`` (mean minus the default fit's, in
        units of the default fit's posterior SD), ``sign_change`` (the 90% interval lies on
        another side of zero than the default's: above, below, or across), ``flag``
        (sign change or |shift| > 1) and, on the power-scaling rows, ``psens`` and
        ``diagnosis``.
    power_scaling : pandas.DataFrame
        Prior and likelihood sensitivity of every parameter of the default fit.
    failed : dict
        Error message of each fit that failed, by task name.
    warnings : dict
        Warnings (e.g. convergence) of each fit that raised any, by task name.
    reference : str
        The default fit's model.
    reused : tuple of str
        Settings (task names) read from fits given to :func:`lag_sensitivity` instead of
        refitted.
    skipped : dict
        Settings asked for but not run, with the reason: on a panel with categorical
        variables, ``"specification: <model>"`` for each model the categories do not
        identify.
    """

    table: pd.DataFrame
    power_scaling: pd.DataFrame = field(default_factory=pd.DataFrame)
    failed: dict = field(default_factory=dict)
    warnings: dict = field(default_factory=dict)
    reference: str = ""
    reused: tuple = ()
    skipped: dict = field(default_factory=dict)

    def plot(self, ax=None):
        """Forest plot of the lag's 90% intervals by axis and setting; returns the figure.

        Flagged rows are drawn in red; the dashed line is the default fit's mean, the
        dotted line zero.
        """
        import matplotlib.pyplot as plt

        rows = self.table[self.table["axis"] != "power-scaling"].reset_index(drop=True)
        if ax is None:
            fig, ax = plt.subplots(figsize=(7.0, 0.35 * len(rows) + 1.2))
        else:
            fig = ax.figure
        y = np.arange(len(rows))[::-1]
        colours = np.where(rows["flag"], "tab:red", "tab:blue")
        ax.hlines(y, rows["q5"], rows["q95"], colors=colours, lw=2)
        ax.scatter(rows["mean"], y, color=colours, zorder=3, s=18)
        ref = rows[rows["axis"] == "default"]
        if len(ref):
            ax.axvline(float(ref["mean"].iloc[0]), ls="--", color="grey", lw=1)
        ax.axvline(0.0, ls=":", color="black", lw=1)
        ax.set_yticks(y)
        ax.set_yticklabels([f"{a}: {s}" + ("" if s == m or a == "specification" else f" ({m})")
                            for a, s, m in zip(rows["axis"], rows["setting"], rows["model"])],
                           fontsize=8)
        ax.set_xlabel("lag: posterior mean and 90% interval")
        ax.set_title(f"Lag sensitivity (default fit: {self.reference})")
        fig.tight_layout()
        return fig


def _side(q5: float, q95: float) -> str:
    return "above" if q5 > 0 else ("below" if q95 < 0 else "across")


def lag_sensitivity(panel, *, models=None, prior_grid=None, variance_scales=None,
                    deviation_sds=None, initial: bool = True, specification: bool = True,
                    power_scaling: bool = True,  # noqa: F811 (the axis switch)
                    fit_kwargs: dict | None = None, executor=None,
                    progress: bool = False, priors: dict | None = None,
                    fits=None) -> LagSensitivity:
    """Refit ``panel`` along four (five) axes and tabulate the lag for each setting.

    Parameters
    ----------
    panel : Panel
    models : sequence of str or Spec, optional
        Models with a constant lag; the first is the default fit (prior grid and
        power-scaling). Default: every catalog model with one for the panel's number of
        outcomes, ``alt`` first (:func:`lag_models`).
    prior_grid : sequence of tuples or False, optional
        Lag priors ``(family, *args)`` to refit the default model under; default
        :data:`LAG_PRIORS`. ``False`` (with ``variance_scales=False``) skips the prior axis.
    variance_scales : sequence of float or False, optional
        Factors for the scale of every standard-deviation prior; default
        :data:`VARIANCE_SCALES`.
    deviation_sds : sequence of float or False, optional
        SDs of the per-wave deviations' prior (``deviation_sd``, the same for loadings and
        intercepts) to refit the default model with; only for a default model with
        ``invariance="approximate"`` on a panel with several indicators per process, where
        the default is :data:`DEVIATION_SDS`. ``False`` skips the axis.
    initial : bool, default True
        Refit every model that allows both first-wave treatments with the other one.
    specification : bool, default True
        Fit every model in ``models``.
    power_scaling : bool, default True
        Power-scaling sensitivity of the default fit (no refits).
    fit_kwargs : dict, optional
        Passed to :func:`bayeslong.fit` (``draws``, ``tune``, ``chains``, ``seed`` ...);
        every fit uses the same.
    executor : concurrent.futures.Executor, optional
        Where the fits run (through :func:`bayeslong.batch.run_many`); default this process,
        one after another, so refits of one structure reuse its compiled model.
    progress : bool, default False
        One line per finished fit on stderr.
    priors : dict, optional
        Prior overrides by parameter name that every setting starts from (each model takes
        the ones naming its parameters); the prior axis changes the lag's prior, or scales
        the SD priors, on top of them. Default: the documented default priors.
    fits : sequence of Fit, optional
        Fits already made, e.g. a study's candidate fits. A setting whose model, priors and
        data equal a given fit's, and whose ``fit_kwargs`` seed, chains and draws match it,
        is read from that fit instead of refitted (the caller vouches for ``tune`` and the
        sampler, which a fit does not record). Power-scaling needs no refit either.

    Returns
    -------
    LagSensitivity
        ``.table`` (tidy), ``.plot()``, ``.power_scaling``, ``.failed``, ``.reused``.

    Raises
    ------
    SpecError
        A model has no constant lag, the default fit failed (its error is shown), or
        ``deviation_sds`` is given for a default model without approximate invariance.

    Notes
    -----
    With categorical variables in ``panel`` every fit is a categorical fit. The
    specification axis first checks each model after the first with :func:`bayeslong.identify`
    on the panel's categories: an identified model is fitted, one that is not is recorded in
    ``.skipped`` under ``"specification: <model>"`` with identify's reason. The first-wave
    axis refits the first model only. Power-scaling runs on the draws of the default fit
    that carry the marginal log-likelihood (at most ``loglik_draws``, thinned evenly;
    ``.power_scaling.attrs["draws"]``), with the whole prior including the thresholds' gap
    priors (:func:`power_scaling`). The first model is fitted as given: its identification
    is the caller's to check (a study checks every candidate before it fits it).

    A row is flagged when its 90% interval lies on another side of zero than the default
    fit's (above, below, or across zero), or its mean moves by more than one posterior SD
    of the default fit. Power-scaling rows are flagged when the sensitivity reaches
    :data:`PSENS_THRESHOLD`.

    Examples
    --------
    >>> result = bl.lag_sensitivity(panel, models=["alt", "ar"],
    ...                             fit_kwargs={"draws": 500, "chains": 2})  # doctest: +SKIP
    >>> result.table[["axis", "setting", "model", "mean", "q5", "q95", "flag"]]  # doctest: +SKIP
    >>> result.plot().savefig("lag-sensitivity.png")                        # doctest: +SKIP
    """
    fit_kwargs = dict(fit_kwargs or {})
    panel = check_panel(panel)
    specs = [check_spec(catalog_spec(m, panel) if isinstance(m, str) else m)
             for m in (models or lag_models(panel))]
    if not specs:
        raise SpecError("`models` is empty; give at least one model with a lag, e.g. ['alt']")
    lag_of = {}
    for s in specs:
        name = lag_parameter(s, panel.outcomes)
        if name is None:
            raise SpecError(f"model '{s.name}' has no constant lag (lag={s.options['lag']!r}); "
                            "lag sensitivity needs models with lag='constant'")
        lag_of[s.name + "/" + s.options["initial"]] = name
    ref = specs[0]
    skipped = {}
    categorical = _has_categories(panel)
    if categorical:  # docs/comparison.md, "Lag sensitivity with categorical variables"
        specs = [ref] + [s for s in specs[1:] if not specification
                         or _identified_with_categories(s, panel, skipped)]
    grid = LAG_PRIORS if prior_grid is None else (prior_grid or ())
    scales = VARIANCE_SCALES if variance_scales is None else (variance_scales or ())
    base = dict(priors or {})

    def base_for(spec) -> dict:
        names = _prior_names(spec, panel)
        return {k: tuple(v) for k, v in base.items() if k in names}

    # (axis, setting, spec, priors, task name); tasks are shared between axes
    plan_rows: list[tuple] = []
    tasks: dict[str, Task] = {}

    def add(axis, setting, spec, priors, key):
        if key not in tasks:
            kind = "fit"
            kwargs = {**fit_kwargs, **({"priors": priors} if priors else {})}
            if key == "default" and power_scaling:
                kind = "bayeslong.evaluate.power_scaling:fit_with_power_scaling"
            tasks[key] = Task(name=key, spec=spec, panel=panel, kind=kind, kwargs=kwargs,
                              params=None if kind != "fit" else
                              (lag_parameter(spec, panel.outcomes),))
        plan_rows.append((axis, setting, spec, key))

    add("default", "priors as given" if base_for(ref) else "default priors", ref,
        base_for(ref), "default")
    ref_lag = lag_parameter(ref, panel.outcomes)
    for prior in grid:
        label = f"{ref_lag} ~ {_prior_label(prior)}"
        add("prior", label, ref, {**base_for(ref), ref_lag: tuple(prior)}, f"prior: {label}")
    for f in scales:
        add("prior", f"variance priors: SD scale x{f:g}", ref,
            scaled_variance_priors(ref, panel, f, base_for(ref)), f"prior: SD scale x{f:g}")
    for sd in _deviation_grid(ref, panel, deviation_sds):
        spec = ref.replace(deviation_sd=sd)
        add("deviation SD", f"deviation_sd {sd:g}", spec, base_for(spec),
            f"deviation SD: {sd:g}")
    if specification or initial:
        for s in specs:
            key = "default" if s is ref else f"model: {s.name} ({s.options['initial']})"
            if specification:
                add("specification", s.name, s, base_for(s), key)
            if categorical and s is not ref:  # first wave: the first model only (docs)
                continue
            if initial and len(s.allowed["initial"]) > 1 and not s.initial_is_level:
                other = "endogenous" if s.options["initial"] == "predetermined" else "predetermined"
                add("first wave", s.options["initial"], s, base_for(s), key)
                alt = s.replace(initial=other)
                add("first wave", other, alt, base_for(alt), f"model: {s.name} ({other})")

    given = {name: fit for name, task in tasks.items()
             if (fit := _matching_fit(task, fits or (), fit_kwargs)) is not None}
    ex = executor if executor is not None else SerialExecutor()
    refits = run_many([t for name, t in tasks.items() if name not in given], ex,
                      progress=progress)
    done = {r.name: r for r in refits}
    done.update({name: _result_of_fit(tasks[name], fit) for name, fit in given.items()})
    batch = BatchResult(results=tuple(done[name] for name in tasks))
    default = batch["default"]
    if not default.ok:
        raise SpecError(f"the default fit of model '{ref.name}' failed, so there is nothing to "
                        f"compare with: {default.error}")
    ref_row = default.summary.loc[ref_lag]
    r_mean, r_sd = float(ref_row["mean"]), float(ref_row["sd"])
    r_side = _side(float(ref_row["q5"]), float(ref_row["q95"]))

    out = []
    for axis, setting, spec, key in plan_rows:
        res = batch[key]
        if not res.ok:
            continue
        par = lag_parameter(spec, panel.outcomes)
        row = res.summary.loc[par]
        off = float(spec.lag_offset)  # dual change: lag = 1 + proportional_change
        mean, q5, q95 = float(row["mean"]) + off, float(row["q5"]) + off, float(row["q95"]) + off
        shift = (mean - r_mean) / r_sd
        sign = _side(q5, q95) != r_side
        out.append({"axis": axis, "setting": setting, "model": spec.name,
                    "parameter": par if not off else f"{off:g} + {par}",
                    "mean": mean, "sd": float(row["sd"]), "q5": q5, "q95": q95, "shift": shift,
                    "sign_change": sign, "flag": bool(sign or abs(shift) > 1.0),
                    "psens": np.nan, "diagnosis": ""})
    ps_table = pd.DataFrame()
    if power_scaling and "psens_prior" in default.summary:
        ps_table = default.summary[["psens_prior", "psens_likelihood", "diagnosis"]].rename(
            columns={"psens_prior": "prior", "psens_likelihood": "likelihood"})
        if "power_scaling_draws" in default.info:
            ps_table.attrs["draws"] = default.info["power_scaling_draws"]
        for comp in ("prior", "likelihood"):
            value = float(ps_table.loc[ref_lag, comp])
            out.append({"axis": "power-scaling", "setting": comp, "model": ref.name,
                        "parameter": ref_lag, "mean": r_mean, "sd": r_sd,
                        "q5": float(ref_row["q5"]), "q95": float(ref_row["q95"]), "shift": 0.0,
                        "sign_change": False, "flag": value >= PSENS_THRESHOLD, "psens": value,
                        "diagnosis": ps_table.loc[ref_lag, "diagnosis"]})
    table = pd.DataFrame(out)
    table["axis"] = pd.Categorical(table["axis"], categories=AXES, ordered=True)
    table = table.sort_values("axis", kind="stable").reset_index(drop=True)
    table["axis"] = table["axis"].astype(str)
    return LagSensitivity(table=table, power_scaling=ps_table, failed=batch.failed,
                          warnings={r.name: r.warnings for r in batch if r.warnings},
                          reference=ref.name, reused=tuple(given), skipped=skipped)


def _identified_with_categories(spec: Spec, panel, skipped: dict) -> bool:
    """Whether ``spec`` is identified with the panel's categorical variables (:func:`bl.identify
    <bayeslong.model.identification.identify>`); if not, its reason goes into ``skipped``
    under ``"specification: <model>"`` (:data:`CATEGORICAL_SKIPS`)."""
    from bayeslong.model.identification import identify

    ident = identify(spec, panel)
    if not ident.identified:
        skipped[f"specification: {spec.name}"] = CATEGORICAL_SKIPS["specification"].format(
            model=spec.name, rank=ident.rank, n_params=ident.n_params,
            deficient=", ".join(ident.deficient), advice=ident.advice).rstrip(" .")
    return ident.identified


def _deviation_grid(spec: Spec, panel, given) -> tuple[float, ...]:
    """The deviation SDs to refit ``spec`` with (module notes), or () where they do not apply."""
    approximate = "deviation" in structure_for(spec, panel).kinds
    if given is False or (given is None and not approximate):
        return ()
    if not approximate:
        raise SpecError(f"`deviation_sds` refits with other SDs of the per-wave deviations of "
                        f"approximate invariance, but the default model '{spec.name}' has "
                        f"invariance={spec.measurement['invariance']!r}"
                        + ("" if panel.has_indicators else " and the panel has one indicator per "
                           "process") + "; give models=[bl.model(..., invariance='approximate')] "
                        "on a panel with several indicators, or leave deviation_sds out")
    grid = DEVIATION_SDS if given is None else tuple(given)
    for sd in grid:
        if isinstance(sd, bool) or not isinstance(sd, (int, float)) or not sd > 0:
            raise SpecError(f"`deviation_sds` must hold positive numbers; got {sd!r} in {given!r}")
    return tuple(float(sd) for sd in grid)


def _matching_fit(task: Task, fits, fit_kwargs: dict):
    """The first of ``fits`` that is the fit ``task`` would make, or None.

    Equal spec, data and prior overrides, and the seed, chains and draws ``fit_kwargs``
    ask for (:func:`bayeslong.fit`'s defaults where they are silent).
    """
    import inspect

    from bayeslong.infer.sampling import CAREFUL_DRAWS_FACTOR
    from bayeslong.infer.sampling import fit as fit_fn

    defaults = {k: v.default for k, v in inspect.signature(fit_fn).parameters.items()}
    want = {k: fit_kwargs.get(k, defaults.get(k)) for k in ("seed", "chains", "draws")}
    priors = {k: tuple(v) for k, v in (task.kwargs.get("priors") or {}).items()}
    for fit in fits:
        post = fit.idata.posterior
        if (fit.spec == task.spec and fit.panel == task.panel
                and not fit.prior_set.has_callable
                and _same_priors(fit, priors)
                and int(fit.seed) == int(want["seed"])
                and int(post.sizes["chain"]) == int(want["chains"])
                # a careful re-run keeps CAREFUL_DRAWS_FACTOR times the draws asked for
                and int(post.sizes["draw"]) == int(want["draws"]) * (
                    CAREFUL_DRAWS_FACTOR if fit.rerun else 1)):
            return fit
    return None


def _same_priors(fit, priors: dict) -> bool:
    """Whether ``fit`` was made under the prior overrides ``priors``.

    A categorical fit keeps its thresholds' gap priors apart from its prior set (defaults
    filled in), so those are compared as the categorical fit resolves ``priors``."""
    cat = getattr(fit, "categorical", None)
    if cat is not None:
        from bayeslong.infer.categorical import categorical_priors

        if categorical_priors(cat, fit.panel, priors)[1] != fit.gaps:
            return False
        priors = {k: v for k, v in priors.items() if k not in cat.thresholds}
    return {k: tuple(v) for k, v in fit.prior_set.user_spec().items()} == priors


def _result_of_fit(task: Task, fit) -> TaskResult:
    """The :class:`TaskResult` that running ``task`` would give, read from an existing fit."""
    import warnings as _warnings

    from bayeslong.infer.batch import warning_texts
    from bayeslong.infer.sampling import warn_convergence

    with _warnings.catch_warnings(record=True) as caught:
        _warnings.simplefilter("always")
        warn_convergence(fit.diagnostics())  # what the refit would have warned
        if task.kind == "fit":
            table, info = summarise_draws(fit.idata, task.params)
        else:  # the default setting with power-scaling: as fit_with_power_scaling gives it
            out = power_scaling_summary(fit)
            table, info = out["summary"], out["info"]
    seen = warning_texts(caught)
    return TaskResult(name=task.name, status="ok", seconds=0.0, summary=table,
                      info={**info, "warnings": len(seen)}, warnings=seen)
