"""Simulation-based calibration of `bl.fit` on a small ALT model (slow; not run by tests).

Talts, Betancourt, Simpson, Vehtari & Gelman (2018), "Validating Bayesian inference
algorithms with simulation-based calibration", arXiv:1804.06788, algorithm 1:

    for r = 1..R:  theta~ ~ prior;  y ~ p(y | theta~);  theta_1..L ~ posterior(theta | y)
                   rank_r = #{l : theta_l < theta~}          (0..L)

If the fit is calibrated, the ranks are uniform on 0..L. The draws are thinned (every k-th
of the pooled chains) to reduce autocorrelation, as the paper advises (section 5.1). The
ranks are binned into B bins and compared with the uniform by a chi-square test with B - 1
degrees of freedom; a histogram with the 99% band of a uniform bin count is saved as PNG.

Every parameter's prior is given explicitly (`PRIORS`), so the prior that draws theta~ is
exactly the prior of the fit (the defaults of bayeslong.priors depend on the data's scale,
which would make the generating prior differ from the fitted one).

Run (about 100 fits; a few minutes with nutpie once the model is compiled):

    cd /work/main && PYTHONPATH=. .venv/bin/python bench/sbc.py --replications 100

``--indicators``: the latent variable ALT instead, the process measured by three indicators
at every wave (default measurement options: marker coding, scalar invariance, each
indicator's unique factors correlated over waves), checking the lag and the loading of
the second indicator; every prior again given (``indicator_priors``); output files
``sbc_indicators_ranks.*``.

``--binary``: the ALT of one binary outcome instead (probit, thresholds fixed at 0; fitted
with the latent responses by ``bl.fit``, docs/model-family.md, "Categorical indicators"),
checking the lag and the slope mean with every prior given (``BINARY_PRIORS``, tighter
than ``PRIORS``: the binary latent scale is set by the probit error's SD of 1, and means of
several SDs would give panels of one category); N = ``--units`` (default 120), T = 5.
The replications share one compiled model (their designs are equal, the data are model
inputs: infer/categorical.py, ``_entry``), so nutpie compiles once per run. Ranks are written to ``sbc_binary_ranks.csv`` after every replication,
so an interrupted run keeps them; ``--report`` reads that file and prints the test:

    PYTHONPATH=. .venv/bin/python bench/sbc.py --binary --replications 100 --seed 7
    PYTHONPATH=. .venv/bin/python bench/sbc.py --binary --report

Output: bench/out/sbc_ranks.csv, bench/out/sbc_ranks.png and a printed table of p-values.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from scipy import stats  # noqa: E402

import bayeslong as bl  # noqa: E402
from bayeslong.infer.batch import BatchResult, SerialExecutor, Task, run_many  # noqa: E402
from bayeslong.infer.priors import prior_draws, resolve_priors  # noqa: E402
from bayeslong.model.simulation import Simulation  # noqa: E402
from bayeslong.model.structure import structure_for  # noqa: E402

N_UNITS, N_WAVES = 100, 5
PARAMS = ("lag", "slope_mean")
#: Every prior given, none data-dependent (LKJ(2) on the growth/initial block is fixed too).
PRIORS = {
    "level_mean": ("normal", 0.0, 1.0), "slope_mean": ("normal", 0.0, 0.5),
    "lag": ("normal", 0.3, 0.15), "initial_mean": ("normal", 0.0, 1.0),
    "level_var": ("halfnormal", 1.0), "slope_var": ("halfnormal", 0.3),
    "initial_var": ("halfnormal", 1.0), "resid_var": ("halfnormal", 0.7),
}


#: Priors of the binary ALT (``--binary``), every one given; LKJ(2) on the growth/initial
#: block is the default and fixed.
BINARY_PRIORS = {
    "level_mean": ("normal", 0.0, 0.5), "slope_mean": ("normal", 0.0, 0.25),
    "lag": ("normal", 0.3, 0.15), "initial_mean": ("normal", 0.0, 0.5),
    "level_var": ("halfnormal", 0.7), "slope_var": ("halfnormal", 0.2),
    "initial_var": ("halfnormal", 0.7), "resid_var": ("halfnormal", 0.7),
}

#: ``--free-residuals``: the parameters checked.
FREE_PARAMS = ("lag", "slope_mean", "resid_var[2]", "resid_var[5]")


def free_priors(structure) -> dict:
    """``PRIORS`` with each wave's residual variance given the prior of ``resid_var``, and
    the pooling of their log-SDs at the library's default tau, given explicitly."""
    from bayeslong.infer.pooling import DEFAULT_TAU, POOLING_KEY

    out = {k: v for k, v in PRIORS.items() if k in structure.names}
    out.update({n: PRIORS["resid_var"] for n in structure.names if n.startswith("resid_var[")})
    out[POOLING_KEY] = DEFAULT_TAU
    return out


INDICATORS = ("y_a", "y_b", "y_c")
INDICATOR_PARAMS = ("lag", "loading[y_b]")


