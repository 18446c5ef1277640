"""Model comparison by predictive accuracy: leave-one-unit-out, WAIC and leave-future-out.

Every fit stores one log-likelihood term per unit (the joint density of the unit's observed
outcomes given its covariates), so PSIS-LOO here leaves out a whole unit and asks how well
the model predicts a new unit's trajectory. The estimates, standard errors, Pareto k
diagnostics and stacking weights are ArviZ's (:func:`arviz.loo`, :func:`arviz.waic`,
:func:`arviz.compare`); nothing here re-implements PSIS.

Leave-future-out asks a different question: fit on waves 1..T-1 and score each unit's
wave T given its own earlier waves, the one-step-ahead forecast a longitudinal model is
often used for.

References
----------
Vehtari, A., Gelman, A., & Gabry, J. (2017). Practical Bayesian model evaluation using
leave-one-out cross-validation and WAIC. Statistics and Computing 27(5), 1413-1432.
doi:10.1007/s11222-016-9696-4
Vehtari, A., Simpson, D., Gelman, A., Yao, Y., & Gabry, J. (2024). Pareto smoothed importance
sampling. JMLR 25(72), 1-58.
Watanabe, S. (2010). Asymptotic equivalence of Bayes cross validation and widely applicable
information criterion in singular learning theory. JMLR 11, 3571-3594.
Yao, Y., Vehtari, A., Simpson, D., & Gelman, A. (2018). Using stacking to average Bayesian
predictive distributions. Bayesian Analysis 13(3), 917-1007. doi:10.1214/17-BA1091
Sivula, T., Magnusson, M., & Vehtari, A. (2020). Uncertainty in Bayesian leave-one-out
cross-validation based model comparison. arXiv:2008.10296.
Bürkner, P.-C., Gabry, J., & Vehtari, A. (2020). Approximate leave-future-out
cross-validation for Bayesian time series models. Journal of Statistical Computation and
Simulation 90(14), 2499-2523. doi:10.1080/00949655.2020.1783262
"""

from __future__ import annotations

import dataclasses
import hashlib
import re
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import logsumexp

from bayeslong.data.panel import check_panel
from bayeslong.dims import UNIT
from bayeslong.errors import ConvergenceWarning, DataError, SpecError
from bayeslong.evaluate.checks import conditional_normal
from bayeslong.infer.diagnostics import convergence_problems
from bayeslong.infer.likelihood import mvn_logpdf
from bayeslong.infer.marginal import treatment_conflict
from bayeslong.infer.pooling import POOLING_KEY
from bayeslong.model.moments import moment_draws, unit_means
from bayeslong.model.spec import Spec, check_spec
from bayeslong.model.structure import structure_for

#: Pareto k above which a unit's PSIS-LOO term is unreliable (Vehtari et al. 2017; 2024).
K_THRESHOLD = 0.7

#: Differences smaller than this many standard errors are not a clear preference
#: (common practice; Sivula, Magnusson & Vehtari 2020).
SE_RULE = 2.0

#: Wave-specific parameters whose wave-T value leave-future-out carries forward from T-1.
#: Columns of the comparison table that belong to leave-future-out.
LFO_COLUMNS = ("elpd_lfo", "se_lfo", "lfo_diff", "lfo_dse")

CARRIED = ("resid_var", "resid_cov", "lag", "proportional_change", "effect", "intercept")

_LOGLIK_VAR = "y"


# --------------------------------------------------------------------------------------------
# checks on the fits
# --------------------------------------------------------------------------------------------


def data_fingerprint(panel) -> str:
    """A content hash of a panel's labels and arrays (equal exactly when the data are equal)."""
    h = hashlib.sha256()
    for part in (panel.units, panel.waves, panel.outcomes, panel.time_varying, panel.time_invariant):
        h.update(repr(tuple(part)).encode())
    for array in (panel.y, panel.x, panel.z):
        a = np.ascontiguousarray(np.asarray(array, dtype=float))
        h.update(str(a.shape).encode())
        h.update(np.where(np.isnan(a), np.inf, a).tobytes())  # one byte pattern for every NaN
    return h.hexdigest()


