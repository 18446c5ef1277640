"""The measurement part of a fit, wave by wave: loadings, intercepts and unique variances.

For each indicator j of a process k and each wave t the model has y[j,t] = nu[j,t] +
lambda[j,t] eta[k,t] + eps[j,t] with Var eps[j,t] = theta[j,t] (docs/model-family.md,
"Several indicators per wave"). Which of these are free, fixed (the marker's loading 1 and
first intercept 0), equal over waves (the invariance level) or combinations of others
(effects coding) is the structure's business; reading the entries off the model matrices at
every draw shows them all in one form, whatever the options.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from bayeslong.errors import DataError
from bayeslong.evaluate.checks import check_fit
from bayeslong.model.moments import NUMPY, model_matrices

#: The parts of the measurement table and their model matrices.
PARTS = ("loading", "intercept", "unique_var")


def wave_measurement(structure, panel, thetas, *, interval: float = 0.9) -> pd.DataFrame:
    """Loading, intercept and unique variance of every indicator at every wave.

    Parameters
    ----------
    structure : Structure
        The structure of the fitted spec on ``panel``.
    panel : Panel
        The fitted panel (its processes and indicators).
    thetas : numpy.ndarray, shape (S, n_params) or (n_params,)
        Posterior draws, or one parameter vector (an ML estimate).
    interval : float, default 0.9
        Probability of the central interval reported with draws.

    Returns
    -------
    pandas.DataFrame
        One row per process measured by several indicators, indicator and wave:
        ``process``, ``indicator``, ``wave``, and for each part (``loading``,
        ``intercept``, ``unique_var``) its mean over the draws, and with two draws or more
        ``<part> lower`` and ``<part> upper`` (the central interval) and ``<part> fixed``
        (True where the value is the same in every draw: a fixed value, such as the
        marker's loading 1). Processes observed directly have no rows.
    """
    if not 0 < interval < 1:
        raise DataError(f"`interval` must be between 0 and 1, e.g. 0.9; got {interval!r}.")
    thetas = np.atleast_2d(np.asarray(thetas, dtype=float))
    m = model_matrices(structure, thetas, NUMPY)
    eta = [i for i, name in enumerate(structure.latents) if name.startswith("eta")]
    T = panel.n_waves
    rows, j = [], 0
    for k, (process, group) in enumerate(panel.indicators.items()):
        for name in group:
            if group != (process,):
                for t, wave in enumerate(panel.waves):
                    r = j * T + t
                    values = {"loading": m["Lam"][:, r, eta[k * T + t]], "intercept": m["nu"][:, r],
                              "unique_var": m["Theta"][:, r, r]}
                    row = {"process": process, "indicator": name, "wave": wave}
                    for part, v in values.items():
                        row[part] = float(v.mean())
                        if len(v) > 1:
                            lo, hi = np.quantile(v, [(1 - interval) / 2, (1 + interval) / 2])
                            row.update({f"{part} lower": float(lo), f"{part} upper": float(hi),
                                        f"{part} fixed": bool(np.ptp(v) == 0)})
                    rows.append(row)
            j += 1
    table = pd.DataFrame(rows)
    if len(table):
        table["wave"] = pd.Series([r["wave"] for r in rows], dtype=object)
    table.attrs["interval"] = interval
    return table


def measurement_table(fit, *, interval: float = 0.9) -> pd.DataFrame:
    """Posterior summary of the measurement part of a fit, by indicator and wave.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit` of a panel with a process measured by several
        indicators.
    interval : float, default 0.9

    Returns
    -------
    pandas.DataFrame
        See :func:`wave_measurement`.
    """
    check_fit(fit, "measurement_table")
    if not fit.panel.has_indicators:
        raise DataError("measurement_table needs a process measured by several indicators; this "
                        "fit's processes are each observed directly (outcomes="
                        f"{list(fit.panel.outcomes)}).")
    return wave_measurement(fit.structure, fit.panel, fit.theta_draws(), interval=interval)
