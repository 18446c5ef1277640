"""Does the fast sampler start on small samples? Count fallbacks to PyMC's NUTS.

Measures: on invented ALT panels (T = 5, N = 20-60, seeds 0..panels-1) of two kinds --
"moderate" (``_panels.ALT_TRUE``) and "test scale" (mean 100, SD 15, slope variance 0.01,
near zero) -- each fitted under the default priors and under the prior grid's tight lag
prior Normal(0, 0.1), how many fits nutpie could not start (``Fit.sampler == "pymc"``
after nutpie's "All initialization points failed"), with the start point of
:func:`bayeslong.model.start.sampler_start` (now; the default path) and, with ``--starts
before`` or ``both``, with the plain data-based :func:`bayeslong.model.start.start_values`
(before). Every fit is ``bl.fit(..., sampler="auto")``. Each setting runs in a
fresh process, so the compiled model starts from that setting's own first start.

Command (2 chains x 200 draws, 200 warm-up, per fit keep it short; the start is what is
measured; ``--starts both`` adds the data-based start, whose fallbacks each cost a PyMC fit):

    PYTHONPATH=. .venv/bin/python bench/small_start.py [--panels 50] [--starts now|before|both]

Prints the command, the load (uptime) before and after, each fallback with nutpie's full
message, and per kind and start the fits, the fallbacks, the wall time and the samplers the
fits ended with (``generic`` = nutpie on the generic kernel, the default path).

Measured on the default path (``sampler="auto"``, i.e. nutpie on the generic kernel, nudged
start), ``--panels 50`` (2-core machine shared with other jobs, load average 1.9 before and
6.0 after, numba cache warm):

    moderate, nudged start      fits 100  fallbacks to PyMC 0  wall  67.0 s  {'generic': 100}
    test scale, nudged start    fits 100  fallbacks to PyMC 0  wall 132.2 s  {'generic': 100}

i.e. 0 of 50 panels per kind fell back, under the default priors (50 fits per kind) and under
the grid's tight lag prior (50 fits per kind). It shows that nutpie started on these 200
fits; it says nothing about convergence (2 x 200 draws are too few to judge it) or about
other models and sizes.

Earlier (2-core machine, load average 3-5, numba cache warm; nutpie on the PyMC graph,
the default sampler then): moderate panels, 50 x 2 fits: 0 fallbacks with either start
(an earlier one-process version of this script); test-scale panels, 15 x 2 fits (seeds
0-14, same settings, by hand): 2 fallbacks with the data-based start (seed 0, N = 20,
both priors; each fell back to PyMC's NUTS at 83-146 s) and 0 with the nudged start.
With the generic kernel (`--panels 20`, load about 2): moderate panels with the data-based
start, 18 of 40 fits fell back (seeds 3, 6, 11-17, both priors); the same 9 panels from the
nudged start, default priors, 2 x 200 draws, by hand: 0 of 9.
"""

import argparse
import json
import os
import subprocess
import sys
import time
import warnings

sys.path.insert(0, os.path.dirname(__file__))

import numpy as np  # noqa: E402
from _panels import simulate_alt  # noqa: E402

import bayeslong as bl  # noqa: E402
from bayeslong.model import start as start_module  # noqa: E402

TIGHT = {"lag": ("normal", 0.0, 0.1)}

#: Test-score scale with a slope variance near zero (the kind of panel where nutpie failed).
TEST_SCALE = {"level_mean": 100.0, "slope_mean": 2.0, "lag": 0.3, "initial_mean": 100.0,
              "level_var": 150.0, "level_slope_cov": 0.0, "slope_var": 0.01,
              "initial_level_cov": 100.0, "initial_slope_cov": 0.0, "initial_var": 225.0}


def _panel(kind: str, n: int, seed: int):
    if kind == "moderate":
        return simulate_alt(n, n_waves=5, seed=seed)
    from bayeslong.model.moments import moments_at
    from bayeslong.model.structure import build_structure

    spec = bl.model("alt")
    s = build_structure(spec, outcomes=["y"], n_waves=5)
    c, _, sigma = moments_at(s, np.array([TEST_SCALE.get(k, 60.0) for k in s.names]))
    y = np.random.default_rng(seed).multivariate_normal(c, sigma, size=n)
    return spec, bl.Panel(units=tuple(range(n)), waves=tuple(range(1, 6)), outcomes=("y",),
                          y=y[:, :, None])


def run(panels: int, old: bool, kind: str) -> dict:
    real = start_module.sampler_start
    if old:  # the start point before the nudge: the data-based values themselves
        start_module.sampler_start = lambda s, p, seed=0: start_module.start_values(s, p)
    fallbacks, fits, samplers, t0 = [], 0, {}, time.perf_counter()
    try:
        for seed in range(panels):
            n = 20 + 10 * (seed % 5)
            spec, panel = _panel(kind, n, seed)
            for label, priors in (("default", None), ("tight lag", TIGHT)):
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    fit = bl.fit(spec, panel, draws=200, tune=200, chains=2, seed=seed, sampler="auto",
                                 priors=priors)
                fits += 1
                samplers[fit.sampler] = samplers.get(fit.sampler, 0) + 1
                if fit.sampler == "pymc":  # nutpie (either engine) could not start
                    fallbacks.append((seed, n, label))
                    print(f"  fallback: seed {seed}, N = {n}, {label} priors: "
                          + "; ".join(str(w.message) for w in caught
                                      if "nutpie" in str(w.message)), flush=True)
    finally:
        start_module.sampler_start = real
    return {"fits": fits, "fallbacks": len(fallbacks), "samplers": samplers,
            "seconds": time.perf_counter() - t0}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--panels", type=int, default=50)
    ap.add_argument("--starts", choices=("now", "before", "both"), default="now",
                    help="nudged start (now, the default path), data-based (before), or both")
    ap.add_argument("--one", nargs=2, metavar=("KIND", "START"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:  # a child process: one setting
        print("RESULT " + json.dumps(run(args.panels, args.one[1] == "before", args.one[0])))
        return
    print("command:", " ".join([os.path.basename(sys.executable), *sys.argv]))
    print("before:", _uptime(), flush=True)
    starts = ("before", "now") if args.starts == "both" else (args.starts,)
    rows = {}
    for kind in ("moderate", "test scale"):
        for start in starts:
            out = subprocess.run([sys.executable, __file__, "--panels", str(args.panels),
                                  "--one", kind, start], capture_output=True, text=True)
            lines = out.stdout.splitlines()
            if out.returncode:
                raise SystemExit(f"{kind}, {start}: the child process failed\n{out.stderr}")
            print("\n".join(x for x in lines if x.startswith("  fallback")), flush=True)
            rows[(kind, start)] = json.loads(next(x for x in lines if x.startswith("RESULT"))[7:])
    for (kind, start), r in rows.items():
        label = f"{kind}, {'data-based start' if start == 'before' else 'nudged start'}"
        print(f"{label:36s} fits {r['fits']:4d}  fallbacks to PyMC {r['fallbacks']:3d}  "
              f"wall {r['seconds']:7.1f} s  samplers used {r['samplers']}")
    if args.starts == "both":
        for kind in ("moderate", "test scale"):
            a, b = rows[(kind, "before")], rows[(kind, "now")]
            print(f"{kind}: wall ratio data-based/nudged "
                  f"{a['seconds'] / max(b['seconds'], 1e-9):.2f}")
    print("after: ", _uptime())


def _uptime() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip()
    except OSError:
        return f"load average {os.getloadavg()}"


if __name__ == "__main__":
    main()
