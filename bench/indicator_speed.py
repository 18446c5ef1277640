"""What several indicators per wave cost: one likelihood evaluation, and a Bayesian fit.

1. One log-likelihood + gradient (the NumPy engine maximum likelihood uses, and the generic
   numba kernel the sampler calls) of alt with 3 indicators x 6 waves (18 observed
   variables) at N = 100 and N = 100,000, complete data and with monotone dropout (10% per
   wave). The engine works on pattern-grouped cross-products, so the cost follows the
   number of missing-data patterns, not N. Prints the median time and the ratio.
2. A Bayesian fit (default sampler and priors, 4 chains x 1000 draws after 1000 warm-up)
   of alt with 3 indicators x 5 waves, N = 300, against the single-indicator fit of the
   same design (the first indicator alone), each after a warm-up fit that loads the
   kernel: sampling seconds, ESS of the lag and the ratio of sampling times.

Invented data from ``bl.simulate`` with fixed seeds (values below).

Command:  cd /work/main && PYTHONPATH=. .venv/bin/python bench/indicator_speed.py
"""

import os
import sys
import time
import warnings

import numpy as np

import bayeslong as bl
from bayeslong.infer.generic_logp import logp_function
from bayeslong.infer.likelihood import loglik_and_grad, pattern_arrays
from bayeslong.infer.priors import resolve_priors
from bayeslong.model.start import start_values
from bayeslong.model.structure import structure_for
from bayeslong.threads import single_thread

INDICATORS = ["y_a", "y_b", "y_c"]
# invented values: growth with a lag on the latent, three indicators of unequal quality
STRUCTURAL = {"level_mean": 3.0, "slope_mean": 0.2, "lag": 0.3, "initial_mean": 3.0,
              "level_var": 0.5, "level_slope_cov": 0.02, "slope_var": 0.04,
              "initial_level_cov": 0.2, "initial_slope_cov": 0.0, "initial_var": 0.8,
              "resid_var": 0.3}
def indicator_panel(n_units, n_waves, seed, dropout=0.0, single=False):
    spec = bl.model("alt", residuals="equal")
    values = dict(STRUCTURAL)
    # unique variances and covariances of every indicator: one value per base name
    values.update({"loading[y_b]": 0.8, "loading[y_c]": 1.2, "intercept[y_b]": 0.5,
                   "intercept[y_c]": -0.4})
    from bayeslong.model.simulation import Simulation

    names = Simulation(spec=spec, params={}, n_units=2, n_waves=n_waves, seed=0, covariates={},
                       time_invariant={}, outcomes=None, missing=None,
                       indicators={"y": INDICATORS}, categorical=None).structure.names
    for name in names:  # each indicator's unique variance and covariances over waves
        if name.startswith("unique_var["):
            values[name] = 0.3
        elif name.startswith("unique_cov["):
            values[name] = 0.05
    df = bl.simulate(spec, values, n_units, n_waves, seed=seed, indicators={"y": INDICATORS},
                     missing={"dropout": dropout} if dropout else None)
    if single:
        return spec, bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y_a"])
    return spec, bl.Panel.from_long(df, unit="unit", wave="wave",
                                    outcomes={"y": INDICATORS})


def median_time(f, repeats):
    f()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def likelihood_part():
    print("1. one log-likelihood + gradient, alt, 3 indicators x 6 waves (18 observed)")
    for dropout in (0.0, 0.1):
        row = {}
        for n in (100, 100_000):
            spec, panel = indicator_panel(n, 6, seed=2, dropout=dropout)
            s = structure_for(spec, panel)
            theta = start_values(s, panel)
            data = pattern_arrays(panel.patterns())
            numpy_t = median_time(lambda: loglik_and_grad(s, theta, *data), 50)
            kernel = logp_function(s, resolve_priors(s, panel, None), panel)
            x = kernel.layout.to_x(theta)
            kernel_t = median_time(lambda: kernel(x), 200)
            row[n] = (numpy_t, kernel_t, len(data[0]))
        a, b = row[100], row[100_000]
        print(f"   dropout {dropout:.0%}: patterns {a[2]} and {b[2]}; NumPy {a[0] * 1e3:.2f} ms "
              f"-> {b[0] * 1e3:.2f} ms (ratio {b[0] / a[0]:.2f}); numba kernel "
              f"{a[1] * 1e6:.0f} us -> {b[1] * 1e6:.0f} us (ratio {b[1] / a[1]:.2f})", flush=True)


def fit_part():
    print("2. Bayesian fit, alt, 5 waves, N = 300, 4 chains x 1000 draws (default sampler)")
    out = {}
    for label, single in (("3 indicators", False), ("1 indicator", True)):
        spec, panel = indicator_panel(300, 5, seed=3, single=single)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            bl.fit(spec, panel, draws=50, tune=50, chains=2, progressbar=False)  # load kernel
            f = bl.fit(spec, panel, progressbar=False)
        ess = float(__import__("arviz").ess(f.idata.posterior[["lag"]], method="bulk")["lag"])
        out[label] = f.timing["sample"]
        print(f"   {label}: {f.structure.n_params} parameters, sampling {f.timing['sample']:.1f} s, "
              f"ESS(lag) {ess:.0f}, target_accept {f.target_accept}, flags: "
              f"{'none' if not f.diagnostics()['flag'].any() else 'yes'}", flush=True)
    print(f"   ratio 3 indicators / 1 indicator: "
          f"{out['3 indicators'] / out['1 indicator']:.2f}")


def main():
    print("command: PYTHONPATH=. .venv/bin/python bench/indicator_speed.py " + " ".join(sys.argv[1:]))
    print(f"before: load average {os.getloadavg()}", flush=True)
    with single_thread():
        likelihood_part()
    fit_part()
    print(f"after: load average {os.getloadavg()}")


if __name__ == "__main__":
    main()
