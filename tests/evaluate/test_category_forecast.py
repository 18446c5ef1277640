"""Leave-future-out terms of categorical models: the last wave's categories given the past.

Expected values: the random-intercept ordered probit (Butler & Moffitt 1982, Econometrica
50(3), 761-764), whose probability of a unit's categories is a one-dimensional integral over
its intercept, computed with scipy.integrate.quad; the conditional probability of the last
wave is the ratio of the integral over all waves to the integral over the earlier ones,
averaged over posterior draws on the probability scale (Bürkner, Gabry & Vehtari 2020,
eq. 4 with M = 1).
"""

import numpy as np
import pandas as pd
from scipy import integrate, stats

import bayeslong as bl
from bayeslong.evaluate.category_forecast import conditional_terms
from bayeslong.evaluate.comparison import last_wave_hidden
from bayeslong.model.thresholds import categorical_structure


def _probability(codes, m, v, tau2):
    """P(y_1..y_k) of the random-intercept ordered probit with cuts (-inf, 0, tau2, inf)."""
    cuts = np.array([-np.inf, 0.0, tau2, np.inf])
    dens = stats.norm(m, np.sqrt(v)).pdf

    def integrand(b):
        p = dens(b)
        for c in codes:
            p *= stats.norm.cdf(cuts[c + 1] - b) - stats.norm.cdf(cuts[c] - b)
        return p

    return integrate.quad(integrand, -np.inf, np.inf, epsabs=1e-12)[0]


def test_last_wave_terms_match_the_ratio_of_integrals():
    spec = bl.model("random-effects")
    df = bl.simulate(spec, {"level_mean": 0.3, "level_var": 0.9, "threshold[y,2]": 1.0}, 8, 4,
                     seed=5, categorical={"y": 3})
    df.loc[(df["unit"] == 2) & (df["wave"] == 4), "y"] = np.nan  # not observed at wave T
    df.loc[(df["unit"] == 3) & (df["wave"] == 2), "y"] = np.nan  # a gap before wave T
    panel = bl.Panel.from_long(df, unit="unit", wave="wave", outcomes=["y"],
                               categorical={"y": "ordinal"})
    cat = categorical_structure(spec, panel)
    draws = [(0.3, 0.9, 1.0), (0.1, 0.5, 1.3)]  # (level_mean, level_var, threshold)
    theta = np.array([[cat.pinned.get(n, {"level_mean": m, "level_var": v}.get(n))
                       for n in cat.structure.names] for m, v, _ in draws])
    tau = np.array([[t] for *_, t in draws])
    terms = conditional_terms(cat, panel, last_wave_hidden(panel), theta, tau, seed=0)
    assert 2 not in terms.index and len(terms) == 7
    for unit, term in terms.items():
        i = list(panel.units).index(unit)
        codes = [int(c) for c in panel.y[i, :, 0] if not np.isnan(c)]
        ratios = [_probability(codes, m, v, t) / _probability(codes[:-1], m, v, t)
                  for m, v, t in draws]
        # one latent dimension: 48-node Gauss-Hermite in infer/marginal.py, accurate to
        # about 1e-6 against adaptive quadrature on this smooth integrand; 1e-5 leaves room
        assert abs(term - np.log(np.mean(ratios))) < 1e-5, (unit, term)
    assert isinstance(terms, pd.Series) and (terms < 0).all()
