"""Cost of one log density + gradient: the generic numba kernel against the NumPy engine.

The generic kernel (bayeslong.infer.generic_logp.logp_function: log posterior and gradient
at an unconstrained point, called from Python, so the call overhead is included) against
bayeslong.infer.likelihood.loglik_and_grad (the NumPy log-likelihood and gradient by the
complex step, which a Python-callback sampler would have to call), on alt (N = 500, T = 6)
with complete data and with 10% of waves missing. Median of 5 x 200 calls, one BLAS thread.

Command:  cd /work/main && .venv/bin/python bench/kernel_eval.py
"""

import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np

warnings.filterwarnings("ignore")
sys.path.insert(0, str(Path(__file__).parent))

import bayeslong as bl  # noqa: E402
from _panels import alt_panel, simulate_alt  # noqa: E402
from bayeslong.infer.generic_logp import logp_function, start_x  # noqa: E402
from bayeslong.infer.likelihood import loglik_and_grad, pattern_arrays  # noqa: E402
from bayeslong.infer.priors import resolve_priors  # noqa: E402
from bayeslong.model.start import start_values  # noqa: E402
from bayeslong.model.structure import structure_for  # noqa: E402
from bayeslong.threads import single_thread  # noqa: E402


def median_us(call) -> float:
    call()
    times = []
    for _ in range(5):
        t0 = time.perf_counter()
        for _ in range(200):
            call()
        times.append((time.perf_counter() - t0) / 200)
    return float(np.median(times)) * 1e6


def main():
    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print("load average", os.getloadavg())
    cases = {"complete": simulate_alt(500, seed=1),
             "10% missing": (bl.model("alt", residuals="equal"), alt_panel(500, 6, missing=0.1))}
    for label, (spec, panel) in cases.items():
        structure = structure_for(spec, panel)
        f = logp_function(structure, resolve_priors(structure, panel), panel)
        x = start_x(f.layout, panel)
        theta = start_values(structure, panel)
        arrays = pattern_arrays(panel.patterns())
        with single_thread():
            kernel = median_us(lambda: f(x))
            numpy = median_us(lambda: loglik_and_grad(structure, theta, *arrays))
        print(f"alt N=500 T=6 {label:<12} {panel.patterns().n_patterns:3d} patterns: generic kernel "
              f"{kernel:7.1f} us, NumPy engine {numpy:7.1f} us (ratio {numpy / kernel:5.1f})")


if __name__ == "__main__":
    main()
