"""Refit cost with a compiled model reused: a 10-point prior grid on one dataset and 10
simulated datasets of the same design, each as a ratio to one (first, compiling) fit.

Command:  cd /work/main && .venv/bin/python bench/refit.py [sampler] [N] [draws] [chains]
Default:  pymc, alt, N = 500, T = 6, 2 chains x 500 draws.
Machine:  2-core Linux VM shared with other jobs; timings are noisy.
Target: each set of 10 at most 3 times one fit.
"""

import sys
from pathlib import Path
import time
import warnings

import numpy as np

warnings.filterwarnings("ignore")

import bayeslong as bl  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))
from _panels import ALT_TRUE, ess_lag, simulate_alt  # noqa: E402,F401


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