def indicator_priors(structure) -> dict:
    """Every prior of the indicator model given (by base name), none data-dependent."""
    out = {k: v for k, v in PRIORS.items() if k in structure.names}
    for name in structure.names:
        base = name.split("[")[0]
        if base == "loading":
            out[name] = ("normal", 1.0, 0.3)
        elif base == "intercept":
            out[name] = ("normal", 0.0, 1.0)
        elif base == "unique_var":
            out[name] = ("halfnormal", 0.7)
        elif base == "resid_var":
            out[name] = ("halfnormal", 0.5)
    return out


def sbc_ranks(fit, truth: dict, params, thin: int, bins: int) -> dict:
    """Rank of each true value among the thinned pooled posterior draws (Talts et al. alg. 1).

    L draws are kept with L + 1 divisible by ``bins``, so every bin holds the same number of
    possible ranks (Talts et al. 2018, section 4.1).
    """
    post = fit.idata.posterior
    out = {}
    for name in params:
        draws = np.asarray(post[name].values).reshape(-1)[::thin]
        keep = len(draws) - (len(draws) + 1) % bins
        draws = draws[:keep]
        out[name] = int(np.sum(draws < truth[name]))
        out[f"{name}__L"] = len(draws)
    return out


def fit_and_rank(spec, panel, *, truth, thin, bins, params, **fit_kwargs):
    """A batch task: fit and return the SBC ranks as the task's info."""
    from bayeslong.infer.fitting import fit  # continuous and categorical panels alike

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # short chains warn about ESS; SBC itself is the check
        result = fit(spec, panel, progressbar=False, **fit_kwargs)
    return sbc_ranks(result, truth, params, thin, bins)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--replications", type=int, default=100)
    ap.add_argument("--draws", type=int, default=None, help="default 500 (--binary: 200)")
    ap.add_argument("--tune", type=int, default=None, help="default 500 (--binary: 300)")
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--thin", type=int, default=None, help="default 10 (--binary: 4)")
    ap.add_argument("--bins", type=int, default=10)
    ap.add_argument("--seed", type=int, default=2018)
    ap.add_argument("--pool", action="store_true", help="local process pool instead of serial")
    kind = ap.add_mutually_exclusive_group()
    kind.add_argument("--indicators", action="store_true",
                      help="the ALT with three indicators per wave (see the module notes)")
    kind.add_argument("--free-residuals", action="store_true",
                      help="ALT with residual variances free over waves: the default pooling "
                           "of their log-SDs (infer/pooling.py); checks the lag, the slope "
                           "mean and the first and last residual variances")
    kind.add_argument("--binary", action="store_true",
                      help="the ALT of one binary outcome (see the module notes)")
    ap.add_argument("--units", type=int, default=None, help="N (default 100; --binary: 120)")
    ap.add_argument("--sampler", default="auto", help="auto (default), nutpie or pymc")
    ap.add_argument("--report", action="store_true",
                    help="only read the saved ranks (e.g. of an interrupted run) and test them")
    args = ap.parse_args(argv)
    binary = args.binary
    draws = args.draws or (200 if binary else 500)
    tune = args.tune if args.tune is not None else (300 if binary else 500)
    thin = args.thin or (4 if binary else 10)
    n_units = args.units or (120 if binary else N_UNITS)
    sampler = args.sampler

    free = args.free_residuals
    spec = bl.model("alt", residuals="free" if free else "equal")
    indicators = {"y": list(INDICATORS)} if args.indicators else None
    categorical = {"y": "binary"} if binary else None
    params = INDICATOR_PARAMS if args.indicators else FREE_PARAMS if free else PARAMS
    stem = ("sbc_indicators_ranks" if args.indicators else "sbc_free_ranks" if free else
            "sbc_binary_ranks" if binary else "sbc_ranks")
    out = ROOT / "bench" / "out"
    out.mkdir(parents=True, exist_ok=True)
    if args.report:
        ranks = pd.read_csv(out / f"{stem}.csv")
        print(f"{len(ranks)} replications read from {out / f'{stem}.csv'}")
        return rank_test(ranks, params, args.bins, out / f"{stem}.png")
    base_values = {"level_mean": 0, "slope_mean": 0, "lag": 0.3, "initial_mean": 0,
                   "level_var": 1, "level_slope_cov": 0, "slope_var": 0.1,
                   "initial_level_cov": 0, "initial_slope_cov": 0, "initial_var": 1,
                   **({f"resid_var[{t}]": 0.5 for t in range(2, N_WAVES + 1)} if free
                      else {"resid_var": 0.5})}
    if args.indicators:  # the measurement part's values for the reference panel
        design = Simulation(spec=spec, params={}, n_units=2, n_waves=N_WAVES, seed=0,
                            indicators=indicators).structure
        for name in design.names:
            base = name.split("[")[0]
            base_values.setdefault(name, {"loading": 1.0, "intercept": 0.0, "unique_var": 0.5,
                                          "unique_cov": 0.0}.get(base, 0.0))
    # a reference panel only supplies the design to resolve the (fully user-given) priors
    ref = Simulation(spec=spec, params=base_values, n_units=n_units, n_waves=N_WAVES, seed=0,
                     indicators=indicators, categorical=categorical).panel()
    if binary:  # the prior set exactly as the categorical fit resolves it
        from bayeslong.infer.categorical import categorical_priors
        from bayeslong.model.thresholds import categorical_structure

        cat = categorical_structure(spec, ref)
        if cat.pinned or cat.thresholds:  # a binary ALT with equal residuals has neither
            raise SystemExit(f"unexpected fixed parameters or thresholds: {cat.pinned}, "
                             f"{cat.thresholds}")
        structure, priors = cat.structure, BINARY_PRIORS
        prior_set, _ = categorical_priors(cat, ref, priors)
    else:
        structure = structure_for(spec, ref)
        priors = (indicator_priors(structure) if args.indicators else
                  free_priors(structure) if free else PRIORS)
        prior_set = resolve_priors(structure, ref, priors)
    thetas = prior_draws(prior_set, draws=args.replications, seed=args.seed)
    seeds = np.random.SeedSequence(args.seed).generate_state(2 * args.replications)
    fit_kwargs = dict(draws=draws, tune=tune, chains=args.chains, priors=priors,
                      **({"sampler": sampler} if sampler != "auto" else {}),
                      **({"loglik_draws": 10} if binary else {}))  # LOO terms are not used
    tasks = []
    for r, theta in enumerate(thetas):
        truth = dict(zip(structure.names, map(float, theta)))
        sim = Simulation(spec=spec, params=truth, n_units=n_units, n_waves=N_WAVES,
                         seed=int(seeds[2 * r]), indicators=indicators, categorical=categorical)
        tasks.append(Task(name=f"rep{r}", spec=spec, panel=sim, kind="bench.sbc:fit_and_rank",
                          kwargs=dict(truth={k: truth[k] for k in params}, thin=thin,
                                      bins=args.bins, params=params, **fit_kwargs),
                          seed=int(seeds[2 * r + 1]) % 2**31))
    t0 = time.perf_counter()
    if binary:  # one task at a time, the ranks saved after each (module notes)
        results, rows = [], []
        for r, task in enumerate(tasks):
            result = run_many([task], SerialExecutor()).results[0]
            results.append(result)
            if result.ok:
                rows.append({**result.info, "seconds": result.seconds})
                pd.DataFrame(rows).to_csv(out / f"{stem}.csv", index=False)
            print(f"replication {r + 1}/{len(tasks)}: {result.status} "
                  f"({result.seconds:.0f} s, {time.perf_counter() - t0:.0f} s so far)", flush=True)
        batch = BatchResult(results=tuple(results))
    else:
        batch = run_many(tasks, None if args.pool else SerialExecutor())
    wall = time.perf_counter() - t0
    ok = [r for r in batch if r.ok]
    ranks = pd.DataFrame([{**r.info, "seconds": r.seconds} for r in ok])
    ranks.to_csv(out / f"{stem}.csv", index=False)
    table = rank_test(ranks, params, args.bins, out / f"{stem}.png")
    print(f"failed fits: {len(batch) - len(ok)}; wall time {wall:.0f} s "
          f"({wall / max(len(batch), 1):.1f} s per fit)")
    if batch.failed:
        print("first failure:", next(iter(batch.failed.items())))
    return table


