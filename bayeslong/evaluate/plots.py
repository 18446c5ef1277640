"""Figures of predictive checks, individual trajectories and model comparisons.

Every function returns a :class:`matplotlib.figure.Figure` drawn on the Agg canvas: nothing
is shown and no pyplot state is touched, so the figures work in scripts, notebooks and
servers alike. Save one with ``fig.savefig("ppc.png", dpi=150)`` or ``"ppc.svg"``.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from bayeslong.errors import DataError

_BAND90, _BAND50, _LINE, _FLAG = "#c9d9ea", "#8eb1d2", "#2b5d8a", "#b3261e"
_STAT_LABEL = {"mean": "wave mean", "sd": "wave SD", "lag1_cor": "lag-1 correlation (t-1, t)",
               "rising": "share rising"}


def _figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _need_columns(table, columns, what: str) -> None:
    if not isinstance(table, pd.DataFrame):
        raise DataError(f"{what} needs a fit or the table of the matching function; got a "
                        f"{type(table).__name__}.")
    missing = [c for c in columns if c not in table.columns]
    if missing:
        raise DataError(f"{what}: the table lacks the column(s) {', '.join(missing)}; pass the "
                        "output of the matching function unchanged.")


def plot_ppc(fit_or_table, *, statistics=("mean", "sd"), draws: int = 200, seed=0):
    """Plot observed wave statistics against their posterior predictive 50% and 90% bands.

    Parameters
    ----------
    fit_or_table : Fit or pandas.DataFrame
        A fit (then :func:`bayeslong.check.ppc` is run) or a table from it.
    statistics : sequence of str, default ("mean", "sd")
        Any of ``mean``, ``sd``, ``lag1_cor``, one column of panels each.
    draws, seed : passed to :func:`bayeslong.check.ppc` when a fit is given.

    Returns
    -------
    matplotlib.figure.Figure
        One row per observed variable (a process, or each indicator of a process measured
        by several), one column per statistic; flagged statistics
        (p < 0.05 or > 0.95) are drawn as red points.
    """
    from bayeslong.evaluate.checks import ppc

    table = fit_or_table if isinstance(fit_or_table, pd.DataFrame) else ppc(fit_or_table, draws=draws, seed=seed)
    _need_columns(table, ("statistic", "process", "wave", "observed", "rep_q05", "rep_q25",
                          "rep_q75", "rep_q95", "flag"), "plot_ppc")
    statistics = [s for s in statistics if s != "rising"]
    unknown = [s for s in statistics if s not in _STAT_LABEL]
    if unknown:
        raise DataError(f"plot_ppc: unknown statistic {unknown[0]!r}; choose from mean, sd, lag1_cor.")
    key = "indicator" if "indicator" in table.columns else "process"
    variables = list(dict.fromkeys(zip(table["process"], table[key])))
    fig = _figure(3.6 * len(statistics), 2.9 * len(variables))
    axes = fig.subplots(len(variables), len(statistics), squeeze=False)
    for r, (owner, proc) in enumerate(variables):
        for c, stat in enumerate(statistics):
            ax = axes[r][c]
            t = table[(table["statistic"] == stat) & (table[key] == proc)]
            x = np.arange(len(t))
            ax.fill_between(x, t["rep_q05"], t["rep_q95"], color=_BAND90, label="replicated 90%")
            ax.fill_between(x, t["rep_q25"], t["rep_q75"], color=_BAND50, label="replicated 50%")
            ax.plot(x, t["observed"], color="black", lw=1)
            flag = t["flag"].to_numpy(dtype=bool)
            ax.scatter(x[~flag], t["observed"][~flag], color="black", s=16, zorder=3, label="observed")
            if flag.any():
                ax.scatter(x[flag], t["observed"][flag], color=_FLAG, s=22, zorder=4,
                           label="observed, p < 0.05 or > 0.95")
            ax.set_xticks(x, [str(w) for w in t["wave"]])
            ax.set_xlabel("wave" if stat != "lag1_cor" else "wave t")
            ax.set_ylabel(f"{proc}: {_STAT_LABEL[stat]}" if owner == proc
                          else f"{owner} / {proc}:\n{_STAT_LABEL[stat]}")
            if r == 0 and c == 0:
                ax.legend(fontsize=7, loc="best")
    model = table.attrs.get("model")
    fig.suptitle("Posterior predictive check" + (f": {model}" if model else ""), fontsize=11)
    return fig


def plot_trajectories(fit_or_table, units=None, *, kind: str = "outcome", max_units: int = 12,
                      draws: int = 200, seed=0):
    """Plot individual units' observed values inside their conditional predictive bands.

    Parameters
    ----------
    fit_or_table : Fit or pandas.DataFrame
        A fit (then :func:`bayeslong.check.trajectories` is run) or a table from it.
    units : sequence of labels, optional
        Units to show (the first ``max_units`` by default).
    kind : {"outcome", "latent"}
        See :func:`bayeslong.check.trajectories`.
    max_units : int, default 12
        At most this many panels (a grid of up to 4 columns).
    draws, seed : passed to :func:`bayeslong.check.trajectories` when a fit is given.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per unit and a colour per process: the 90% (light) and 50% (dark) bands,
        the mixture mean (line) and the observed values (points).
    """
    from bayeslong.evaluate.checks import trajectories

    if isinstance(fit_or_table, pd.DataFrame):
        table = fit_or_table
    else:
        if units is None:
            units = list(fit_or_table.panel.units[:max_units])
        table = trajectories(fit_or_table, units, kind=kind, draws=draws, seed=seed)
    _need_columns(table, ("unit", "process", "wave", "observed", "mean", "q05", "q25", "q75", "q95"),
                  "plot_trajectories")
    shown = list(dict.fromkeys(table["unit"]))[:max_units]
    cols = min(4, len(shown))
    rows = math.ceil(len(shown) / cols)
    fig = _figure(3.1 * cols, 2.5 * rows + 0.5)
    axes = fig.subplots(rows, cols, squeeze=False, sharey=True)
    for ax in axes.ravel()[len(shown):]:
        ax.set_visible(False)
    key = "indicator" if "indicator" in table.columns else "process"
    processes = list(dict.fromkeys(table[key]))
    colours = [_LINE, "#8a5a2b", "#3f7f3f"]
    for ax, unit in zip(axes.ravel(), shown):
        for k, proc in enumerate(processes):
            t = table[(table["unit"] == unit) & (table[key] == proc)]
            x = np.arange(len(t))
            col = colours[k % len(colours)]
            ax.fill_between(x, t["q05"], t["q95"], color=col, alpha=0.18, lw=0)
            ax.fill_between(x, t["q25"], t["q75"], color=col, alpha=0.35, lw=0)
            ax.plot(x, t["mean"], color=col, lw=1, label=f"{proc}: predicted")
            ax.scatter(x, t["observed"], color="black" if k == 0 else col, s=14, zorder=3,
                       marker="o" if k == 0 else "s", label=f"{proc}: observed")
            ax.set_xticks(x, [str(w) for w in t["wave"]], fontsize=7)
        ax.set_title(f"unit {unit}", fontsize=9)
    for ax in axes[-1]:
        ax.set_xlabel("wave")
    for ax in axes[:, 0]:
        ax.set_ylabel(" / ".join(processes))
    axes[0][0].legend(fontsize=6, loc="best")
    what = table.attrs.get("kind", kind)
    title = ("Each wave predicted from the unit's other waves (50% and 90% bands)" if what == "outcome"
             else "Latent trajectory given the unit's data (50% and 90% bands)")
    model = table.attrs.get("model")
    fig.suptitle(title + (f": {model}" if model else ""), fontsize=10)
    return fig


def plot_compare(table: pd.DataFrame):
    """Plot each model's elpd with its SE and its difference from the best with the paired SE.

    Parameters
    ----------
    table : pandas.DataFrame
        Output of :func:`bayeslong.compare.compare`.

    Returns
    -------
    matplotlib.figure.Figure
        Left: elpd (LOO or WAIC, as ranked) with +-1 SE bars. Right: difference from the best
        model with +-2 SE-of-the-difference bars (a bar that crosses zero is no clear
        preference, common practice after Sivula, Magnusson & Vehtari 2020).
    """
    _need_columns(table, ("elpd_loo", "se", "elpd_diff", "dse"), "plot_compare")
    ic = table.attrs.get("ic", "loo")
    elpd, se = (table["elpd_loo"], table["se"]) if ic == "loo" else (table["elpd_waic"], table["se_waic"])
    names = [str(n) for n in table.index]
    y = np.arange(len(names))[::-1]
    fig = _figure(9.0, 0.6 * len(names) + 1.6)
    left, right = fig.subplots(1, 2, sharey=True)
    left.errorbar(elpd, y, xerr=se, fmt="o", color="black", capsize=3)
    left.set_yticks(y, names)
    left.set_xlabel(f"elpd ({'PSIS-LOO' if ic == 'loo' else 'WAIC'}), +-1 SE")
    right.errorbar(-table["elpd_diff"], y, xerr=2 * table["dse"], fmt="o", color=_LINE, capsize=3)
    right.axvline(0.0, color="grey", lw=0.8, ls="--")
    right.set_xlabel("difference from the best, +-2 SE of the difference")
    fig.suptitle("Expected log predictive density of a new unit's trajectory (higher is better)",
                 fontsize=10)
    return fig


def plot_latent_scores(fit, units=None, *, max_units: int = 6, draws: int = 200, seed=0):
    """Plot units' latent trajectories (posterior mean and interval) beside their indicators.

    Parameters
    ----------
    fit : Fit
        A fit from :func:`bayeslong.fit` (the indicators are read from its panel).
    units : sequence of labels, optional
        Units to show (the first ``max_units`` by default).
    max_units : int, default 6
    draws, seed : passed to :func:`bayeslong.evaluate.scores.latent_scores`.

    Returns
    -------
    matplotlib.figure.Figure
        One panel per unit and process: the latent's posterior mean (line) and 90% interval
        (band) from :func:`~bayeslong.evaluate.scores.latent_scores`, and each indicator put
        on the marker's scale, (y - intercept) / loading at the posterior mean of the
        parameters, which is what that indicator alone says about the latent (points; one
        marker shape per indicator). A process observed directly shows its observed values.
    """
    from bayeslong.evaluate.checks import check_fit, observed_owners
    from bayeslong.evaluate.scores import latent_scores
    from bayeslong.model.moments import NUMPY, model_matrices

    check_fit(fit, "plot_latent_scores")
    panel = fit.panel
    if units is None:
        units = list(panel.units[:max_units])
    units = list(units)[:max_units]
    table = latent_scores(fit, units, draws=draws, seed=seed)
    m = model_matrices(fit.structure, np.asarray(fit.theta_draws()).mean(axis=0), NUMPY)
    T = panel.n_waves
    eta = [i for i, name in enumerate(fit.structure.latents) if name.startswith("eta")]
    lam, nu = m["Lam"][:, eta], m["nu"]
    processes = list(panel.outcomes)
    index = {u: i for i, u in enumerate(panel.units)}
    cells = [(u, p) for u in units for p in processes]
    cols = min(3, len(cells))
    rows = math.ceil(len(cells) / cols)
    fig = _figure(3.4 * cols, 2.6 * rows + 0.6)
    axes = fig.subplots(rows, cols, squeeze=False)
    for ax in axes.ravel()[len(cells):]:
        ax.set_visible(False)
    shapes = ["o", "s", "^", "D", "v", "P"]
    x = np.arange(T)
    level = table.attrs.get("interval", 0.9)
    for ax, (unit, process) in zip(axes.ravel(), cells):
        k = processes.index(process)
        t = table[(table["unit"] == unit) & (table["process"] == process)]
        ax.fill_between(x, t["lower"], t["upper"], color=_BAND90, lw=0,
                        label=f"{process} (latent), {level:.0%} interval")
        ax.plot(x, t["mean"], color=_LINE, lw=1.4, label=f"{process} (latent), posterior mean")
        j_shape = 0
        for j, (owner, name) in enumerate(observed_owners(panel)):
            if owner != process:
                continue
            rows_y = [j * T + w for w in range(T)]
            loading = lam[rows_y, k * T + x]
            y = panel.y[index[unit], :, j]
            on_scale = (y - nu[rows_y]) / np.where(loading == 0, np.nan, loading)
            label = name if panel.indicators[process] == (process,) else f"{name} (on the marker's scale)"
            ax.scatter(x, on_scale, s=16, zorder=3, marker=shapes[j_shape % len(shapes)],
                       color="black", facecolors="none" if j_shape else "black", label=label)
            j_shape += 1
        ax.set_xticks(x, [str(w) for w in panel.waves], fontsize=7)
        ax.set_title(f"unit {unit}: {process}", fontsize=9)
        ax.set_xlabel("wave")
    axes[0][0].legend(fontsize=6, loc="best")
    model = table.attrs.get("model")
    fig.suptitle("Latent trajectories given each unit's indicators" + (f": {model}" if model else ""),
                 fontsize=10)
    return fig


def plot_category_shares(fit_or_table, *, draws: int = 200, seed=0):
    """Plot each category's observed share per wave against its replicated 50% and 90% bands.

    Parameters
    ----------
    fit_or_table : CategoricalFit or pandas.DataFrame
        A fit with categorical variables (then
        :func:`bayeslong.evaluate.category_checks.category_ppc` is run) or its ``shares``
        table.
    draws, seed : passed to ``category_ppc`` when a fit is given.

    Returns
    -------
    matplotlib.figure.Figure
        One row per categorical variable, one column per category; flagged shares
        (p < 0.05 or > 0.95) are drawn as red points.
    """
    if isinstance(fit_or_table, pd.DataFrame):
        table = fit_or_table
    else:
        from bayeslong.evaluate.category_checks import category_ppc

        table = category_ppc(fit_or_table, draws=draws, seed=seed)["shares"]
    _need_columns(table, ("variable", "wave", "category", "observed", "rep_q05", "rep_q25",
                          "rep_q75", "rep_q95", "flag"), "plot_category_shares")
    variables = list(dict.fromkeys(table["variable"]))
    width = max(len(dict.fromkeys(table.loc[table["variable"] == v, "category"]))
                for v in variables)
    fig = _figure(2.7 * width + 0.6, 2.5 * len(variables) + 0.4)
    axes = fig.subplots(len(variables), width, squeeze=False, sharey="row")
    for r, var in enumerate(variables):
        rows = table[table["variable"] == var]
        categories = list(dict.fromkeys(rows["category"]))
        for c in range(width):
            ax = axes[r][c]
            if c >= len(categories):
                ax.set_visible(False)
                continue
            t = rows[rows["category"] == categories[c]]
            x = np.arange(len(t))
            ax.fill_between(x, t["rep_q05"], t["rep_q95"], color=_BAND90, label="replicated 90%")
            ax.fill_between(x, t["rep_q25"], t["rep_q75"], color=_BAND50, label="replicated 50%")
            ax.plot(x, t["observed"], color="black", lw=1)
            flag = t["flag"].to_numpy(dtype=bool)
            obs = t["observed"].to_numpy(dtype=float)
            ax.scatter(x[~flag], obs[~flag], color="black", s=16, zorder=3, label="observed")
            if flag.any():
                ax.scatter(x[flag], obs[flag], color=_FLAG, s=22, zorder=4,
                           label="observed, p < 0.05 or > 0.95")
            ax.set_xticks(x, [str(w) for w in t["wave"]])
            ax.set_title(f"{var} = {categories[c]}", fontsize=9)
            ax.set_xlabel("wave")
            if c == 0:
                ax.set_ylabel("share of units")
            if r == 0 and c == 0:
                ax.legend(fontsize=7, loc="best")
    model = table.attrs.get("model")
    fig.suptitle("Category shares per wave" + (f": {model}" if model else ""), fontsize=11)
    return fig