def _difference(a, b) -> str:
    """Say in words how two panels differ."""
    if a.units != b.units:
        in_a, in_b = set(a.units), set(b.units)
        only = [u for u in a.units if u not in in_b] + [u for u in b.units if u not in in_a]
        if not only:
            return "the same units in a different order"
        return f"different units ({a.n_units} vs {b.n_units}; e.g. unit {only[0]!r} is in one only)"
    if a.waves != b.waves:
        return f"different waves ({list(a.waves)} vs {list(b.waves)})"
    if a.outcomes != b.outcomes:
        return f"different outcomes ({list(a.outcomes)} vs {list(b.outcomes)})"
    if (a.time_varying, a.time_invariant) != (b.time_varying, b.time_invariant):
        return (f"different covariates ({list(a.time_varying + a.time_invariant)} vs "
                f"{list(b.time_varying + b.time_invariant)})")
    if data_fingerprint(a) == data_fingerprint(b):
        return "the same data"
    ya, yb = a.y, b.y
    if not np.array_equal(ya, yb, equal_nan=True):
        i, t, k = (int(v[0]) for v in np.nonzero(~((ya == yb) | (np.isnan(ya) & np.isnan(yb)))))
        return (f"different outcome values (first at unit {a.units[i]!r}, wave {a.waves[t]!r}, "
                f"{a.outcomes[k]!r}: {ya[i, t, k]} vs {yb[i, t, k]})")
    return "different covariate values"


def _check_loglik(name: str, fit) -> None:
    idata = getattr(fit, "idata", None)
    if idata is None or not hasattr(fit, "panel"):
        raise DataError(
            f"fit {name!r} is a {type(fit).__name__}, not a fit made by bl.fit (it needs "
            ".idata and .panel)."
        )
    if "log_likelihood" not in idata.groups() or _LOGLIK_VAR not in idata.log_likelihood:
        raise DataError(
            f"fit {name!r} has no per-unit log-likelihood (idata.log_likelihood['y']); "
            "compare needs one term per unit: refit with bl.fit, which stores it, or add it "
            "to the InferenceData."
        )
    if UNIT not in idata.log_likelihood[_LOGLIK_VAR].dims:
        raise DataError(
            f"fit {name!r} stores its log-likelihood without a '{UNIT}' dimension "
            f"(dims {idata.log_likelihood[_LOGLIK_VAR].dims}); compare needs one term per unit."
        )


def _check_fits(fits) -> dict:
    if not isinstance(fits, dict):
        raise SpecError(
            "compare needs a dict of fits keyed by a name, e.g. "
            "bl.compare({'alt': fit_alt, 'linear-growth': fit_lg}); got a "
            f"{type(fits).__name__}."
        )
    if len(fits) < 2:
        raise SpecError(f"compare needs at least 2 fits to compare; got {len(fits)}.")
    for name, fit in fits.items():
        _check_loglik(name, fit)
    names = list(fits)
    conflict = treatment_conflict({name: fit.panel for name, fit in fits.items()})
    if conflict:
        raise DataError(conflict)
    first = fits[names[0]].panel
    key = data_fingerprint(first)
    for name in names[1:]:
        panel = fits[name].panel
        if data_fingerprint(panel) != key:
            raise DataError(
                f"fits {names[0]!r} and {name!r} were made on different data "
                f"({_difference(first, panel)}); predictive accuracy is only comparable on the "
                "same units, outcome values and covariates: refit both models on one panel."
            )
    return fits


# --------------------------------------------------------------------------------------------
# leave-one-unit-out
# --------------------------------------------------------------------------------------------


def pareto_k(fit) -> pd.Series:
    """Pareto k diagnostic of each unit's PSIS-LOO term.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit`.

    Returns
    -------
    pandas.Series
        Indexed by unit label (name ``pareto_k``). Units with k > 0.7 have unreliable
        leave-one-out terms: their trajectories are influential or poorly predicted
        (Vehtari et al. 2017; 2024), and are worth a look in the data.

    Notes
    -----
    ArviZ warns from the sample-size dependent threshold min(1 - 1/log10 S, 0.7) of
    Vehtari et al. (2024); :func:`compare` counts units above 0.7, the threshold that holds
    for any S of a few thousand draws.
    """
    import arviz as az

    _check_loglik("fit", fit)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # the count is reported in the table
        loo = az.loo(fit.idata, pointwise=True, var_name=_LOGLIK_VAR)
    units = loo.pareto_k[UNIT].values if UNIT in loo.pareto_k.coords else list(fit.panel.units)
    return pd.Series(np.asarray(loo.pareto_k), index=pd.Index(units, name=UNIT), name="pareto_k")


