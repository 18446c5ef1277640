"""Total fit time of alt at N = 100 and N = 10,000 in one run (the marginal engine's cost per
gradient does not depend on N; only the per-unit log-likelihood after sampling does).

Command:  cd /work/main && .venv/bin/python bench/n_scaling.py [sampler] [draws] [chains]
Default:  pymc, 2 chains x 500 draws, T = 6.
Machine:  2-core Linux VM shared with other jobs; timings are noisy.
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
    draws = int(sys.argv[2]) if len(sys.argv) > 2 else 500
    chains = int(sys.argv[3]) if len(sys.argv) > 3 else 2
    kw = dict(draws=draws, tune=draws, chains=chains, sampler=sampler, progressbar=False, seed=1)
    # warm the compile cache once so both sizes are timed as refits of one structure
    spec, small = simulate_alt(100, seed=1)
    bl.fit(spec, small, **{**kw, "draws": 20, "tune": 20})
    times = {}
    for n in (100, 10_000):
        _, panel = simulate_alt(n, seed=2)
        t0 = time.perf_counter()
        f = bl.fit(spec, panel, **kw)
        times[n] = time.perf_counter() - t0
        print(f"N={n:>6}: {times[n]:.1f} s  ESS(lag) {ess_lag(f.idata):.0f}  {f.timing}", flush=True)
    print(f"ratio N=10000 / N=100: {times[10_000] / times[100]:.2f}")


if __name__ == "__main__":
    main()
