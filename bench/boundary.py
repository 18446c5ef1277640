"""Default fits near a variance boundary: ALT panels whose slope SD is small (0.05).

20 invented alt panels (N = 120, T = 5; slope SD 0.05, other values below), drawn from the
implied moments with seeds 1..20. Each is fitted with default settings (``bl.fit``: priors,
4 chains x 1000 draws after 1000 warm-up, sampler "auto") and refitted on waves 1-4 for
leave-future-out (``bl.forecast_score``, the refit ``compare(future=True)`` makes). A fit
is clean when it has no divergent transition, R-hat < 1.01 and bulk and tail ESS > 400
for every parameter (the thresholds ``Fit.diagnostics`` flags at 4 chains).

Command:  cd /work/main && PYTHONPATH=. .venv/bin/python bench/boundary.py [--panels 20]
          [--seed-offset 0] [--no-lfo | --lfo-only] [--tau TAU | --tau off]
Prints:   the load before and after, one line per panel (divergences, worst R-hat, lowest
          bulk and tail ESS and the parameter, and whether the leave-future-out refit was
          clean), then the counts of clean fits and clean refits. ``--lfo-only`` skips the
          full fits and prints, per refit, why it was flagged (divergences, R-hat, ESS and
          which parameters), what the first run at the default target acceptance failed
          when it was re-run, and where the divergent transitions sit (the median of the
          divergent draws of the lag and the variances beside the posterior median).
          ``--gamma-sds``, ``--draws`` and ``--rerun-draws`` are probes of that mode, not
          defaults (docs/engine.md, "Leave-future-out refits on four waves"); ``--whole``
          makes the same fits on all waves. ``--tau TAU`` (or ``off``) sets the library's
          pooling of residual log-SDs (a default since it was validated here) by the prior
          override ``residual_pooling``; ``--seed-offset 20`` draws 20 fresh panels.
"""

import argparse
import os
import re
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


LOCATED = ("lag", "level_var", "slope_var", "initial_level_cov")


def causes(diag) -> str:
    """Why a diagnostics table is flagged: divergences, then the parameters of each check."""
    parts = []
    if diag.attrs.get("divergences", 0):
        parts.append(f"{diag.attrs['divergences']} div")
    for column, bad, label in (("r_hat", lambda v: not v < 1.01, "R-hat"),
                               ("ess_bulk", lambda v: not v > 400, "bulk"),
                               ("ess_tail", lambda v: not v > 400, "tail")):
        names = [n for n, v in diag[column].items() if bad(v)]
        if names:
            parts.append(f"{label}: " + ",".join(names))
    return "; ".join(parts) or "-"


def where_divergent(f) -> str:
    """Median of the divergent draws against the posterior median (lag and the variances)."""
    div = np.asarray(f.idata.sample_stats["diverging"]).astype(bool)
    if not div.any():
        return ""
    post = f.idata.posterior
    names = list(LOCATED) + [n for n in f.structure.names if n.startswith("resid_var")]
    cells = []
    for n in names:
        v = np.asarray(post[n])
        cells.append(f"{n} {np.median(v[div]):.3g} ({np.median(v):.3g})")
    return "divergent draws at median (posterior median): " + ", ".join(cells)


def gamma_sds(spec, panel, person_only: bool = False) -> dict:
    """Probe: Gamma(2, rate) on variances' SDs, with the mean of the default HalfNormal(s).

    HalfNormal(s) has mean s sqrt(2/pi); Gamma(2, 2 / (s sqrt(2/pi))) has the same mean and
    density zero at SD 0 (a boundary-avoiding prior: Chung, Rabe-Hesketh, Dorie, Gelman &
    Liu 2013, Psychometrika 78(4), 685-709).
    """
    from bayeslong.model.structure import structure_for

    s = panel.summary_scale()["y"]["sd"]
    prior = ("gamma", 2.0, 2.0 / (s * np.sqrt(2.0 / np.pi)))
    person = ("level_var", "slope_var", "initial_var")
    return {n: prior for n in structure_for(spec, panel).names
            if n in person or (not person_only and n.startswith("resid_var"))}


def pooling_override(tau) -> dict:
    """``priors=`` that set the library's pooling of residual log-SDs (None: the default)."""
    return {} if tau is None else {"residual_pooling": tau}


def seeds(args) -> range:
    return range(args.seed_offset + 1, args.seed_offset + args.panels + 1)


