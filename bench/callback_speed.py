"""Sampling time of the generic kernel through nutpie's C callbacks against its Python
callbacks (nutpie's public from_pyfunc interface), the same kernel and seed in both.

Command:  cd /work/main && .venv/bin/python bench/callback_speed.py [N] [repeats]
Default:  alt, N = 500, T = 6, 4 chains x 1000 draws (1000 warm-up), 2 repeats of each.
"""

import os
import sys
import warnings
from pathlib import Path

warnings.filterwarnings("ignore")
sys.path.insert(0, str(Path(__file__).parent))

from _panels import ess_lag, simulate_alt  # noqa: E402
from bayeslong.infer.generic_logp import sample  # noqa: E402
from bayeslong.infer.priors import resolve_priors  # noqa: E402
from bayeslong.infer.sampling import _one_thread  # noqa: E402
from bayeslong.model.structure import structure_for  # noqa: E402


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    repeats = int(sys.argv[2]) if len(sys.argv) > 2 else 2
    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print("load average", os.getloadavg())
    spec, panel = simulate_alt(n, seed=1)
    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel)
    for _ in range(repeats):
        for callback in ("c", "python"):
            with _one_thread():
                idata, _, seconds = sample(structure, prior_set, panel, draws=1000, tune=1000,
                                           chains=4, cores=min(4, os.cpu_count() or 1), seed=1,
                                           progressbar=False, callback=callback)
            ess = ess_lag(idata)
            print(f"{callback:<7} callbacks: sampling {seconds:6.2f} s   ESS(lag) {ess:6.0f}   "
                  f"ESS/s {ess / seconds:7.0f}", flush=True)
    print("load average", os.getloadavg())


if __name__ == "__main__":
    main()
