"""Data-based start values for optimisation, sampling and the identification check.

Documented rules, no fitting: a point inside the parameter space near the data, from which
maximum likelihood starts, NUTS chains start, and the identification check draws its
random points (docs/engine.md, "Start values").
"""

from __future__ import annotations

import warnings

import numpy as np

from bayeslong.model.structure import Structure


def start_values(structure: Structure, panel) -> np.ndarray:
    """Data-based start values, one per parameter (documented rules, no fitting).

    Means start at the first wave's mean (level, initial) or the overall mean
    (intercepts); slope means at the average change per wave; lags, effects and
    covariances at 0; variances at half the outcome's variance (the slope's divided by
    (T-1)^2); free time scores at their linear values.

    A process measured by several indicators takes its first indicator's values (the
    default marker). Indicator loadings start at 1 (a cross-loading on another process, like
    a same-wave path, at 0), intercepts at the indicator's overall
    mean minus its process's first indicator's (the marker's own free intercepts at 0),
    unique variances at half the indicator's variance, their covariances at 0. In the
    within form an indicator's intercept is its mean, so it starts at the indicator's
    overall mean, its random intercept's variance at half the indicator's variance, and
    the within factor's wave intercepts at 0.
    """
    y = panel.y  # (N, T, J): the observed variables (J = K with one indicator per process)
    T = panel.n_waves
    with warnings.catch_warnings():  # an indicator missing at a whole wave has no mean there
        warnings.simplefilter("ignore", RuntimeWarning)
        first = np.nanmean(y[:, 0, :], axis=0)
        last = np.nanmean(y[:, -1, :], axis=0)
    first = np.where(np.isnan(first), np.nanmean(y, axis=(0, 1)), first)
    last = np.where(np.isnan(last), np.nanmean(y, axis=(0, 1)), last)
    overall = np.nanmean(y, axis=(0, 1))
    var = np.nanvar(y.reshape(-1, y.shape[2]), axis=0)
    observed = list(panel.observed_names)
    proc = {name: observed.index(group[0]) for name, group in panel.indicators.items()}
    marker_of = {n: observed.index(group[0]) for group in panel.indicators.values() for n in group}
    own = {n: v for v, n in enumerate(observed) if n not in proc}
    within = structure.spec.form == "within"
    several = {name for name, group in panel.indicators.items() if len(group) > 1}

    def which(name: str) -> int:
        if "[" in name:
            for key in name[name.index("[") + 1:-1].replace("<-", ",").split(","):
                if key in proc:
                    return proc[key]
                if key in own:  # an indicator's own random intercept (within form)
                    return own[key]
        return 0

    theta = np.zeros(structure.n_params)
    for i, (name, kind) in enumerate(zip(structure.names, structure.kinds)):
        k = which(name)
        keys = name[name.index("[") + 1:-1].split(",") if "[" in name else []
        if keys and keys[0] in own and name.startswith(("loading[", "intercept[", "unique_")):
            v = own[keys[0]]  # a parameter of indicator v's measurement part
            if name.startswith("loading["):
                theta[i] = 1.0
            elif name.startswith("intercept[") and within:
                theta[i] = overall[v]
            elif name.startswith("intercept["):
                theta[i] = 0.0 if v == marker_of[keys[0]] else overall[v] - overall[marker_of[keys[0]]]
            elif name.startswith("unique_var["):
                theta[i] = 0.5 * var[v]
            continue
        if kind == "mean":
            theta[i] = {"level": first[k], "initial": first[k],
                        "slope": (last[k] - first[k]) / max(T - 1, 1)}.get(name.split("_")[0], 0.0)
        elif kind == "intercept":
            within_mean = within and keys and keys[0] in several
            theta[i] = overall[k] if name.startswith("intercept") and not within_mean else 0.0
        elif kind == "loading":
            if name.startswith("slope_score"):
                theta[i] = float(name.rsplit(",", 1)[-1].rstrip("]").split("[")[-1]) - 1.0
            elif name.startswith("initial_on_level"):
                theta[i] = 1.0
        elif kind == "var":
            scale = 1.0 / max(T - 1, 1) ** 2 if name.startswith(("slope", "curve")) else 1.0
            theta[i] = 0.5 * var[k] * scale
    return theta