def compare(fits: dict, *, ic: str = "loo", future: bool = False, fit_kwargs: dict | None = None,
            future_scores: dict | None = None) -> pd.DataFrame:
    """Rank models by expected log predictive density of a new unit's trajectory.

    Parameters
    ----------
    fits : dict of str to Fit
        At least two fits of different models on the same panel.
    ic : {"loo", "waic"}, default "loo"
        Criterion that ranks the models and gives ``elpd_diff``, ``dse`` and ``weight``.
    future : bool, default False
        Also refit every model on waves 1..T-1 and score wave T (:func:`forecast_score`):
        adds ``elpd_lfo``, ``se_lfo``, ``lfo_diff`` and ``lfo_dse``. Costs one new fit
        per model.
    fit_kwargs : dict, optional
        Options for those refits (``draws``, ``tune``, ``chains``, ``seed``, ``priors`` ...);
        by default the refits use :func:`bayeslong.fit`'s defaults with each fit's seed and
        each fit's own prior overrides (the same model, fitted to fewer waves).
    future_scores : dict of str to ForecastScore, optional
        Leave-future-out scores already made for some of the fits, by the same rule
        (``forecast_score(fit.spec, fit.panel, seed=fit.seed, priors=<fit's overrides>,
        **fit_kwargs)``, e.g. in the process that made the fit, which has its model
        compiled); those fits are not refitted.

    Returns
    -------
    pandas.DataFrame
        Indexed by model name, best first: ``rank``, ``elpd_loo``, ``se`` (its standard
        error), ``p_loo`` (effective number of parameters), ``elpd_diff`` (to the best, by
        ``ic``), ``dse`` (standard error of that difference, from the paired unit terms),
        ``weight`` (stacking weight), ``n_bad_k`` (units with Pareto k > 0.7),
        ``elpd_waic``, ``se_waic``, ``p_waic`` and ``warning`` (text, empty when none).
        ``attrs["reading"]`` holds the plain-language reading (see :func:`explain_comparison`).
        With ``future``: ``attrs["lfo_carried"]`` names the carried wave-T parameters,
        ``attrs["lfo_problems"]`` holds, by model, the convergence warning of each refit
        that did not converge (recorded there instead of being issued), and
        ``attrs["lfo_timing"]`` each refit's seconds by stage (``Fit.timing``).

    Raises
    ------
    SpecError
        Fewer than two fits, or ``ic`` not "loo" or "waic".
    DataError
        A fit has no per-unit log-likelihood, or the fits were made on different data.

    Notes
    -----
    elpd_loo = sum_i log p(y_i | y_-i) over units, estimated by PSIS (Vehtari et al. 2017,
    eq. 10); its SE is sqrt(N) times the SD of the unit terms. ``dse`` uses the pointwise
    differences, which is far smaller than combining the two SEs when the models agree on
    most units. A difference below about two ``dse`` is not a clear preference (Sivula et
    al. 2020); with few units or very different models the SE is itself uncertain.

    Examples
    --------
    >>> table = bl.compare({"alt": fit_alt, "linear-growth": fit_lg})  # doctest: +SKIP
    >>> print(table.attrs["reading"])  # doctest: +SKIP
    """
    import arviz as az

    if ic not in ("loo", "waic"):
        raise SpecError(f"`ic` must be 'loo' or 'waic'; got {ic!r}.")
    fits = _check_fits(fits)
    idatas = {name: fit.idata for name, fit in fits.items()}
    with warnings.catch_warnings():
        # ArviZ's warnings become the `warning` column; its pandas deprecations are not the user's
        warnings.simplefilter("ignore", UserWarning)
        warnings.filterwarnings("ignore", module=r"arviz\.")
        ranked = az.compare(idatas, ic=ic, method="stacking", var_name=_LOGLIK_VAR)
        loos = {n: az.loo(d, pointwise=True, var_name=_LOGLIK_VAR) for n, d in idatas.items()}
        waics = {n: az.waic(d, pointwise=True, var_name=_LOGLIK_VAR) for n, d in idatas.items()}
    rows = {}
    for name in ranked.index:
        loo, waic = loos[name], waics[name]
        bad = int(np.sum(np.asarray(loo.pareto_k) > K_THRESHOLD))
        notes = []
        if bad:
            notes.append(f"{bad} unit(s) with Pareto k > {K_THRESHOLD}: PSIS-LOO is unreliable for "
                         "them (pareto_k(fit) names them)")
        if waic.warning:
            notes.append("WAIC: the variance of some unit's log predictive density exceeds 0.4, "
                         "prefer LOO")
        rows[name] = {
            "rank": int(ranked.loc[name, "rank"]), "elpd_loo": float(loo.elpd_loo), "se": float(loo.se),
            "p_loo": float(loo.p_loo), "elpd_diff": float(ranked.loc[name, "elpd_diff"]),
            "dse": float(ranked.loc[name, "dse"]), "weight": float(ranked.loc[name, "weight"]),
            "n_bad_k": bad, "elpd_waic": float(waic.elpd_waic), "se_waic": float(waic.se),
            "p_waic": float(waic.p_waic), "warning": "; ".join(notes),
        }
    table = pd.DataFrame.from_dict(rows, orient="index")
    table.index.name = "model"
    table.attrs["ic"] = ic
    if future:
        _add_future(table, fits, fit_kwargs or {}, future_scores or {})
    table.attrs["reading"] = explain_comparison(table)
    return table


