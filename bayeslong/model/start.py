"""Data-based start values for optimisation, sampling and the identification check.

Documented rules, no fitting: a point inside the parameter space near the data, from which
maximum likelihood starts, NUTS chains start, and the identification check draws its
random points (docs/engine.md, "Start values").
"""

from __future__ import annotations

import numpy as np

from bayeslong.model.structure import Structure


def start_values(structure: Structure, panel) -> np.ndarray:
    """Data-based start values, one per parameter (documented rules, no fitting).

    Means start at the first wave's mean (level, initial) or the overall mean
    (intercepts); slope means at the average change per wave; lags, effects and
    covariances at 0; variances at half the outcome's variance (the slope's divided by
    (T-1)^2); free time scores at their linear values.
    """
    y = panel.y  # (N, T, K)
    T = panel.n_waves
    first = np.nanmean(y[:, 0, :], axis=0)
    last = np.nanmean(y[:, -1, :], axis=0)
    overall = np.nanmean(y, axis=(0, 1))
    var = np.nanvar(y.reshape(-1, y.shape[2]), axis=0)
    proc = {name: k for k, name in enumerate(panel.outcomes)}

    def which(name: str) -> int:
        if "[" in name:
            for key in name[name.index("[") + 1:-1].replace("<-", ",").split(","):
                if key in proc:
                    return proc[key]
        return 0

    theta = np.zeros(structure.n_params)
    for i, (name, kind) in enumerate(zip(structure.names, structure.kinds)):
        k = which(name)
        if kind == "mean":
            theta[i] = {"level": first[k], "initial": first[k],
                        "slope": (last[k] - first[k]) / max(T - 1, 1)}.get(name.split("_")[0], 0.0)
        elif kind == "intercept":
            theta[i] = overall[k] if name.startswith("intercept") else 0.0
        elif kind == "loading":
            if name.startswith("slope_score"):
                theta[i] = float(name.rsplit(",", 1)[-1].rstrip("]").split("[")[-1]) - 1.0
            elif name.startswith("initial_on_level"):
                theta[i] = 1.0
        elif kind == "var":
            scale = 1.0 / max(T - 1, 1) ** 2 if name.startswith(("slope", "curve")) else 1.0
            theta[i] = 0.5 * var[k] * scale
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
