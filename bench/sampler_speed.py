"""ESS per second of the lag and wall time: our engine with PyMC NUTS, with nutpie on the
PyMC graph (compiled per structure) and with nutpie on the generic kernel (compiled once per
machine), against a hand-written data-augmentation model with person-level latents, and
(``--whole-process``) each engine in a fresh process against the same model written by hand
in PyMC as a per-person multivariate normal ("handpymc").

Command:  cd /work/main && .venv/bin/python bench/sampler_speed.py [N] [draws] [chains] [which]
          which: comma-separated subset of pymc,nutpie,generic,augmented (default all)
Default:  alt, N = 500, T = 6, 4 chains x 1000 draws (1000 warm-up), one run of each.
Columns:  ESS/s over the whole wall time (compile included) and ESS per second of sampling
          alone ("after compilation"); ratios generic / nutpie of both at the end.

Whole process (imports + compile + sampling, each engine in a fresh Python process, one
after the other; a short untimed run of each first, so the on-disk caches of numba and
PyTensor are warm):

          .venv/bin/python bench/sampler_speed.py 200 1000 2 generic,handpymc --waves 5 \
              --whole-process [--repeats R]

          generic: ``bl.fit(..., sampler="generic")`` (the default path);
          handpymc: :func:`hand_model`, PyMC's NUTS (``pm.sample``, cores = chains).
          Before timing, the hand model's log-likelihood is compared with bayeslong's at two
          parameter points (the difference is printed). Prints per run the wall time of the
          process, ESS(lag) (bulk), ESS per whole-process second, the largest R-hat and the
          divergences, the CPU seconds of the process (with the chain processes it waited
          for) and the ratios generic / handpymc of ESS per whole-process second and per
          CPU second.

Measured (``200 1000 2 generic,handpymc --waves 5 --whole-process --repeats 2``; caches warm
after the warm-up runs; the machine shared with other jobs, load average 7.3 at the start,
8.4 after the warm-up, 9-12 while the hand model sampled): log-likelihood of the hand model
minus bayeslong's -1.0e-11 and -4.6e-12 at two parameter points.
          generic, run 1: process wall 19.6 s (fit 3.8 s, of it sampling 3.1 s; the rest
          mostly imports under that load), ESS(lag) 1938, 98.9 ESS per whole-process
          second, max R-hat 1.002, no divergences.
          handpymc, run 1: process wall 3264.4 s (pm.sample 3244.6 s), ESS(lag) 549,
          0.168 ESS per whole-process second, max R-hat 1.004, no divergences (each chain
          process had about a fifth of a core: about 12.5 CPU minutes each, read from ps).
          Ratio generic / handpymc of ESS per whole-process second: 588 (run 1 pair).
          generic, run 2: process wall 11.3 s (fit 2.7 s), ESS(lag) 1938, 171.3 per second.
          handpymc, run 2 was stopped after 9 minutes (session time), so there is one pair.
          Under that load both wall times are inflated, by different factors (the hand model
          sampled for 54 minutes through varying load, the generic process took seconds):
          the ratio is of the order of hundreds, not a precise figure. It compares this one
          model, panel and seed; the hand model is PyMC's NUTS with its default diagonal
          mass matrix, bayeslong nutpie's low-rank-modified one (the lag correlates about
          -0.9 with the growth means); how much of the gap comes from the sampler and how
          much from the log density's cost was not measured.
Machine:  2-core Linux VM shared with other jobs; timings are noisy (see the load average
          printed at the start).
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

warnings.filterwarnings("ignore")

HERE = Path(__file__).parent


def hand_moments(pt, init_mean, level_mean, slope_mean, lag, phi, resid_var, n_waves):
    """Implied mean and covariance of alt's outcomes, written directly (no bayeslong code).

    g = (initial, level, slope) ~ N(m, phi); y_1 = initial; for t >= 2
    y_t = level + (t - 1) slope + lag y_(t-1) + e_t, e_t ~ N(0, resid_var[t]). In matrix form
    y = A^-1 (H g + e), with A = I - lag (subdiagonal) and A^-1 = sum_k lag^k (k-th subdiagonal).
    ``pt`` is the array module (PyTensor's tensor module in the model, NumPy-like in checks).
    """
    T = n_waves
    H = np.zeros((T, 3))
    H[0, 0] = 1.0
    H[1:, 1] = 1.0
    H[1:, 2] = np.arange(1, T)
    a_inv = np.eye(T)
    power = 1.0
    for k in range(1, T):
        power = power * lag
        a_inv = a_inv + power * np.eye(T, k=-k)
    m = pt.stack([init_mean, level_mean, slope_mean])
    theta = pt.concatenate([pt.zeros(1), resid_var])
    inner = pt.dot(pt.dot(H, phi), H.T) + pt.diag(theta)
    mu = pt.dot(a_inv, pt.dot(H, m))
    cov = pt.dot(pt.dot(a_inv, inner), a_inv.T)
    return mu, cov


def hand_model(y):
    """alt written by hand in PyMC: one multivariate normal per person over the T waves.

    Priors as bayeslong's defaults (infer/priors.py ``default_priors``), with m = the
    first-wave mean and s = the SD of all outcome values (ddof = 1): means Normal(m, 3 s + |m|),
    slope mean Normal(0, s), lag Normal(0, 0.5), SDs HalfNormal(s), the (initial, level,
    slope) correlation matrix LKJ(2) (``pm.LKJCholeskyCov``).
    """
    import pymc as pm
    import pytensor.tensor as pt

    n, T = y.shape
    m = float(np.mean(y[:, 0]))
    s = float(np.std(y, ddof=1))
    with pm.Model() as model:
        init_mean = pm.Normal("initial_mean", m, 3 * s + abs(m))
        level_mean = pm.Normal("level_mean", m, 3 * s + abs(m))
        slope_mean = pm.Normal("slope_mean", 0.0, s)
        lag = pm.Normal("lag", 0.0, 0.5)
        chol, _, _ = pm.LKJCholeskyCov("chol", n=3, eta=2.0,
                                       sd_dist=pm.HalfNormal.dist(s, shape=3))
        resid_sd = pm.HalfNormal("resid_sd", s, shape=T - 1)
        mu, cov = hand_moments(pt, init_mean, level_mean, slope_mean, lag, chol @ chol.T,
                               resid_sd**2, T)
        pm.MvNormal("y", mu, cov, observed=y)
    return model


def check_hand_loglik(n, n_waves):
    """Print the hand model's log-likelihood minus bayeslong's at two parameter points."""
    import pymc as pm
    import pytensor.tensor as pt

    from bayeslong.infer.likelihood import loglik_and_grad, pattern_arrays
    from bayeslong.model.structure import build_structure

    sys.path.insert(0, str(HERE))
    from _panels import ALT_TRUE, simulate_alt

    spec, panel = simulate_alt(n, n_waves=n_waves, seed=1)
    s = build_structure(spec, outcomes=["y"], n_waves=n_waves)
    rng = np.random.default_rng(0)
    truth = np.array([ALT_TRUE.get(name, 1.5) for name in s.names])
    for label, theta in (("true values", truth),
                         ("true values moved at random", truth * rng.uniform(0.7, 1.3, truth.size))):
        v = dict(zip(s.names, theta))
        phi = np.array([[v["initial_var"], v["initial_level_cov"], v["initial_slope_cov"]],
                        [v["initial_level_cov"], v["level_var"], v["level_slope_cov"]],
                        [v["initial_slope_cov"], v["level_slope_cov"], v["slope_var"]]])
        resid = pt.as_tensor(np.array([v[f"resid_var[{t}]"] for t in range(2, n_waves + 1)]))
        mu, cov = hand_moments(pt, *(pt.as_tensor(v[k]) for k in
                                     ("initial_mean", "level_mean", "slope_mean", "lag")),
                               pt.as_tensor(phi), resid, n_waves)
        hand = float(pm.logp(pm.MvNormal.dist(mu, cov), panel.y[:, :, 0]).sum().eval())
        ours = float(loglik_and_grad(s, theta, *pattern_arrays(panel.patterns()))[0])
        print(f"log-likelihood at {label}: hand model {hand:.10f}, bayeslong {ours:.10f}, "
              f"difference {hand - ours:.2e}", flush=True)


def augmented_model(panel):
    """alt (predetermined first wave) with explicit person-level growth factors.

    y_i1 ~ N(initial_mean, initial_var); (level_i, slope_i) | y_i1 from the conditional normal
    of the joint (level, slope, eta_1) covariance (non-centred); y_it | y_i,t-1 ~
    N(level_i + slope_i (t - 1) + lag y_i,t-1, resid_var[t]) for t >= 2 (the AR chain).
    """
    import pymc as pm
    import pytensor.tensor as pt

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
    from _panels import ess_lag

    t0 = time.perf_counter()
    idata, extra = func()
    wall = time.perf_counter() - t0
    ess = ess_lag(idata)
    sample = extra.get("sample", wall) if extra else wall
    print(f"{label:<34} wall {wall:8.1f} s   ESS(lag) {ess:7.0f}   ESS/s {ess / wall:8.2f}   "
          f"ESS/s sampling {ess / max(sample, 1e-9):8.1f}   {extra}", flush=True)
    return ess / wall, wall, ess / max(sample, 1e-9)


CHILD_HAND = r"""
import json, sys, time, warnings
warnings.filterwarnings("ignore")
import numpy as np
sys.path.insert(0, {here!r})
from sampler_speed import hand_model
import pymc as pm
import arviz as az
y = np.load({data!r})
t0 = time.perf_counter()
with hand_model(y):
    idata = pm.sample(draws={draws}, tune={draws}, chains={chains}, cores={chains}, random_seed=1,
                      progressbar=False)
t1 = time.perf_counter()
ess = float(az.ess(idata.posterior["lag"], method="bulk")["lag"])
rhat = float(az.rhat(idata.posterior).to_array().max())
print(json.dumps({{"sample": t1 - t0, "ess_lag": ess, "rhat_max": rhat,
                  "divergences": int(idata.sample_stats["diverging"].sum())}}))
"""

CHILD_GENERIC = r"""
import json, sys, time, warnings
warnings.filterwarnings("ignore")
import numpy as np
import bayeslong as bl
import arviz as az
y = np.load({data!r})
n, T = y.shape
panel = bl.Panel(units=tuple(range(n)), waves=tuple(range(1, T + 1)), outcomes=("y",),
                 y=y[:, :, None])
t0 = time.perf_counter()
f = bl.fit(bl.model("alt"), panel, draws={draws}, tune={draws}, chains={chains}, seed=1,
           sampler="generic", progressbar=False)
t1 = time.perf_counter()
post = f.idata.posterior
ess = float(az.ess(post["lag"], method="bulk")["lag"])
rhat = float(az.rhat(post).to_array().max())
div = int(f.idata.sample_stats["diverging"].sum())
print(json.dumps({{"fit": t1 - t0, "sampler": f.sampler, "ess_lag": ess, "rhat_max": rhat,
                  "divergences": div, **f.timing}}))
"""


def uptime() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip()
    except OSError:
        return f"load average {os.getloadavg()}"


def fresh_process(engine, data, draws, chains):
    """Run one engine in a fresh Python process; its wall time and what it printed."""
    template = {"generic": CHILD_GENERIC, "handpymc": CHILD_HAND}[engine]
    code = template.format(here=str(HERE), data=data, draws=draws, chains=chains)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        [str(HERE.parent), *filter(None, [os.environ.get("PYTHONPATH")])]))
    t0 = time.perf_counter()
    cpu0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    cpu1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    if out.returncode:
        raise SystemExit(f"{engine}: the fresh process failed\n{out.stderr[-3000:]}")
    # CPU seconds of the process and of the processes it waited for (PyMC's chain workers):
    # on a loaded machine the wall time grows with the load, the CPU time much less
    cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)
    return wall, {**json.loads(out.stdout.strip().splitlines()[-1]), "cpu": cpu}


def whole_process(args, engines):
    """Each engine in a fresh process, one after the other (docstring, "Whole process")."""
    sys.path.insert(0, str(HERE))
    from _panels import simulate_alt

    print(f"alt N={args.n} T={args.waves}, {args.chains} chains x {args.draws} draws "
          f"({args.draws} warm-up), each engine in a fresh process")
    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print("before:", uptime(), flush=True)
    check_hand_loglik(args.n, args.waves)
    _, panel = simulate_alt(args.n, n_waves=args.waves, seed=1)
    rates = {e: [] for e in engines}
    cpu_rates = {e: [] for e in engines}
    with tempfile.TemporaryDirectory() as tmp:
        data = str(Path(tmp) / "y.npy")
        np.save(data, panel.y[:, :, 0])
        if not args.no_warmup:  # fill the on-disk caches (numba, PyTensor); not timed
            for e in engines:
                fresh_process(e, data, 30, args.chains)
            print("warm-up runs done (30 draws each, untimed):", uptime(), flush=True)
        for r in range(args.repeats):
            for e in engines:
                wall, res = fresh_process(e, data, args.draws, args.chains)
                ess = res["ess_lag"]
                rates[e].append(ess / wall)
                flag = "" if res["rhat_max"] < 1.01 and res["divergences"] == 0 else \
                    "   <-- NOT CONVERGED CLEANLY (R-hat >= 1.01 or divergences)"
                extra = (f"fit {res['fit']:5.1f} s (sample {res['sample']:5.1f} s, sampler "
                         f"{res['sampler']})" if e == "generic"
                         else f"pm.sample {res['sample']:5.1f} s")
                cpu_rates[e].append(ess / res["cpu"])
                print(f"run {r + 1} {e:<9} process wall {wall:6.1f} s = {extra}; ESS(lag) "
                      f"{ess:6.0f}; ESS/s whole process {ess / wall:7.1f}; CPU {res['cpu']:6.1f} s, "
                      f"ESS per CPU s {ess / res['cpu']:7.1f}; max R-hat "
                      f"{res['rhat_max']:.3f}; divergences {res['divergences']}{flag}",
                      flush=True)
    if "generic" in rates and "handpymc" in rates:
        ratios = [g / h for g, h in zip(rates["generic"], rates["handpymc"])]
        print("ratio generic / handpymc of ESS per whole-process second, per run: "
              + ", ".join(f"{x:.1f}" for x in ratios))
        ratios = [g / h for g, h in zip(cpu_rates["generic"], cpu_rates["handpymc"])]
        print("ratio generic / handpymc of ESS per CPU second of the process, per run: "
              + ", ".join(f"{x:.1f}" for x in ratios))
    print("after: ", uptime())
    print("A ratio of ESS per second compares efficiency on this one model, panel and seed; "
          "it says nothing about other models, sizes or a quieter machine.")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("n", nargs="?", type=int, default=500)
    ap.add_argument("draws", nargs="?", type=int, default=1000)
    ap.add_argument("chains", nargs="?", type=int, default=4)
    ap.add_argument("which", nargs="?", default=None)
    ap.add_argument("--waves", type=int, default=6)
    ap.add_argument("--whole-process", action="store_true")
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--no-warmup", action="store_true")
    args = ap.parse_args()
    if args.whole_process:
        whole_process(args, (args.which or "generic,handpymc").split(","))
        return
    in_process(args)


def in_process(args):
    import pymc as pm

    import bayeslong as bl

    sys.path.insert(0, str(HERE))
    from _panels import simulate_alt

    n, draws, chains = args.n, args.draws, args.chains
    print(f"alt N={n} T={args.waves}, {chains} chains x {draws} draws; "
          f"load average {os.getloadavg()}")
    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    spec, panel = simulate_alt(n, n_waves=args.waves, seed=1)
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

    which = (args.which.split(",") if args.which
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
