"""Cost of one log-likelihood + gradient evaluation of `alt` at N = 100 and N = 100,000.

The engine works on pattern-grouped cross-products (docs/engine.md), so one evaluation
should cost the same whatever the number of units. Prints the median time of repeated
evaluations at each N and their ratio (target: below 2), for both engines side by side:
the NumPy one that maximum likelihood calls and the compiled PyTensor graph the sampler
differentiates.

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
from bayeslong.threads import single_thread  # noqa: E402
from bayeslong.infer.likelihood import loglik_function, pattern_arrays  # noqa: E402
from bayeslong.infer.loglik_op import compiled_loglik_function  # noqa: E402
from bayeslong.model.structure import structure_for  # noqa: E402


ENGINES = {"numpy": loglik_function, "pytensor": compiled_loglik_function}


def time_eval(panel, engine, repeats=1000):
    s = structure_for(bl.model("alt", residuals="equal"), panel)
    f = ENGINES[engine](s)
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
        for engine, missing in [(e, m) for m in (0.0, 0.1) for e in ENGINES]:
            small, p_small = time_eval(alt_panel(100, missing=missing, seed=2), engine)
            large, p_large = time_eval(alt_panel(100_000, missing=missing, seed=3), engine)
            label = "complete data" if not missing else f"{missing:.0%} intermittent missing"
            print(f"alt, T = 6, {label}, {engine} engine:")
            print(f"  N = 100     : {small * 1e3:8.3f} ms per loglik+gradient ({p_small} patterns)")
            print(f"  N = 100,000 : {large * 1e3:8.3f} ms per loglik+gradient ({p_large} patterns)")
            print(f"  ratio       : {large / small:8.2f}  (target < 2)")


if __name__ == "__main__":
    main()