def explain_comparison(table: pd.DataFrame) -> str:
    """Read a :func:`compare` table in plain language.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`compare`.

    Returns
    -------
    str
        Which model predicts best, whether each difference is clear (more than two standard
        errors of the difference, common practice: Sivula, Magnusson & Vehtari 2020), the
        Pareto k and WAIC warnings, and what the comparison does not say.
    """
    ic = table.attrs.get("ic", "loo")
    crit = "PSIS-LOO" if ic == "loo" else "WAIC"
    best = table.index[0]
    lines = [f"Best expected predictive accuracy for a new unit ({crit}): {best!r}."]
    for name in table.index[1:]:
        diff, dse = float(table.loc[name, "elpd_diff"]), float(table.loc[name, "dse"])
        ratio = diff / dse if dse > 0 else np.inf
        if diff < SE_RULE * dse:
            lines.append(f"{name!r} is {diff:.1f} lower (SE of the difference {dse:.1f}, {ratio:.1f} SE): "
                         f"less than {SE_RULE:g} SE, not a clear preference between {best!r} and {name!r}.")
        else:
            lines.append(f"{name!r} is {diff:.1f} lower (SE of the difference {dse:.1f}, {ratio:.1f} SE): "
                         f"{best!r} predicts clearly better.")
    if "elpd_lfo" in table:
        top = table["elpd_lfo"].idxmax()
        lines.append(f"Forecasting the last wave from the earlier ones (leave-future-out), {top!r} scores "
                     "best; see lfo_diff and lfo_dse.")
        for name in table.attrs.get("lfo_problems", {}):
            lines.append(f"The leave-future-out refit of {name!r} did not converge, so its elpd_lfo is "
                         "uncertain beyond its SE; see attrs['lfo_problems'].")
    bad = table[table["n_bad_k"] > 0]
    for name in bad.index:
        lines.append(f"{name!r}: {int(bad.loc[name, 'n_bad_k'])} unit(s) with Pareto k > {K_THRESHOLD}, "
                     "so its elpd_loo is uncertain beyond its SE; look at pareto_k(fit).")
    lines.append("These numbers compare how well each model predicts the data, not which model is true, "
                 "and a better predicting model does not make its coefficients causal effects.")
    return "\n".join(lines)


