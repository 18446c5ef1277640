"""ESS per second of the lag and wall time: our engine with PyMC NUTS, with nutpie on the
PyMC graph (compiled per structure) and with nutpie on the generic kernel (compiled once per
machine), against a hand-written data-augmentation model with person-level latents.

Command:  cd /work/main && .venv/bin/python bench/sampler_speed.py [N] [draws] [chains] [which]
          which: comma-separated subset of pymc,nutpie,generic,augmented (default all)
Default:  alt, N = 500, T = 6, 4 chains x 1000 draws (1000 warm-up), one run of each.
Columns:  ESS/s over the whole wall time (compile included) and ESS per second of sampling
          alone ("after compilation"); ratios generic / nutpie of both at the end.
Machine:  2-core Linux VM shared with other jobs; timings are noisy (see the load average
          printed at the start).
"""

import os
import sys
from pathlib import Path
import time
import warnings

import numpy as np

warnings.filterwarnings("ignore")

import pymc as pm  # noqa: E402
import pytensor.tensor as pt  # noqa: E402

import bayeslong as bl  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))
from _panels import ALT_TRUE, ess_lag, simulate_alt  # noqa: E402,F401


def augmented_model(panel):
    """alt (predetermined first wave) with explicit person-level growth factors.

    y_i1 ~ N(initial_mean, initial_var); (level_i, slope_i) | y_i1 from the conditional normal
    of the joint (level, slope, eta_1) covariance (non-centred); y_it | y_i,t-1 ~
    N(level_i + slope_i (t - 1) + lag y_i,t-1, resid_var[t]) for t >= 2 (the AR chain).
    """
    y = panel.y[:, :, 0]
    n, T = y.shape
    s = float(np.nanstd(y))
    with pm.Model() as m:
        mu = pm.Normal("mu", np.nanmean(y[:, 0]), 3 * s, shape=3)  # level, slope, initial means
        chol, _, _ = pm.LKJCholeskyCov("chol", n=3, eta=2.0, sd_dist=pm.HalfNormal.dist(s, shape=3))
        lag = pm.Normal("lag", 0.0, 0.5)
        resid_sd = pm.HalfNormal("resid_sd", s, shape=T - 1)
        S = chol @ chol.T
        pm.Normal("y1", mu[2], pt.sqrt(S[2, 2]), observed=y[:, 0])
        cond_mean = mu[:2][None, :] + (S[:2, 2] / S[2, 2])[None, :] * (y[:, 0][:, None] - mu[2])
        cond_cov = S[:2, :2] - pt.outer(S[:2, 2], S[:2, 2]) / S[2, 2]
        z = pm.Normal("z", 0.0, 1.0, shape=(n, 2))
        g = cond_mean + z @ pt.linalg.cholesky(cond_cov).T
        t = np.arange(1, T, dtype=float)
        mean = g[:, :1] + g[:, 1:2] * t[None, :] + lag * y[:, :-1]
        pm.Normal("y", mean, resid_sd[None, :], observed=y[:, 1:])
    return m


def run(label, func):
    t0 = time.perf_counter()
    idata, extra = func()
    wall = time.perf_counter() - t0
    ess = ess_lag(idata)
    sample = extra.get("sample", wall) if extra else wall
    print(f"{label:<34} wall {wall:8.1f} s   ESS(lag) {ess:7.0f}   ESS/s {ess / wall:8.2f}   "
          f"ESS/s sampling {ess / max(sample, 1e-9):8.1f}   {extra}", flush=True)
    return ess / wall, wall, ess / max(sample, 1e-9)


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    draws = int(sys.argv[2]) if len(sys.argv) > 2 else 1000
    chains = int(sys.argv[3]) if len(sys.argv) > 3 else 4
    print(f"alt N={n} T=6, {chains} chains x {draws} draws; load average {os.getloadavg()}")
    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    spec, panel = simulate_alt(n, seed=1)
    results = {}

    def ours(sampler):
        def go():
            f = bl.fit(spec, panel, draws=draws, tune=draws, chains=chains, seed=1,
                       sampler=sampler, progressbar=False)
            return f.idata, {k: round(v, 1) for k, v in f.timing.items()}
        return go

    def refit(sampler):
        def go():
            f = bl.fit(spec, panel, draws=draws, tune=draws, chains=chains, seed=2,
                       sampler=sampler, progressbar=False)
            return f.idata, {k: round(v, 1) for k, v in f.timing.items()}
        return go

    def augmented():
        from bayeslong.infer.sampling import _one_thread

        with _one_thread(), augmented_model(panel):
            idata = pm.sample(draws=draws, tune=draws, chains=chains, random_seed=1,
                              progressbar=False, compute_convergence_checks=False)
        return idata, {}

    which = (sys.argv[4].split(",") if len(sys.argv) > 4
             else ["pymc", "nutpie", "generic", "augmented"])
    if "pymc" in which:
        results["pymc"] = run("(a) marginal engine + PyMC NUTS", ours("pymc"))
        results["pymc-refit"] = run("(a') same, compiled before", refit("pymc"))
    if "nutpie" in which:
        results["nutpie"] = run("(b) marginal engine + nutpie", ours("nutpie"))
        results["nutpie-refit"] = run("(b') same, compiled before", refit("nutpie"))
    if "generic" in which:
        results["generic"] = run("(d) generic kernel + nutpie", ours("generic"))
        results["generic-refit"] = run("(d') same, second fit", refit("generic"))
    if "augmented" in which:
        results["augmented"] = run("(c) data augmentation + PyMC", augmented)
    if "augmented" in results:
        base = results["augmented"][0]
        for k, (rate, _, _) in results.items():
            print(f"ESS/s ratio {k} / augmented: {rate / base:8.1f}")
    for new, old in (("generic", "nutpie"), ("generic-refit", "nutpie-refit")):
        if new in results and old in results:
            print(f"ratio {new} / {old}: ESS/s (wall) {results[new][0] / results[old][0]:6.2f}   "
                  f"ESS/s sampling {results[new][2] / results[old][2]:6.2f}   "
                  f"wall {results[new][1] / results[old][1]:6.2f}")


if __name__ == "__main__":
    main()
