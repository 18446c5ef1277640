"""Default fits near a variance boundary: ALT panels whose slope SD is small (0.05).

20 invented alt panels (N = 120, T = 5; slope SD 0.05, other values below), drawn from the
implied moments with seeds 1..20. Each is fitted with default settings (``bl.fit``: priors,
4 chains x 1000 draws after 1000 warm-up, sampler "auto") and refitted on waves 1-4 for
leave-future-out (``bl.forecast_score``, the refit ``compare(future=True)`` makes). A fit
is clean when it has no divergent transition, R-hat < 1.01 and bulk and tail ESS > 400
for every parameter (the thresholds ``Fit.diagnostics`` flags at 4 chains).

Command:  cd /work/main && PYTHONPATH=. .venv/bin/python bench/boundary.py [--panels 20]
Prints:   the load before and after, one line per panel (divergences, worst R-hat, lowest
          bulk and tail ESS and the parameter, and whether the leave-future-out refit was
          clean), then the counts of clean fits and clean refits.
"""

import argparse
import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))

import bayeslong as bl  # noqa: E402
from bayeslong.model.moments import moments_at  # noqa: E402
from bayeslong.model.structure import build_structure  # noqa: E402

# invented values: a clear lag, growth, a slope whose SD (0.05) sits near the boundary
VALUES = {"level_mean": 2.0, "slope_mean": 0.2, "lag": 0.3, "initial_mean": 2.0,
          "level_var": 0.6, "level_slope_cov": 0.0, "slope_var": 0.05 ** 2, "initial_var": 1.0,
          "initial_level_cov": 0.3, "initial_slope_cov": 0.0}
RESID_VAR = 0.4


def panel_for(seed: int, n_units: int = 120, n_waves: int = 5):
    spec = bl.model("alt")
    s = build_structure(spec, outcomes=["y"], n_waves=n_waves)
    theta = np.array([VALUES.get(name, RESID_VAR) for name in s.names])
    c, _, sigma = moments_at(s, theta)
    y = np.random.default_rng(seed).multivariate_normal(c, sigma, size=n_units)
    return spec, bl.Panel(units=tuple(range(n_units)), waves=tuple(range(1, n_waves + 1)),
                          outcomes=("y",), y=y[:, :, None])


def verdict(diag) -> tuple[bool, str]:
    worst_rhat = diag["r_hat"].idxmax()
    low_bulk, low_tail = diag["ess_bulk"].idxmin(), diag["ess_tail"].idxmin()
    div = int(diag.attrs.get("divergences", 0))
    clean = (div == 0 and diag["r_hat"].max() < 1.01 and diag["ess_bulk"].min() > 400
             and diag["ess_tail"].min() > 400)
    text = (f"div {div:2d}  R-hat {diag['r_hat'].max():.3f} ({worst_rhat})  "
            f"bulk {diag['ess_bulk'].min():5.0f} ({low_bulk})  tail {diag['ess_tail'].min():5.0f} "
            f"({low_tail})")
    return clean, text


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--panels", type=int, default=20)
    ap.add_argument("--no-lfo", action="store_true", help="skip the leave-future-out refits")
    args = ap.parse_args()
    print("command: PYTHONPATH=. .venv/bin/python bench/boundary.py " + " ".join(sys.argv[1:]))
    print(f"before: load average {os.getloadavg()}", flush=True)
    t0 = time.perf_counter()
    clean_fits = clean_refits = reruns = 0
    for seed in range(1, args.panels + 1):
        spec, panel = panel_for(seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f = bl.fit(spec, panel, progressbar=False)
            ok, text = verdict(f.diagnostics())
            clean_fits += ok
            reruns += bool(f.rerun)
            line = (f"panel {seed:2d} [{f.sampler}, target_accept {f.target_accept}]: "
                    f"{'clean  ' if ok else 'FLAGGED'} {text}")
            if not args.no_lfo:
                score = bl.forecast_score(spec, panel, progressbar=False)
                refit_ok = not score.problems
                clean_refits += refit_ok
                line += "  | LFO refit " + ("clean" if refit_ok else
                                            "FLAGGED: " + score.problems[0][:120])
        print(line, flush=True)
    print(f"clean fits: {clean_fits} of {args.panels} ({reruns} sampled again at the careful "
          "target acceptance after a flagged first run)")
    if not args.no_lfo:
        print(f"clean leave-future-out refits: {clean_refits} of {args.panels}")
    print(f"wall {time.perf_counter() - t0:.0f} s; after: load average {os.getloadavg()}")


if __name__ == "__main__":
    main()