# --------------------------------------------------------------------------------------------
# leave-future-out
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True, eq=False)
class ForecastScore:
    """Result of :func:`forecast_score`.

    Attributes
    ----------
    spec : Spec
    elpd : float
        Sum over scored units of log p(y_iT | y_i,<T, w_i), averaged over draws on the
        probability scale.
    se : float
        sqrt(n) times the SD of the unit terms.
    n_units : int
        Units scored (those observed at wave T).
    pointwise : pandas.Series
        The unit terms, indexed by unit.
    carried : tuple of str
        Wave-T parameters given their wave T-1 value (see :func:`forecast_score`).
    unscored : tuple
        Units not observed at wave T: there is nothing to forecast, so they contribute nothing.
    problems : tuple of str
        The convergence warning of the refit on waves 1..T-1 (empty when it converged).
    timing : dict
        Seconds the refit spent compiling, sampling ... (its ``Fit.timing``).
    """

    spec: Spec
    elpd: float
    se: float
    n_units: int
    pointwise: pd.Series
    carried: tuple = ()
    unscored: tuple = ()
    problems: tuple = ()
    timing: dict = field(default_factory=dict)

    def __repr__(self) -> str:
        return (f"ForecastScore({self.spec.name}: elpd={self.elpd:.2f}, se={self.se:.2f}, "
                f"n_units={self.n_units})")


def _wave_key(name: str):
    """Split ``base[keys..., t]`` into (base, leading keys, t) or None without a wave key."""
    m = re.fullmatch(r"([^\[]+)\[(.*)\]", name)
    if not m:
        return None
    keys = m.group(2).split(",")
    return (m.group(1), tuple(keys[:-1]), int(keys[-1])) if keys[-1].isdigit() else None


def extend_draws(past, full, thetas: np.ndarray) -> tuple[np.ndarray, tuple[str, ...]]:
    """Map draws of a (T-1)-wave structure onto the T-wave structure of the same spec.

    Parameters shared by name keep their draws. A wave-T parameter of a kind listed in
    :data:`CARRIED` (``resid_var[T]``, ``lag[T]``, ``effect[x,T]``, ``intercept[T]`` ...)
    takes its wave T-1 draw. Any other new parameter raises :class:`SpecError`.

    Returns
    -------
    thetas : numpy.ndarray, shape (S, full.n_params)
    carried : tuple of str
        Names of the carried parameters.
    """
    T = full.n_waves
    out = np.empty((len(thetas), full.n_params))
    carried = []
    for j, name in enumerate(full.names):
        if name in past.names:
            out[:, j] = thetas[:, past.names.index(name)]
            continue
        key = _wave_key(name)
        source = None
        if key is not None and key[2] == T and key[0] in CARRIED:
            source = f"{key[0]}[{','.join(key[1] + (str(T - 1),))}]"
        if source is None or source not in past.names:
            raise SpecError(
                f"leave-future-out cannot predict wave {T} with model '{full.spec.name}': its "
                f"parameter {name!r} exists only when wave {T} is in the data and has no earlier "
                "value to carry forward. Use options that are equal over waves for this "
                "parameter, or compare the model by leave-one-unit-out only."
            )
        out[:, j] = thetas[:, past.names.index(source)]
        carried.append(name)
    return out, tuple(carried)


