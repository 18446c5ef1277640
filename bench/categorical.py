"""Categorical indicators: sampling speed of the lag and the per-unit marginal likelihood.

Measures, on binary ``alt`` data (residuals equal over waves; N = 200, T = 5, simulated
with a fixed seed from the parameters below): the wall time of 4 chains (1000 warm-up, then
a categorical fit's default 1000 draws, or --draws) with the latent responses sampled
(infer/categorical.py: response_likelihood) after compilation, the effective sample size of the lag and its ESS per second (target:
ESS(lag) >= 400 within 3 minutes); then the
per-unit marginal log-likelihood (latents integrated out) for 200 units x 1000 draws
(target: under 60 s), with its numerical error. It also prints why the lag mixes as it
does: the parameters with the lowest bulk ESS, leapfrog steps per draw and tree depths,
E-BFMI per chain, sampling seconds per leapfrog step, and the posterior correlations of the
lag (docs/engine.md, "Categorical fits: cost and mixing").

Command:  .venv/bin/python bench/categorical.py [sampler] [N] [--draws D] [--target-accept A]
          [--seed S]
          (sampler: nutpie | pymc; defaults 200 units, and the categorical fit's defaults
          of 1000 draws per chain and target acceptance 0.8; the fit's seed 2, the data
          keep seed 11)
Machine:  2-core Linux VM shared with other jobs; read the timings with the load average
          printed at the start.
"""

import os
import time
import warnings

import numpy as np

warnings.filterwarnings("ignore")

import arviz as az  # noqa: E402

import bayeslong as bl  # noqa: E402
from bayeslong.infer.marginal import unit_marginal_loglik  # noqa: E402

TRUE = {"level_mean": 0.0, "slope_mean": 0.1, "lag": 0.4, "initial_mean": 0.0,
        "level_var": 0.5, "slope_var": 0.05, "level_slope_cov": 0.0, "initial_var": 1.0,
        "initial_level_cov": 0.3, "initial_slope_cov": 0.0, "resid_var": 0.5}


def main(sampler="nutpie", n=200, draws=None, target_accept=None, seed=2):
    print("load average:", os.getloadavg())
    spec = bl.model("alt", residuals="equal")
    panel = bl.Simulation(spec=spec, params=TRUE, n_units=n, n_waves=5, seed=11,
                          categorical={"y": "binary"}).panel()
    t0 = time.perf_counter()
    settings = {} if draws is None else {"draws": draws}
    fit = bl.fit(spec, panel, tune=1000, chains=4, seed=seed, sampler=sampler,
                 progressbar=False, loglik_draws=1000, target_accept=target_accept, **settings)
    draws = fit.idata.posterior.sizes["draw"]
    total = time.perf_counter() - t0
    ess = float(az.ess(fit.idata.posterior[["lag"]])["lag"])
    rhat = float(az.rhat(fit.idata.posterior[["lag"]])["lag"])
    sample_s = fit.timing["sample"]
    print(f"sampler {fit.sampler}: build {fit.timing['build']:.1f} s, compile "
          f"{fit.timing['compile']:.1f} s, sampling {sample_s:.1f} s (4 x {draws} after 1000 "
          f"warm-up, target acceptance {fit.target_accept}), total with log-likelihood "
          f"{total:.1f} s")
    print(f"lag: mean {float(fit.idata.posterior['lag'].mean()):.3f} (true {TRUE['lag']}), "
          f"ESS bulk {ess:.0f}, R-hat {rhat:.3f}, ESS/s (sampling) {ess / sample_s:.1f}; "
          f"divergences {fit.diagnostics().attrs['divergences']}")
    diag = fit.diagnostics()
    low = diag.sort_values("ess_bulk").head(4)
    print("lowest bulk ESS: " + ", ".join(f"{n} {r.ess_bulk:.0f} (R-hat {r.r_hat:.3f})"
                                         for n, r in low.iterrows())
          + f"; flagged parameters: {int((diag['flag'] != '').sum())}")
    stats = fit.idata.sample_stats
    steps = stats["n_steps"].values
    depth = np.bincount(stats["depth"].values.ravel().astype(int))
    # warm-up statistics are not kept: assume a warm-up iteration takes as many steps as a draw
    per_step = sample_s * min(4, os.cpu_count() or 1) / (steps.sum() * 2.0)
    print(f"leapfrog steps per draw: mean {steps.mean():.1f}; tree depth counts {depth.tolist()}; "
          f"E-BFMI per chain {np.round(az.bfmi(fit.idata), 2).tolist()}; about "
          f"{per_step * 1e3:.2f} ms per step and core (sampling time x cores / steps)")
    post = fit.idata.posterior
    names = [n for n in fit.categorical.names if n != "lag"]
    lag = post["lag"].values.ravel()
    corr = {n: np.corrcoef(lag, post[n].values.ravel())[0, 1] for n in names}
    print("posterior correlation of the lag with: " + ", ".join(
        f"{n} {c:+.2f}" for n, c in sorted(corr.items(), key=lambda kv: -abs(kv[1]))[:5]))
    attrs = fit.idata.log_likelihood.attrs
    print(f"per-unit marginal log-likelihood in the fit: {fit.timing['loglik']:.1f} s for "
          f"{n} units x {fit.idata.log_likelihood.sizes['chain'] * fit.idata.log_likelihood.sizes['draw']}"
          f" draws (thin {attrs['thin']}); error of a log term: median {attrs['error_median']:.2g}, "
          f"max {attrs['error_max']:.2g}")
    k = bl.pareto_k(fit)
    print(f"Pareto k > 0.7: {int((k > 0.7).sum())} of {n} units; max {k.max():.2f}")
    # the marginal likelihood alone, 1000 draws
    theta = fit.theta_draws()[:1000]
    tau = fit.threshold_draws()[:1000]
    t0 = time.perf_counter()
    _, err = unit_marginal_loglik(fit.categorical, panel, theta, tau, return_error=True)
    print(f"unit_marginal_loglik alone: {time.perf_counter() - t0:.1f} s for {n} units x "
          f"{len(theta)} draws; error median {np.median(err):.2g}, max {err.max():.2g}")
    print("load average:", os.getloadavg())


if __name__ == "__main__":
    import argparse

    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("sampler", nargs="?", default="nutpie", choices=("nutpie", "pymc"))
    ap.add_argument("n", nargs="?", type=int, default=200)
    ap.add_argument("--draws", type=int, default=None,
                    help="draws per chain (default: the categorical fit's, 1000)")
    ap.add_argument("--target-accept", type=float, default=None)
    ap.add_argument("--seed", type=int, default=2, help="the fit's seed (the data keep seed 11)")
    a = ap.parse_args()
    main(a.sampler, a.n, a.draws, a.target_accept, a.seed)
