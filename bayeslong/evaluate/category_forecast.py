"""Leave-future-out for models with categorical variables: the last wave's categories given the past.

A unit's one-step-ahead predictive probability of its last wave is (docs/comparison.md,
"Leave-future-out with categorical variables")

    p(y_iT | y_i,<T, w_i) = E_theta[ p(y_i | w_i, theta) / p(y_i,<T | w_i, theta) ]

with theta drawn from the posterior given waves 1..T-1 of every unit. Both probabilities are
the per-unit marginal likelihoods of :mod:`bayeslong.infer.marginal` (the latents
integrated out), on the whole panel and on the panel with wave T hidden; their ratio is the
conditional probability of the wave-T categories (and the density of wave-T continuous
values) given the unit's earlier waves. The posterior given waves 1..T-1 is the fit of the
T-wave model to the panel with wave T hidden (:func:`bayeslong.evaluate.comparison.
last_wave_hidden`): a parameter that only wave T informs (a wave-T threshold under
``thresholds = "free"``, a wave-T intercept) keeps its prior there, which is what the
model says about a wave it has not seen.

This module returns the unit terms; :func:`bayeslong.evaluate.comparison.forecast_score`
wraps them in a ``ForecastScore`` like those of continuous models (Bürkner, Gabry & Vehtari
2020, exact one-step-ahead leave-future-out with M = 1).

References
----------
Bürkner, P.-C., Gabry, J. & Vehtari, A. (2020). Approximate leave-future-out
cross-validation for Bayesian time series models. Journal of Statistical Computation and
Simulation 90(14), 2499-2523. doi:10.1080/00949655.2020.1783262
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import logsumexp

from bayeslong.dims import UNIT
from bayeslong.infer.categorical import LOGLIK_DRAWS, fit_categorical
from bayeslong.infer.diagnostics import convergence_problems
from bayeslong.infer.marginal import unit_marginal_loglik
from bayeslong.model.thresholds import categorical_structure


def last_wave_terms(spec, panel, hidden, **fit_kwargs) -> tuple[pd.Series, tuple, dict]:
    """Fit ``spec`` to ``hidden`` (``panel`` with wave T missing) and score wave T.

    Returns ``(terms, problems, timing)``: log p(y_iT | y_i,<T, w_i) for each unit observed
    at wave T (indexed by unit), the refit's convergence warnings and its timing.
    """
    kwargs = {"loglik_draws": 2, **fit_kwargs}  # the refit's own LOO terms are not needed
    with convergence_problems() as problems:  # kept with the score, and passed on
        past = fit_categorical(spec, hidden, **kwargs)
    post = past.idata.posterior
    n = post.sizes["chain"] * post.sizes["draw"]
    rows = np.unique(np.linspace(0, n - 1, min(n, LOGLIK_DRAWS)).round().astype(int))
    theta = np.asarray(past.theta_draws(), dtype=float)[rows]
    tau = np.asarray(past.threshold_draws(), dtype=float)[rows]
    terms = conditional_terms(categorical_structure(spec, panel), panel, hidden, theta, tau,
                              seed=int(fit_kwargs.get("seed", 1)))
    return terms, tuple(problems), dict(getattr(past, "timing", {}) or {})


def conditional_terms(cat, panel, hidden, theta, tau, *, seed: int = 0) -> pd.Series:
    """log (1/S sum_s p(y_iT | y_i,<T, w_i, theta_s)) for each unit observed at wave T.

    ``cat`` is the model's categorical part on ``panel``'s design, ``hidden`` the panel with
    wave T missing (:func:`bayeslong.evaluate.comparison.last_wave_hidden`), ``theta`` and
    ``tau`` (S, .) the draws (module notes). A unit observed only at wave T is scored by its
    marginal probability there.
    """
    theta, tau = np.atleast_2d(theta), np.atleast_2d(tau)
    whole = unit_marginal_loglik(cat, panel, theta, tau, seed=seed)  # (S, N)
    before = np.zeros_like(whole)
    where = {u: i for i, u in enumerate(panel.units)}
    kept = [where[u] for u in hidden.units]  # units with an earlier wave observed
    before[:, kept] = unit_marginal_loglik(cat, hidden, theta, tau, seed=seed)
    seen_last = ~np.isnan(panel.y[:, -1]).all(axis=1)
    terms = logsumexp(whole[:, seen_last] - before[:, seen_last], axis=0) - np.log(len(theta))
    index = pd.Index([u for u, s in zip(panel.units, seen_last) if s], name=UNIT)
    return pd.Series(terms, index=index, name="elpd_lfo")
