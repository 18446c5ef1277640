"""Total fit time of alt at N = 100 and N = 10,000 in one run (the marginal engine's cost per
gradient does not depend on N; only the per-unit log-likelihood after sampling does).

Command:  cd /work/main && .venv/bin/python bench/n_scaling.py [sampler] [draws] [chains]
Default:  pymc, 2 chains x 500 draws, T = 6.
Machine:  2-core Linux VM shared with other jobs; timings are noisy.
"""

import sys
from pathlib import Path
import time
import warnings


warnings.filterwarnings("ignore")

import bayeslong as bl  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))
from _panels import ALT_TRUE, ess_lag, simulate_alt  # noqa: E402,F401


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