def last_wave_logpdf(structure, panel, thetas: np.ndarray) -> pd.Series:
    """Log predictive density of each unit's last wave given its earlier waves.

    Parameters
    ----------
    structure : Structure
        The T-wave structure of the model (``panel``'s design).
    panel : Panel
        All T waves.
    thetas : numpy.ndarray, shape (S, n_params)
        Draws in ``structure.names`` order.

    Returns
    -------
    pandas.Series
        log (1/S sum_s p(y_iT | y_i,<T, w_i, theta_s)) for each unit observed at wave T
        (units not observed there are left out: they have nothing to score).

    Notes
    -----
    The conditional density is the normal of :func:`bayeslong.check.conditional_normal` on
    the implied moments: the wave-T entries of all processes given the observed entries of
    waves 1..T-1. A unit observed at wave T only is scored by its marginal density.
    """
    mom = moment_draws(structure, thetas)
    ys = panel.outcome_matrix()
    mean = unit_means(mom, panel.covariate_matrix())  # (S, N, Y)
    K, T = len(panel.outcomes), panel.n_waves
    last = np.tile(np.arange(T), K) == T - 1
    seen = ~np.isnan(ys)
    scored = (seen & last).any(axis=1)
    keys = {}
    for i in np.flatnonzero(scored):
        keys.setdefault(seen[i].tobytes(), []).append(i)
    terms = np.full(panel.n_units, np.nan)
    S = len(thetas)
    for group in keys.values():
        idx = np.array(group)
        obs = seen[idx[0]]
        keep = obs  # observed entries only: target = last-wave ones, given = earlier ones
        given = (obs & ~last)[keep]
        target_vals = ys[idx][:, obs & last]
        m, c = conditional_normal(mean[:, idx][:, :, keep], mom["Sigma"][:, None][:, :, keep][:, :, :, keep],
                                  given, ys[idx][:, obs & ~last][None])
        lp = mvn_logpdf(target_vals[None], m, c)  # (S, n_group)
        terms[idx] = logsumexp(lp, axis=0) - np.log(S)
    return pd.Series(terms[scored], index=pd.Index([panel.units[i] for i in np.flatnonzero(scored)], name=UNIT),
                     name="elpd_lfo")


def score_last_wave(fit_past, panel) -> ForecastScore:
    """Score wave T of ``panel`` with a fit made on its first T-1 waves.

    Parameters
    ----------
    fit_past : Fit
        A fit of some spec on ``panel.head(panel.n_waves - 1)``.
    panel : Panel
        The full panel, T waves.

    Returns
    -------
    ForecastScore
    """
    T = panel.n_waves
    past = fit_past.structure
    if past.n_waves != T - 1:
        raise DataError(
            f"score_last_wave needs a fit on the first {T - 1} waves of the panel; the fit has "
            f"{past.n_waves} waves. Fit on panel.head({T - 1})."
        )
    return _score(fit_past.spec, past, panel, np.asarray(fit_past.theta_draws(), dtype=float))


def _score(spec: Spec, past, panel, thetas: np.ndarray) -> ForecastScore:
    """Score wave T of ``panel`` with draws ``thetas`` in the order of ``past.names``."""
    full = structure_for(spec, panel)
    thetas, carried = extend_draws(past, full, thetas)
    return _from_terms(spec, panel, last_wave_logpdf(full, panel, thetas), carried)


def _from_terms(spec: Spec, panel, terms: pd.Series, carried=(), **more) -> ForecastScore:
    n = len(terms)
    se = float(np.sqrt(n) * np.std(terms.to_numpy(), ddof=1)) if n > 1 else float("nan")
    scored = set(terms.index)
    return ForecastScore(spec=spec, elpd=float(terms.sum()), se=se, n_units=n,
                         pointwise=terms, carried=carried,
                         unscored=tuple(u for u in panel.units if u not in scored), **more)


def last_wave_hidden(panel):
    """The panel with every outcome of its last wave set missing (all T waves kept).

    Units with no outcome left are dropped, as :meth:`Panel.head` drops them.
    """
    from bayeslong.data import Panel

    y = np.array(panel.y, dtype=float)
    y[:, -1] = np.nan
    keep = ~np.isnan(y).all(axis=(1, 2))
    return Panel(units=tuple(u for u, k in zip(panel.units, keep) if k), waves=panel.waves,
                 outcomes=panel.outcomes, time_varying=panel.time_varying,
                 time_invariant=panel.time_invariant, y=y[keep], x=panel.x[keep], z=panel.z[keep],
                 indicators=panel.indicators, categories=panel.categories)


