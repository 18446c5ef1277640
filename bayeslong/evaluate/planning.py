"""Small-sample planning: how well would a design recover the lag?

Simulate many panels from a model at chosen true values for each number of units and
waves, fit each (by NUTS or maximum likelihood) through the batch runner, and summarise the
lag's bias, posterior SD, interval coverage and how often its interval excludes zero
(docs/comparison.md, "Planning").
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from bayeslong.arguments import number_grid, seed_value, whole_number
from bayeslong.errors import SpecError
from bayeslong.evaluate.sensitivity import lag_parameter
from bayeslong.infer.batch import Task, run_many
from bayeslong.model.simulation import Simulation, default_outcomes
from bayeslong.model.spec import Spec, check_spec


def plan(spec: Spec, params: dict, *, n_units=(30, 60, 120), n_waves=(4, 6),
         replications: int = 20, executor=None, fit_kwargs: dict | None = None, seed: int = 0,
         missing: dict | None = None, kind: str = "fit", progress: bool = True,
         indicators: dict | None = None, categorical: dict | None = None) -> pd.DataFrame:
    """Simulate and fit replications of a design; report how well the lag is recovered.

    Parameters
    ----------
    spec : Spec
        The model that generates and fits the data (it needs a constant lag).
    params : dict
        True parameter values, as for :func:`bayeslong.simulate` (wave-free names such as
        ``resid_var`` cover every number of waves).
    n_units, n_waves : sequence of int
        The designs: every combination is simulated.
    replications : int, default 20
        Simulated panels per design.
    executor : concurrent.futures.Executor, optional
        Default: a local process pool (see :func:`bayeslong.batch.run_many`); a Dask
        cluster's ``client.get_executor()`` spreads the work further.
    fit_kwargs : dict, optional
        Passed to the fitting function (``draws``, ``tune``, ``chains`` ...).
    seed : int, default 0
        Seeds of the simulated panels and the fits derive from it.
    missing : dict, optional
        Missingness imposed on every panel (see :func:`bayeslong.simulate`).
    kind : {"fit", "fit_ml"}, default "fit"
        ``fit_ml`` uses maximum likelihood with Wald intervals (estimate +- 1.645 SE) in
        place of the posterior (fast, for a first look).
    progress : bool, default True
    indicators, categorical : dict, optional
        As for :func:`bayeslong.simulate`: several indicators per process (``params`` then
        also sets ``loading[..]``, ``intercept[..]``, ``unique_var[..]``), and indicators or
        outcomes declared binary or ordinal (``params`` sets their thresholds). The fits
        are those :func:`bayeslong.fit` chooses for such panels; ``kind="fit_ml"`` refuses
        categorical panels, as :func:`bayeslong.fit_ml` does.

    Returns
    -------
    pandas.DataFrame
        One row per design (``n_units``, ``n_waves``): ``truth``, ``bias`` (mean of the
        posterior means minus the truth) and its Monte Carlo SE ``bias_se``, ``post_sd``
        (mean posterior SD), ``coverage`` (share of 90% intervals containing the truth)
        and ``coverage_se``, ``power`` (share of intervals excluding zero), ``seconds``
        (mean wall time per fit), ``n_ok`` and ``n_failed``.

    Notes
    -----
    Monte Carlo SEs: sd(means) / sqrt(R) for the bias, sqrt(c (1 - c) / R) for a share c
    (Morris, White & Crowther 2019, Statistics in Medicine 38(11), table 6,
    doi:10.1002/sim.8086).

    Examples
    --------
    >>> truth = {"level_mean": 2.0, "slope_mean": 0.5, "lag": 0.3, "initial_mean": 2.0,
    ...          "level_var": 1.0, "level_slope_cov": 0.1, "slope_var": 0.1,
    ...          "initial_level_cov": 0.5, "initial_slope_cov": 0.05, "initial_var": 1.5,
    ...          "resid_var": 0.5}
    >>> if __name__ == "__main__":                                          # doctest: +SKIP
    ...     print(bl.plan(bl.model("alt"), truth, n_units=[30, 60, 120], n_waves=[5]))
    """
    spec = check_spec(spec)
    n_units = number_grid(n_units, "n_units", least=2, where="plan")
    n_waves = number_grid(n_waves, "n_waves", least=3, where="plan")
    replications = whole_number(replications, "replications", least=2, where="plan")
    seed = seed_value(seed, where="plan")
    par = lag_parameter(spec, default_outcomes(spec))
    if par is None:
        raise SpecError(f"model '{spec.name}' has no constant lag (lag={spec.options['lag']!r}); "
                        "plan() reports on the lag, give a model with lag='constant'")
    if kind not in ("fit", "fit_ml"):
        raise SpecError(f"`kind` must be 'fit' or 'fit_ml'; got {kind!r}")
    if kind == "fit_ml" and categorical:
        raise SpecError("plan(kind='fit_ml') cannot fit binary or ordinal outcomes: maximum "
                        "likelihood is not available for categorical panels; use kind='fit'")
    designs = [(int(n), int(t)) for n in n_units for t in n_waves]
    seeds = np.random.SeedSequence(seed).generate_state(len(designs) * replications * 2)
    tasks, k, truths = [], 0, {}
    for n, t in designs:
        design = dict(spec=spec, params=params, n_units=n, n_waves=t, missing=missing,
                      indicators=indicators, categorical=categorical)
        sim0 = Simulation(**design)
        truths[n, t] = float(dict(zip(sim0.structure.names, sim0.theta()))[par])  # checks params
        for r in range(replications):
            sim = Simulation(**design, seed=int(seeds[2 * k]))
            tasks.append(Task(name=f"N={n} T={t} rep={r}", spec=spec, panel=sim, kind=kind,
                              kwargs=dict(fit_kwargs or {}), seed=int(seeds[2 * k + 1]) % (2**31),
                              params=(par,)))
            k += 1
    batch = run_many(tasks, executor, progress=progress)
    z90 = 1.6448536269514722  # standard normal 95% quantile (scipy.stats.norm.ppf(0.95))
    rows = []
    for n, t in designs:
        res = [batch[f"N={n} T={t} rep={r}"] for r in range(replications)]
        ok = [r for r in res if r.ok]
        truth = truths[n, t]
        if ok:
            s = pd.DataFrame([r.summary.loc[par] for r in ok])
            if kind == "fit_ml":
                s = pd.DataFrame({"mean": s["estimate"], "sd": s["se"],
                                  "q5": s["estimate"] - z90 * s["se"],
                                  "q95": s["estimate"] + z90 * s["se"]})
            m = s["mean"].to_numpy(float)
            cover = ((s["q5"] <= truth) & (truth <= s["q95"])).to_numpy(float)
            power = ((s["q5"] > 0) | (s["q95"] < 0)).to_numpy(float)
            R = len(ok)
            rows.append({"n_units": n, "n_waves": t, "truth": truth, "bias": m.mean() - truth,
                         "bias_se": m.std(ddof=1) / np.sqrt(R) if R > 1 else np.nan,
                         "post_sd": float(s["sd"].mean()), "coverage": cover.mean(),
                         "coverage_se": np.sqrt(cover.mean() * (1 - cover.mean()) / R),
                         "power": power.mean(), "seconds": float(np.mean([r.seconds for r in ok])),
                         "n_ok": R, "n_failed": len(res) - R})
        else:
            rows.append({"n_units": n, "n_waves": t, "truth": truth, "n_ok": 0,
                         "n_failed": len(res)})
    return pd.DataFrame(rows)