def refits_only(panels: range, tau=None, draws: int = 1000,
                rerun_draws: int | None = None, whole: bool = False,
                gamma: str | None = None) -> None:
    """The leave-future-out refits alone: the same fit ``forecast_score`` makes.

    With residual variances free over waves the T-wave model with wave T hidden is not the
    (T-1)-wave model (a wave-T-only parameter), so ``forecast_score`` fits ``panel.head(T-1)``
    with the default priors, seed and settings: ``bl.fit(spec, panel.head(4))`` here.
    """
    print("command: PYTHONPATH=. .venv/bin/python bench/boundary.py " + " ".join(sys.argv[1:]))
    print(f"before: load average {os.getloadavg()}", flush=True)
    kwargs = {"draws": draws, "priors": pooling_override(tau)}
    t0 = time.perf_counter()
    clean = reruns = 0
    for seed in panels:
        spec, panel = panel_for(seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            data = panel if whole else panel.head(panel.n_waves - 1)
            if gamma:
                kwargs["priors"] = {**gamma_sds(spec, data, person_only=gamma == "person"),
                                    **pooling_override(tau)}
            f = bl.fit(spec, data, progressbar=False, **kwargs)
            if rerun_draws and f.rerun:  # as if the careful re-run took rerun_draws draws
                rerun = f.rerun
                f = bl.fit(spec, data, progressbar=False, target_accept=0.95,
                           **{**kwargs, "draws": rerun_draws})
                f.idata.posterior.attrs["bayeslong_rerun"] = rerun
        diag = f.diagnostics()
        ok, text = verdict(diag)
        clean += ok
        reruns += bool(f.rerun)
        first = ""
        if f.rerun:
            m = re.search(r"checks \((.*)\); sampled again", f.rerun)
            first = m.group(1) if m else f.rerun
            first = re.sub(r"(r_hat|ess_bulk|ess_tail) [0-9.]+ [<>=]+ [0-9.]+", r"\1", first)
        print(f"{'fit' if whole else 'refit'} {seed:2d} [target_accept {f.target_accept}, "
              f"{f.idata.posterior.sizes['draw']} draws]: "
              f"{'clean  ' if ok else 'FLAGGED'} {text}\n    cause: {causes(diag)}"
              + (f"\n    first run at 0.8: {first}" if first else "")
              + (f"\n    {where_divergent(f)}" if diag.attrs.get("divergences", 0) else ""),
              flush=True)
    what = "fits of all waves" if whole else "leave-future-out refits"
    print(f"clean {what}: {clean} of {len(panels)} ({reruns} sampled again at the careful target "
          "acceptance)")
    print(f"wall {time.perf_counter() - t0:.0f} s; after: load average {os.getloadavg()}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--panels", type=int, default=20)
    ap.add_argument("--no-lfo", action="store_true", help="skip the leave-future-out refits")
    ap.add_argument("--lfo-only", action="store_true",
                    help="only the leave-future-out refits, with the cause of each flag")
    ap.add_argument("--seed-offset", type=int, default=0,
                    help="panels use seeds OFFSET+1..OFFSET+PANELS (default 0: seeds 1..20; "
                         "20 gives 20 fresh panels, seeds 21..40)")
    ap.add_argument("--tau", type=lambda v: v if v == "off" else float(v), default=None,
                    help="the library's pooling of residual log-SDs: its scale tau, or 'off' "
                         "(priors={'residual_pooling': ...}); default: the library's default")
    ap.add_argument("--draws", type=int, default=1000, help="draws per chain (--lfo-only only)")
    ap.add_argument("--rerun-draws", type=int, default=None, metavar="N",
                    help="probe: a fit that the default sampler re-ran is sampled again at "
                         "target_accept 0.95 with N draws per chain, and that run kept "
                         "(--lfo-only only)")
    ap.add_argument("--gamma-sds", choices=("all", "person"), default=None,
                    help="probe: Gamma(2, 2 / (s sqrt(2/pi))) on the SD of every variance "
                         "(all) or of level, slope and first-wave variances (person), by prior "
                         "overrides (--lfo-only only)")
    ap.add_argument("--whole", action="store_true",
                    help="with --lfo-only: fit all waves instead (the probes on full fits)")
    args = ap.parse_args()
    if args.lfo_only:
        return refits_only(seeds(args), tau=args.tau, draws=args.draws,
                           rerun_draws=args.rerun_draws, whole=args.whole, gamma=args.gamma_sds)
    print("command: PYTHONPATH=. .venv/bin/python bench/boundary.py " + " ".join(sys.argv[1:]))
    print(f"before: load average {os.getloadavg()}", flush=True)
    t0 = time.perf_counter()
    clean_fits = clean_refits = reruns = 0
    priors = pooling_override(args.tau)
    for seed in seeds(args):
        spec, panel = panel_for(seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f = bl.fit(spec, panel, progressbar=False, priors=priors)
            ok, text = verdict(f.diagnostics())
            clean_fits += ok
            reruns += bool(f.rerun)
            line = (f"panel {seed:2d} [{f.sampler}, target_accept {f.target_accept}]: "
                    f"{'clean  ' if ok else 'FLAGGED'} {text}")
            if not args.no_lfo:
                score = bl.forecast_score(spec, panel, progressbar=False, priors=priors)
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
