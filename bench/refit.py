"""Refit cost with a compiled model reused: a 10-point prior grid on one dataset and 10
simulated datasets of the same design, each as a ratio to one (first, compiling) fit.

Command:  cd /work/main && .venv/bin/python bench/refit.py [sampler] [N] [draws] [chains]
Default:  pymc, alt, N = 500, T = 6, 2 chains x 500 draws.
Machine:  2-core Linux VM shared with other jobs; timings are noisy.
Target (issue 3): each set of 10 at most 3 times one fit.
"""

import sys
import time
import warnings

import numpy as np

warnings.filterwarnings("ignore")

import bayeslong as bl  # noqa: E402

# --- simulated alt panels: y ~ N(c, Sigma) at known values (numpy draws) -------------
from bayeslong.moments import moments_at  # noqa: E402
from bayeslong.structure import build_structure  # noqa: E402

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


def main():
    sampler = sys.argv[1] if len(sys.argv) > 1 else "pymc"
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 500
    draws = int(sys.argv[3]) if len(sys.argv) > 3 else 500
    chains = int(sys.argv[4]) if len(sys.argv) > 4 else 2
    kw = dict(draws=draws, tune=draws, chains=chains, sampler=sampler, progressbar=False)
    spec, panel = simulate_alt(n, seed=1)
    t0 = time.perf_counter()
    first = bl.fit(spec, panel, seed=1, **kw)
    one = time.perf_counter() - t0
    print(f"first fit (compiles): {one:.1f} s  {first.timing}", flush=True)
    t0 = time.perf_counter()
    grid = np.linspace(0.1, 1.0, 10)
    for sd in grid:
        bl.fit(spec, panel, seed=1, priors={"lag": ("normal", 0.0, float(sd))}, **kw)
    g = time.perf_counter() - t0
    print(f"10-point prior grid on lag SD: {g:.1f} s = {g / one:.2f} x one fit", flush=True)
    t0 = time.perf_counter()
    for s in range(10):
        _, p = simulate_alt(n, seed=100 + s)
        bl.fit(spec, p, seed=1, **kw)
    d = time.perf_counter() - t0
    print(f"10 simulated datasets: {d:.1f} s = {d / one:.2f} x one fit", flush=True)


if __name__ == "__main__":
    main()