def rank_test(ranks: pd.DataFrame, params, bins: int, png: Path) -> pd.DataFrame:
    """Chi-square test of the binned ranks against the uniform, and their histogram."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(params), figsize=(4.5 * len(params), 3.2))
    rows = []
    for ax, name in zip(np.atleast_1d(axes), params):
        Ls = ranks[f"{name}__L"].to_numpy(int)  # per fit: a careful re-run keeps more draws
        L = int(Ls.min())
        # B bins of the L + 1 possible ranks 0..L (L + 1 divisible by B, see sbc_ranks)
        counts = np.bincount(ranks[name].to_numpy(int) * bins // (Ls + 1), minlength=bins)
        R = len(ranks)
        chi2, p = stats.chisquare(counts)
        lo, hi = stats.binom.ppf([0.005, 0.995], R, 1 / bins)
        ax.bar(np.arange(bins), counts, width=0.9, color="tab:blue")
        ax.axhspan(lo, hi, color="grey", alpha=0.3, zorder=0, label="99% band, uniform")
        ax.set_title(f"{name}: chi2 = {chi2:.1f}, p = {p:.3f}")
        ax.set_xlabel(f"rank bin ({bins} bins of 0..{L})")
        rows.append({"parameter": name, "replications": R, "chi2": chi2, "df": bins - 1,
                     "p_value": p, "bin_counts": " ".join(map(str, counts))})
    np.atleast_1d(axes)[0].set_ylabel("replications")
    np.atleast_1d(axes)[0].legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(png, dpi=110)
    table = pd.DataFrame(rows)
    print(table.to_string(index=False))
    return table


if __name__ == "__main__":
    main()
