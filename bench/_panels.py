"""Shared helpers for the benchmarks: invented panels drawn from a model's implied moments."""

import numpy as np
import pandas as pd

import bayeslong as bl
from bayeslong.model.moments import moments_at
from bayeslong.model.structure import build_structure

ALT_VALUES = {"level_mean": 5.0, "slope_mean": 0.5, "lag": 0.3, "initial_mean": 5.0,
              "level_var": 1.0, "level_slope_cov": 0.1, "slope_var": 0.2, "initial_var": 1.5,
              "initial_level_cov": 0.5, "initial_slope_cov": 0.1, "resid_var": 0.5}


def alt_panel(n_units: int, n_waves: int = 6, seed: int = 1, missing: float = 0.0) -> bl.Panel:
    """Normal draws from the ALT (equal residuals) at fixed values; MCAR holes after wave 1."""
    s = build_structure(bl.model("alt", residuals="equal"), outcomes=["y"], n_waves=n_waves)
    c, _, sigma = moments_at(s, np.array([ALT_VALUES[n] for n in s.names]))
    rng = np.random.default_rng(seed)
    y = rng.multivariate_normal(c, sigma, size=n_units)
    if missing:
        holes = rng.uniform(size=y.shape) < missing
        holes[:, 0] = False
        y[holes] = np.nan
    df = pd.DataFrame({"id": np.repeat(np.arange(n_units), n_waves),
                       "t": np.tile(np.arange(n_waves), n_units), "y": y.ravel()})
    return bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"])


# --- simulated alt panels: y ~ N(c, Sigma) at known values (numpy draws) -------------

ALT_TRUE = {"level_mean": 10.0, "slope_mean": 1.0, "lag": 0.4, "initial_mean": 10.0,
            "level_var": 4.0, "level_slope_cov": 0.3, "slope_var": 0.5, "initial_level_cov": 2.0,
            "initial_slope_cov": 0.2, "initial_var": 5.0}  # resid_var[t] = 1.5


def simulate_alt(n_units: int, n_waves: int = 6, seed: int = 0):
    """Return (spec, panel) for alt with the values above."""
    spec = bl.model("alt")
    structure = build_structure(spec, outcomes=["y"], n_waves=n_waves)
    theta = np.array([ALT_TRUE.get(name, 1.5) for name in structure.names])
    c, _, sigma = moments_at(structure, theta)
    y = np.random.default_rng(seed).multivariate_normal(c, sigma, size=n_units)
    panel = bl.Panel(units=tuple(range(n_units)), waves=tuple(range(1, n_waves + 1)),
                     outcomes=("y",), y=y[:, :, None])
    return spec, panel


def ess_lag(idata) -> float:
    import arviz as az

    return float(az.ess(idata.posterior[["lag"]], method="bulk")["lag"])