def contains_past(past, full, *, points: int = 3, seed: int = 0) -> bool:
    """Whether the T-wave structure, with wave T unobserved, is the (T-1)-wave model.

    True when both have the same parameters and covariance blocks, and at random admissible
    parameter values the T-wave implied moments of the outcomes at waves 1..T-1 equal the
    (T-1)-wave ones: the same means, the same effects of waves 1..T-1 covariates and of
    time-invariant ones, no effect of wave-T covariates, the same covariances. The
    likelihood of data with wave T missing is then the (T-1)-wave likelihood at every
    parameter value (the marginal of a normal is the normal of the kept entries), so with
    the same priors the two posteriors are one. False for a model with wave-T-only
    parameters (free residual variances, time-varying lags ...) or whose earlier waves
    depend on wave-T covariates (the level of ``fixed-effects`` is regressed on x at
    every wave).
    """
    from bayeslong.model.moments import moments_at
    from bayeslong.model.transform import Unconstrained

    if past.names != full.names:
        return False

    def blocks(structure):
        return sorted(tuple(sorted(int(i) for i in np.unique(b.index) if i >= 0))
                      for b in structure.blocks)

    if blocks(past) != blocks(full):
        return False
    try:
        rows = [full.observed.index(n) for n in past.observed]
        cols = [full.covariates.index(n) for n in past.covariates]
    except ValueError:
        return False
    later = [j for j in range(len(full.covariates)) if j not in cols]
    rng = np.random.default_rng(seed)
    to_natural = Unconstrained(full).to_natural
    for _ in range(points):
        theta = to_natural(rng.normal(scale=0.5, size=full.n_params))
        c1, D1, S1 = moments_at(full, theta)
        c0, D0, S0 = moments_at(past, theta)
        D1 = D1.reshape(len(c1), -1)
        if not (np.allclose(c1[rows], c0, rtol=1e-10, atol=1e-10)
                and np.allclose(D1[rows][:, cols], D0.reshape(len(c0), -1), rtol=1e-10, atol=1e-10)
                and np.allclose(D1[rows][:, later], 0.0, atol=1e-10)
                and np.allclose(S1[rows][:, rows], S0, rtol=1e-10, atol=1e-10)):
            return False
    return True


def forecast_score(spec: Spec, panel, **fit_kwargs) -> ForecastScore:
    """Leave-future-out: fit on waves 1..T-1 and score each unit's wave T.

    Parameters
    ----------
    spec : Spec
    panel : Panel
        At least 4 waves (the refit needs 3).
    **fit_kwargs
        Passed to :func:`bayeslong.fit` (``draws``, ``tune``, ``chains``, ``seed``,
        ``priors``, ``sampler``, ``progressbar``).

    Returns
    -------
    ForecastScore
        ``elpd`` = sum_i log (1/S sum_s p(y_iT | y_i,<T, w_i, theta_s)) over the units
        observed at wave T, with theta_s drawn from the posterior given waves 1..T-1 only
        (exact one-step-ahead leave-future-out, Bürkner, Gabry & Vehtari 2020, eq. 4 with
        M = 1, for a single forecast origin), and ``se`` = sqrt(n) SD of the unit terms.
        ``problems`` holds the refit's convergence warning, which is also issued.

    Raises
    ------
    DataError
        Fewer than 4 waves.
    SpecError
        A parameter exists only at wave T and cannot be carried forward.

    Notes
    -----
    The prediction uses the implied moments of the T-wave structure. Parameters that only
    exist at wave T because an option is free over waves are given their wave T-1 value
    (residual variances and covariances, time-varying lags, covariate effects and
    intercepts); their names are in ``carried``. Free time scores (latent basis) and
    similar wave-specific loadings have no such rule, and the model raises instead.
    Units not observed at wave T contribute nothing; units observed only at wave T are
    scored by their marginal density at wave T.

    A panel with categorical variables is scored by the marginal probability of its wave-T
    categories given the earlier waves (evaluate/category_forecast.py).

    When the T-wave model with wave T unobserved is the (T-1)-wave model
    (:func:`contains_past`: no wave-T-only parameter, nothing earlier depends on wave T),
    the refit is made on the T-wave structure with wave T hidden
    (:func:`last_wave_hidden`) and the (T-1)-wave fit's priors given explicitly: the same
    posterior, and the compiled model of the full-data fit serves it (docs/engine.md) instead of
    a new compile. Otherwise (also when a prior is a factory, or
    :func:`bayeslong.model.start.start_values` has no value without wave T) the refit is on
    ``panel.head(T - 1)``.
    """
    from bayeslong.infer.priors import resolve_priors
    from bayeslong.infer.sampling import fit as run_fit
    from bayeslong.model.start import start_values

    spec, panel = check_spec(spec), check_panel(panel)
    if panel.n_waves < 4:
        raise DataError(
            f"leave-future-out needs at least 4 waves (refit on T-1 >= 3); the panel has {panel.n_waves}."
        )
    if getattr(panel, "categories", None):  # the marginal probabilities of the categories
        from bayeslong.evaluate.category_forecast import last_wave_terms

        terms, problems, timing = last_wave_terms(spec, panel, last_wave_hidden(panel), **fit_kwargs)
        return _from_terms(spec, panel, terms, problems=problems, timing=timing)
    past = panel.head(panel.n_waves - 1)
    # fail before sampling when wave T cannot be predicted
    before, after = structure_for(spec, past), structure_for(spec, panel)
    extend_draws(before, after, np.zeros((1, before.n_params)))
    kwargs = dict(fit_kwargs)
    data = past
    if contains_past(before, after):
        hidden = last_wave_hidden(panel)
        prior_set = resolve_priors(before, past, kwargs.get("priors"))
        # a prior factory cannot be written out as an override; the sampler starts at the
        # data-based start values, which must exist without wave T's outcomes
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # "mean of empty slice": NaN
            starts = start_values(after, hidden)
        if not prior_set.has_callable and np.isfinite(starts).all():
            data = hidden
            kwargs["priors"] = {p.parameter: (p.family, *p.args) for p in prior_set.priors}
            kwargs["priors"].update({k: v for k, v in prior_set.user_spec().items()
                                     if k == POOLING_KEY})
    # convergence problems are kept with the score; the start values' "mean of empty slice"
    # over the hidden wave is dropped (checked finite above), every other warning passed on
    drop = (lambda w: data is not past and str(w.message) == "Mean of empty slice")
    with convergence_problems(drop) as problems:
        fit_past = run_fit(spec, data, **kwargs)
    thetas = np.asarray(fit_past.theta_draws(), dtype=float)  # same names, same order
    return dataclasses.replace(_score(spec, before, panel, thetas), problems=tuple(problems),
                               timing=dict(getattr(fit_past, "timing", {}) or {}))


