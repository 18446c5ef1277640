"""Wall time of the first Bayesian fit of a structure never fitted before in the process.

alt (N = 120, T = 5), 4 chains x 1000 draws (1000 warm-up), in a fresh Python process, so
the structure is new to it. With warm caches the on-disk caches of numba and PyTensor are
the machine's own (run once before to fill them); with ``--cold`` NUMBA_CACHE_DIR and
PYTENSOR_FLAGS=compiledir=... point at fresh temporary directories, as on a new machine.

Command:  cd /work/main && .venv/bin/python bench/first_fit.py [--cold] [--sampler NAME]
          (NAME: auto, generic, nutpie or pymc; default auto)
Prints:   the command, the load (uptime) before and after, the wall time of the fresh
          process split into imports, compile (building the model and compiling or loading
          the log density), sampling and the per-unit log-likelihood, and its CPU time.
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

CHILD = r"""
import json, sys, time, warnings
t0 = time.perf_counter()
warnings.filterwarnings("ignore")
sys.path.insert(0, {bench!r})
import bayeslong as bl
from _panels import simulate_alt, ess_lag
spec, panel = simulate_alt(120, n_waves=5, seed=1)
t1 = time.perf_counter()
f = bl.fit(spec, panel, draws=1000, tune=1000, chains=4, seed=1, sampler={sampler!r},
           progressbar=False)
t2 = time.perf_counter()
print(json.dumps({{"imports": t1 - t0, "fit": t2 - t1, "sampler": f.sampler,
                  "ess_lag": ess_lag(f.idata), **f.timing}}))
"""


def uptime() -> str:
    try:
        return subprocess.run(["uptime"], capture_output=True, text=True).stdout.strip()
    except OSError:
        return f"load average {os.getloadavg()}"


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cold", action="store_true", help="fresh numba and PyTensor caches")
    parser.add_argument("--sampler", default="auto")
    args = parser.parse_args()
    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print("before:", uptime())
    env = dict(os.environ)
    with tempfile.TemporaryDirectory() as tmp:
        if args.cold:
            env["NUMBA_CACHE_DIR"] = str(Path(tmp) / "numba")
            env["PYTENSOR_FLAGS"] = f"compiledir={Path(tmp) / 'pytensor'}"
        code = CHILD.format(bench=str(Path(__file__).parent), sampler=args.sampler)
        t0 = time.perf_counter()
        cpu0 = resource.getrusage(resource.RUSAGE_CHILDREN)
        out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        cpu1 = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)
    if out.returncode:
        print(out.stderr)
        raise SystemExit(out.returncode)
    r = json.loads(out.stdout.strip().splitlines()[-1])
    compile_s = r["build"] + r["compile"]
    print(f"caches: {'cold (fresh temporary dirs)' if args.cold else 'warm (the machine own)'}; "
          f"sampler {r['sampler']}")
    rest = r["fit"] - compile_s - r["sample"] - r["loglik"]
    print(f"wall of the fresh process {wall:6.1f} s = imports and data {r['imports']:5.1f} s "
          f"+ fit {r['fit']:5.1f} s (compile {compile_s:5.1f} s, sample {r['sample']:5.1f} s, "
          f"per-unit log-likelihood {r['loglik']:4.1f} s, rest {rest:4.1f} s)"
          f"; ESS(lag) {r['ess_lag']:.0f}")
    # CPU seconds of the fresh process (all its threads): on a loaded machine the wall
    # time grows with the load, the CPU time much less
    print(f"CPU time of the fresh process {cpu:6.1f} s")
    print("after: ", uptime())


if __name__ == "__main__":
    main()