#: How far :func:`sampler_start` moves each start value: means and intercepts by this many
#: outcome SDs, lags, effects and loadings by this much, variances by this factor (log scale).
NUDGE = {"mean": 0.1, "intercept": 0.1, "lag": 0.05, "effect": 0.05, "loading": 0.05, "var": 0.2}


def sampler_start(structure: Structure, panel, seed: int = 0) -> np.ndarray:
    """Start values for NUTS: :func:`start_values` moved a little off the data's centre.

    The data-based start sits exactly where some gradient entries vanish: the first-wave
    mean is the sample mean of wave 1 and also the centre of its default prior, so the
    derivative of the log density with respect to ``initial_mean`` is 0 up to rounding
    (measured: exactly 0.0 on 3 of 12 simulated 20-60-unit ALT panels, about 1e-15 on the
    rest). A sampler whose first mass matrix is set from the gradient's magnitudes, as
    nutpie's is, should not start there, and every chain starts at the same point (no
    jitter). Moving every value by a small fixed-seed amount (a tenth of an outcome SD for
    means, 0.05 for slopes of one latent on another, a fifth on the log scale of a
    variance; :data:`NUDGE`) puts the start at an ordinary point of the posterior. (It is
    not shown to be the cause of nutpie's "All initialization points failed": with the
    old start, 100 fits of bench/small_start.py all started.)
    """
    theta = start_values(structure, panel)
    rng = np.random.default_rng(seed)
    sd = np.sqrt(np.nanvar(panel.y.reshape(-1, panel.y.shape[2]), axis=0))
    # a direction with entries of size 0.5-1 and random signs: never zero
    step = rng.uniform(0.5, 1.0, size=len(theta)) * rng.choice([-1.0, 1.0], size=len(theta))
    for i, kind in enumerate(structure.kinds):
        if kind in ("mean", "intercept"):
            theta[i] += NUDGE[kind] * float(np.nanmean(sd)) * step[i]
        elif kind == "var":
            theta[i] *= np.exp(NUDGE["var"] * step[i])
        elif kind in NUDGE:
            theta[i] += NUDGE[kind] * step[i]
    return theta


def own_name(name: str, outcome: str, outcomes) -> str | None:
    """The name ``name`` has in the single-process model of ``outcome``, or None.

    A parameter of a multi-process model belongs to one process when every outcome key in
    its brackets is that outcome (``level_var[y1]``, ``lag[y1<-y1]``, ``resid_var[y1,3]``);
    dropping those keys gives its single-process name (``level_var``, ``lag``,
    ``resid_var[3]``). Cross terms (``lag[y1<-y2]``, ``level_cov[y1,y2]``) give None.
    """
    base, _, rest = name.partition("[")
    keys = rest.rstrip("]").split(",") if rest else []
    own = [k for k in keys if k in outcomes or "<-" in k]
    if not own or any(k not in (outcome, f"{outcome}<-{outcome}") for k in own):
        return None
    kept = [k for k in keys if k not in own]
    return f"{base}[{','.join(kept)}]" if kept else base


def combine_processes(structure: Structure, fits: dict, base: np.ndarray) -> np.ndarray:
    """Start values of a multi-process model from its processes' single-process fits.

    ``fits`` maps each outcome to ``{single-process name: estimate}``. Each process's own
    parameters take their single-process estimates; cross-lags and cross-process
    covariances start at 0 (the processes independent, which is where the joint model
    nests its parts); anything else keeps its value in ``base``. This builds a bivariate
    model from its univariate parts (Curran, P. J. & Bollen, K. A. 2001, The best of both
    worlds: combining autoregressive and latent curve models, in Collins & Sayer (eds.),
    New Methods for the Analysis of Change, APA).
    """
    theta = np.array(base, dtype=float)
    for i, (name, kind) in enumerate(zip(structure.names, structure.kinds)):
        owners = [o for o in structure.outcomes if own_name(name, o, structure.outcomes) is not None]
        if owners:
            value = fits.get(owners[0], {}).get(own_name(name, owners[0], structure.outcomes))
            if value is not None:
                theta[i] = value
        elif kind in ("lag", "cov"):
            theta[i] = 0.0
    return theta