def _refit_score(fit, fit_kwargs: dict) -> ForecastScore:
    """Leave-future-out refit of ``fit``'s model: its seed and prior overrides by default."""
    prior_set = getattr(fit, "prior_set", None)
    priors = prior_set.user_spec() if prior_set is not None else {}
    kwargs = {"seed": getattr(fit, "seed", 1), **({"priors": priors} if priors else {}),
              **fit_kwargs}
    return forecast_score(fit.spec, fit.panel, **kwargs)


def _add_future(table: pd.DataFrame, fits: dict, fit_kwargs: dict, given: dict) -> None:
    for name, score in given.items():
        if name in fits and (score.spec != fits[name].spec
                             or score.n_units + len(score.unscored) != fits[name].panel.n_units):
            raise SpecError(f"the leave-future-out score given for {name!r} is of model "
                            f"'{score.spec}' on {score.n_units + len(score.unscored)} units, not "
                            f"of the fit's model '{fits[name].spec}' on {fits[name].panel.n_units}")
    with warnings.catch_warnings():
        # recorded in attrs["lfo_problems"] (and read out by explain_comparison) instead
        warnings.simplefilter("ignore", ConvergenceWarning)
        scores = {name: given[name] if name in given else _refit_score(fits[name], fit_kwargs)
                  for name in table.index}
    best = max(scores, key=lambda n: scores[n].elpd)
    diffs, dses = [], []
    for n in table.index:
        d = (scores[best].pointwise - scores[n].pointwise).dropna()
        diffs.append(float(d.sum()))
        dses.append(float(np.sqrt(len(d)) * d.std(ddof=1)) if n != best and len(d) > 1 else 0.0)
    columns = ([scores[n].elpd for n in table.index], [scores[n].se for n in table.index],
               diffs, dses)
    for name, values in zip(LFO_COLUMNS, columns, strict=True):
        table[name] = values
    carried = sorted({c for s in scores.values() for c in s.carried})
    table.attrs["lfo_carried"] = carried
    table.attrs["lfo_problems"] = {n: "; ".join(scores[n].problems) for n in table.index
                                   if scores[n].problems}
    table.attrs["lfo_timing"] = {n: dict(scores[n].timing) for n in table.index}
