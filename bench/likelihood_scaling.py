"""Cost of one log-likelihood + gradient evaluation of `alt` at N = 100 and N = 100,000.

The engine works on pattern-grouped cross-products (DESIGN section 2), so one evaluation
should cost the same whatever the number of units. Prints the median time of repeated
evaluations at each N and their ratio (target: below 2).

Run: .venv/bin/python bench/likelihood_scaling.py
"""

import platform
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from _panels import ALT_VALUES, alt_panel  # noqa: E402

import bayeslong as bl  # noqa: E402
from bayeslong._threads import single_thread  # noqa: E402
from bayeslong.likelihood import loglik_function, pattern_arrays  # noqa: E402
from bayeslong.structure import structure_for  # noqa: E402


def time_eval(panel, repeats=200):
    s = structure_for(bl.model("alt", residuals="equal"), panel)
    f = loglik_function(s)
    theta = np.array([ALT_VALUES[n] for n in s.names])
    data = pattern_arrays(panel.patterns())
    f(theta, *data)  # warm
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        f(theta, *data)
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), panel.patterns().n_patterns


def main():
    print(f"machine: {platform.processor() or platform.machine()}, python {platform.python_version()}")
    with single_thread():
        for missing in (0.0, 0.1):
            small, p_small = time_eval(alt_panel(100, missing=missing, seed=2))
            large, p_large = time_eval(alt_panel(100_000, missing=missing, seed=3))
            label = "complete data" if not missing else f"{missing:.0%} intermittent missing"
            print(f"alt, T = 6, {label}:")
            print(f"  N = 100     : {small * 1e3:8.3f} ms per loglik+gradient ({p_small} patterns)")
            print(f"  N = 100,000 : {large * 1e3:8.3f} ms per loglik+gradient ({p_large} patterns)")
            print(f"  ratio       : {large / small:8.2f}  (target < 2)")


if __name__ == "__main__":
    main()
