"""Bayesian fits of models with categorical indicators: latent responses and thresholds.

A continuous panel is fitted on its marginal likelihood (pattern cross-products, no
latents); a categorical variable has no such closed form, so here latent variables are
parameters of the PyMC model (docs/model-family.md, "Categorical indicators"). With the
probit link (the default) they are the latent responses y* of the observed answers, each
confined to its category's interval, with the engine's implied normal distribution
(:func:`response_likelihood`); the person-level latents are then integrated out exactly.
With the logit link, whose error is not normal, they are the person-level latents:

    implied form:      eta_l,i = E[eta_l | w_i] + chol(Phi_ll + M) z_i,   z_i ~ N(0, I)
    disturbance form:  eta_i = E[eta | w_i] + (I - B)^-1 zeta_i,   zeta_i = chol(Psi_a) z_i
    y*_i  = nu + Lam eta_i (+ eps_i, integrated out by the link)

E[eta | w_i] = alpha + Gamma w_i and Phi = Cov[eta | w] come from
:func:`bayeslong.model.moments.latent_moments`, so the latents have the engine's implied
mean and covariance in either form. The implied form draws only the latents that load on
observed rows (l), through their implied covariance, so that structural parameters which
trade off without changing Phi_ll (the lag against the person-level covariances) move
without moving the units' latents; M takes a tenth of the probit error of a latent
measured by one categorical response into the latent, and the link keeps the rest
(``LINK_SHARE``). The disturbance form carries the disturbances with a free or non-zero
variance (Psi_a) through the structure's own B; :func:`latent_layout` uses it where Phi_ll
is singular (fewer disturbances than loaded latents). Both are non-centred (the z_i are
standard normal a priori whatever the variances), which keeps the sampler away from the
funnel between a variance and the latents it scales (Papaspiliopoulos, Roberts & Sköld
2007).
Observed categories add their ordered probit / logit log probability at their thresholds
(:func:`category_loglik`; a binary variable is the case of one threshold, fixed at 0);
continuous indicators of a mixed model are normal around their latent response with their
unique variance.

Thresholds are ordered by construction: tau_1 = 0 and each later one is the previous plus a
positive gap with a half-normal prior. After sampling, each unit's marginal log-likelihood
(latents integrated out, :mod:`bayeslong.infer.marginal`) is stored for LOO and WAIC.

References
----------
Papaspiliopoulos, O., Roberts, G. O. & Sköld, M. (2007). A general framework for the
parametrization of hierarchical models. Statistical Science 22(1), 59-73.
doi:10.1214/088342307000000014
"""

from __future__ import annotations

import dataclasses
import json
import os
import time
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from bayeslong.arguments import acceptance_rate, seed_value, whole_number
from bayeslong.dims import PARAMETER, UNIT
from bayeslong.errors import SpecError
from bayeslong.infer.marginal import POINTS, REPLICATES, unit_marginal_loglik
from bayeslong.infer.priors import (
    FAMILIES,
    PriorSet,
    assemble_theta,
    family_dist,
    resolve_priors,
)
from bayeslong.infer.progress import PymcCounter, SamplingProgress, run_nutpie
from bayeslong.infer.sampling import (
    SAMPLERS,
    Fit,
    diagnose,
    inference_data,
    warn_convergence,
)
from bayeslong.model.structure import structure_for
from bayeslong.model.thresholds import Categorical, categorical_structure

#: Scale s of a categorical variable's latent response for the default priors, in units
#: of the probit error's SD: means Normal(0, 3 s), SDs HalfNormal(s), effects
#: Normal(0, 2.5 s / s_x) as in :func:`default_priors`. With binary data the overall scale
#: of the latents against the fixed error is only weakly identified; measured on binary alt
#: (N = 200, T = 5, bench/categorical.py) s = 2 let the variances drift to 4-8 times their
#: true values with posterior SDs as large as their means, s = 1 kept them near the truth.
LATENT_SD = 1.0
#: Default prior of each gap between neighbouring thresholds: HalfNormal(GAP_SD).
GAP_SD = 3.0
#: Draws at most used for the per-unit marginal log-likelihood (thinned evenly beyond).
LOGLIK_DRAWS = 1000


class _LatentScale:
    """The panel as the default priors see it: a categorical variable on its latent scale."""

    def __init__(self, panel, cat: Categorical):
        self._panel, self._cat = panel, cat

    def __getattr__(self, name):
        return getattr(self._panel, name)

    def indicator_scale(self):
        scale = self._panel.indicator_scale()
        scale.update({v: {"mean": 0.0, "sd": LATENT_SD} for v in self._cat.variables})
        return scale

    def summary_scale(self):
        scale = self.indicator_scale()
        return {name: scale[group[0]] for name, group in self._panel.indicators.items()}


def categorical_priors(cat: Categorical, panel, priors: dict | None = None):
    """``(PriorSet of the structure, {threshold: (family, *args)} of the gaps)``.

    A prior given for a threshold is the prior of its gap to the threshold below (a
    positive family); a prior for a parameter the categorical model fixes is refused.
    """
    priors = dict(priors or {})
    gaps = {}
    for name in cat.thresholds:
        value = priors.pop(name, ("halfnormal", GAP_SD))
        if isinstance(value, str):
            value = (value,)
        family = str(value[0]).lower() if value else ""
        if family not in FAMILIES or FAMILIES[family][1] != "positive" \
                or len(value) - 1 != len(FAMILIES[family][0]):
            positive = ", ".join(f for f, (_, sup) in FAMILIES.items() if sup == "positive")
            raise SpecError(f"prior for {name!r} is on the gap to the threshold below it, which "
                            f"is positive: give one of {positive} with its arguments, e.g. "
                            f"('halfnormal', 3); got {value!r}")
        gaps[name] = (family, *(float(a) for a in value[1:]))
    fixed = [n for n in priors if n in cat.pinned]
    if fixed:
        raise SpecError(f"`priors` names {fixed[0]!r}, which the categorical model fixes at "
                        f"{cat.pinned[fixed[0]]:g} (docs/model-family.md, 'Categorical "
                        "indicators'); leave it out")
    # no pooling of residual log-SDs here: the categorical model's latent scale pins
    # variances and its PyMC model does not carry the term (docs/priors.md)
    return resolve_priors(cat.structure, _LatentScale(panel, cat), priors, pooling=False), gaps


def _observed_parts(cat: Categorical, panel):
    """Per observed variable: rows, the (unit, wave) positions observed and their values."""
    ys = panel.outcome_matrix()
    T = panel.n_waves
    parts = []
    for j, name in enumerate(panel.observed_names):
        rows = np.arange(j * T, (j + 1) * T)
        seen = ~np.isnan(ys[:, rows])
        units, waves = np.nonzero(seen)
        parts.append((name, rows, units, waves, ys[:, rows][seen]))
    return parts


def build_categorical_model(cat: Categorical, panel, prior_set: PriorSet, gaps: dict,
                            responses: bool | None = None):
    """The PyMC model of a categorical fit (module notes).

    ``responses``: sample the latent responses (:func:`response_likelihood`) rather than
    the person-level latents; by default where the link is probit and the model has
    person-level variance (with none, the categories' likelihood needs no latent at all).

    The priors' hyperparameters, the covariates and the observed values are model data
    (``prior_hyper``, ``covariates``, ``observed[<variable>]``; :func:`model_inputs`), so one
    built and compiled model serves every panel of the same design and every prior set of
    the same families (:func:`_entry`)."""
    import pymc as pm
    import pytensor.tensor as pt

    from bayeslong.infer.pymc_model import lkj_block
    from bayeslong.model.moments import latent_moments, model_matrices

    structure = cat.structure
    N, L = panel.n_units, len(structure.latents)
    slices = prior_set.hyper_slices()
    Theta = structure.matrices["Theta"]
    with pm.Model(coords={PARAMETER: list(cat.names), UNIT: list(panel.units)}) as model:
        hyper = pm.Data("prior_hyper", prior_set.hyper)
        values, corr = {}, {}
        in_lkj = {int(i) for b in prior_set.blocks for i in np.diag(structure.blocks[b].index)}
        for i, p in enumerate(prior_set.priors):
            name = structure.names[i]
            if p.target == "correlation" or i in in_lkj:
                continue
            if name in cat.pinned:
                fixed = cat.pinned[name]
                values[p.rv_name] = pt.constant(np.sqrt(fixed) if p.target == "sd" else fixed)
            elif p.factory is not None:
                values[p.rv_name] = p.factory(p.rv_name)
            else:
                sl = slices[p.parameter]
                cls, kwargs = family_dist(p.family, [hyper[j] for j in range(sl.start, sl.stop)])
                values[p.rv_name] = cls(p.rv_name, **kwargs)
        for b in prior_set.blocks:  # LKJ(eta) via a potential, as in the continuous model
            corr[b] = lkj_block(structure, prior_set, b, hyper, slices, values)
        theta = assemble_theta(prior_set, values, corr, pt.stack)
        for i, p in enumerate(prior_set.priors):
            if p.target != "value" or structure.names[i] in cat.pinned:
                pm.Deterministic(structure.names[i], theta[i])
        # thresholds: tau_1 = 0, each later one the previous plus a positive gap
        tau = {}
        for name, below in threshold_gaps(cat).items():
            family, *args = gaps[name]
            cls, kwargs = family_dist(family, args)
            gap = cls(f"{name}__gap", **kwargs)
            tau[name] = pm.Deterministic(name, (tau[below] if below is not None else 0.0) + gap)
        w = pm.Data("covariates", panel.covariate_matrix())
        layout = latent_layout(cat, prior_set)
        if responses is None:
            responses = layout.form != "none" and cat.link == "probit"
        if responses:  # the latent responses themselves, the latents integrated out
            response_likelihood(cat, panel, theta, tau, w)
            return model
        # person-level latents, non-centred, with the engine's implied moments
        m = model_matrices(structure, theta)
        alpha, Gamma, Phi, _ = latent_moments(structure, theta, matrices=m)
        eta_mean = alpha[None, :] + pt.dot(w, Gamma.T)
        which = list(layout.latents)
        if layout.form == "none":
            eta_i = eta_mean
        else:  # implied: the loaded latents' covariance; disturbances: Psi, carried through B
            cov = Phi if layout.form == "implied" else m["Psi"]
            root = pt.linalg.cholesky(cov[which][:, which] + np.diag(layout.moved))
            z = pm.Normal("z", 0.0, 1.0, shape=(N, len(which)))
            draw = pt.dot(z, root.T)
            if layout.form == "implied":
                eta_i = pt.inc_subtensor(eta_mean[:, which], draw)
            else:
                zeta = pt.set_subtensor(pt.zeros((N, L))[:, which], draw)
                dev = zeta
                for _ in range(structure.path_depth - 1):  # (I - B)^-1 zeta: B is nilpotent
                    dev = zeta + pt.dot(dev, m["B"].T)
                eta_i = eta_mean + dev
        ystar = pt.flatten(m["nu"][None, :] + pt.dot(eta_i, m["Lam"].T))
        Y = len(structure.observed)
        for name, rows, units, waves, obs in _observed_parts(cat, panel):
            mean = ystar[units * Y + rows[waves]]  # one flat index: a cheap gather and gradient
            if name in cat.rows:
                table = cat.cuts[name]
                cut = pt.stack([tau[cat.thresholds[k]] if k >= 0 else pt.constant(0.0)
                                for k in table.ravel()])
                codes = pm.Data(f"observed[{name}]", obs.astype(np.int64))
                pm.Potential(f"y[{name}]", category_loglik(
                    mean, cut, codes, waves, table.shape[1] + 1, cat.link,
                    scale=layout.link_scale[rows[waves]]).sum())
            else:
                sd = pt.sqrt(pt.diagonal(_unique_variances(cat, Theta, m, name, rows)))
                pm.Normal(f"y[{name}]", mu=mean, sigma=sd[waves],
                          observed=pm.Data(f"observed[{name}]", obs))
    return model


def response_likelihood(cat: Categorical, panel, theta, tau: dict, w):
    """Add the latent responses and their log density to the model in context.

    Returns the (N,) per-unit log density of the unconstrained u (and ``v``), Jacobians
    included, whose sum the model carries.

    Every observed category becomes its latent response y*, confined to its interval:
    y* = tau_1 - exp(u) in the lowest category, tau_(C-1) + exp(u) in the highest, and
    tau_c + (tau_(c+1) - tau_c) logistic(u) in between, with the log Jacobian of each map
    added. A missing value's y* is free (``v``). Each unit's y* (continuous indicators as
    observed) then has the engine's implied normal distribution, N(c + D w_i, Sigma) from
    :func:`bayeslong.model.moments.implied_moments` with the probit errors in Sigma, so
    the person-level latents are integrated out exactly. Why the log scale for the open
    intervals: a larger latent variance spreads the y* of a half-line category outwards by
    a common factor, which is a common shift of their u, a straight line the sampler's
    mass matrix can follow (docs/engine.md, "Categorical fits: cost and mixing").
    """
    import pymc as pm
    import pytensor.tensor as pt

    from bayeslong.model.moments import implied_moments

    c, D, Sigma = implied_moments(cat.structure, theta)
    mean = c[None, :] + pt.dot(w, D.T)
    N, Y = panel.n_units, len(cat.structure.observed)
    flat, jac = pt.zeros(N * Y), pt.zeros(N * Y)
    seen = np.zeros(N * Y, dtype=bool)
    for name, rows, units, waves, obs in _observed_parts(cat, panel):
        at = units * Y + rows[waves]
        seen[at] = True
        values = pm.Data(f"observed[{name}]", obs.astype(np.int64) if name in cat.rows else obs)
        if name not in cat.rows:
            flat = pt.set_subtensor(flat[at], values)
            continue
        table = cat.cuts[name]
        width = table.shape[1]
        cut = pt.stack([tau[cat.thresholds[k]] if k >= 0 else pt.constant(0.0)
                        for k in table.ravel()])
        base = waves.astype(np.int64) * width
        upper = cut[base + pt.minimum(values, width - 1)]  # tau_(c+1), c < C-1
        lower = cut[base + pt.maximum(values - 1, 0)]      # tau_c, c > 0
        u = pm.Flat(f"u[{name}]", shape=len(obs))
        if width == 1:  # binary: the half-line below or above the one threshold
            ystar, log_jac = lower + (2 * values - 1) * pt.exp(u), u
        else:
            gap = pt.switch(pt.lt(upper - lower, 1e-12), 1.0, upper - lower)  # ends: unused
            end = pt.eq(values, 0) | pt.eq(values, width)
            ystar = pt.switch(pt.eq(values, 0), upper - pt.exp(u),
                              pt.switch(pt.eq(values, width), lower + pt.exp(u),
                                        lower + gap * pt.sigmoid(u)))
            log_jac = pt.switch(end, u, pt.log(gap) - pt.softplus(-u) - pt.softplus(u))
        flat = pt.set_subtensor(flat[at], ystar)
        jac = pt.set_subtensor(jac[at], log_jac)
    missing = np.flatnonzero(~seen)
    if len(missing):
        flat = pt.set_subtensor(flat[missing], pm.Flat("v", shape=len(missing)))
    dist = pm.MvNormal.dist(mu=mean, chol=pt.linalg.cholesky(Sigma))
    per_unit = pm.logp(dist, flat.reshape((N, Y))) + jac.reshape((N, Y)).sum(axis=1)
    pm.Potential("y*", per_unit.sum())
    return per_unit


def threshold_gaps(cat: Categorical) -> dict:
    """``{threshold: the threshold below it, or None for the fixed first cut 0}``.

    Each free threshold is the one below it plus a positive gap, whose prior is the
    threshold's (:func:`categorical_priors`); the order is the model's, a threshold after
    the one below it. The model (:func:`build_categorical_model`) and the log prior density
    of its draws (:func:`gap_log_prior_terms`) both read the gaps from here.
    """
    out: dict = {}
    for v in cat.variables:
        table = cat.cuts[v]
        for c in range(1, table.shape[1]):
            for t in range(table.shape[0]):
                name = cat.thresholds[int(table[t, c])]
                if name not in out:
                    below = int(table[t, c - 1])
                    out[name] = cat.thresholds[below] if below >= 0 else None
    return out


def gap_log_prior_terms(cat: Categorical, gaps: dict, posterior) -> list:
    """Log prior density of each threshold's gap at the draws of ``posterior``.

    One PyMC log-density expression per threshold (not evaluated), over the draws flattened
    in chain-major order: the gap prior ``gaps[name]`` at tau_name minus the threshold below
    it (:func:`threshold_gaps`), the variable the model places that prior on.
    """
    import pymc as pm

    terms = []
    for name, below in threshold_gaps(cat).items():
        tau = np.asarray(posterior[name].values, dtype=float).reshape(-1)
        gap = tau - (np.asarray(posterior[below].values, dtype=float).reshape(-1)
                     if below is not None else 0.0)
        family, *args = gaps[name]
        cls, kwargs = family_dist(family, args)
        terms.append(pm.logp(cls.dist(**kwargs), gap))
    return terms


def model_inputs(cat: Categorical, panel, prior_set: PriorSet) -> dict:
    """The data of :func:`build_categorical_model`'s model for this panel and prior set."""
    inputs = {"prior_hyper": prior_set.hyper, "covariates": panel.covariate_matrix()}
    for name, _, _, _, obs in _observed_parts(cat, panel):
        inputs[f"observed[{name}]"] = obs.astype(np.int64) if name in cat.rows else obs
    return inputs


#: Built (and, for nutpie, compiled) models by design: see :func:`_entry`.
_COMPILED: dict = {}


def _entry(spec, cat: Categorical, panel, prior_set: PriorSet, gaps: dict) -> dict:
    """``{"model": ..., "nutpie": ...}`` for this design, built once and reused.

    Two fits share a model when their specs, structures, categories, prior families, gap
    priors and observed positions (which units are seen at which waves) are equal (the
    categorical structure derives from the design's cached structure, :func:`structure_for`,
    and the categories): what differs then (observed values, covariates, prior
    hyperparameters) is model data. A prior given as a PyMC factory is never shared.
    """
    parts = _observed_parts(cat, panel)
    key = None if prior_set.has_callable else (
        json.dumps(spec.to_dict(), sort_keys=True), structure_for(spec, panel), prior_set.key,
        json.dumps(sorted((k, list(v)) for k, v in gaps.items())),
        tuple((v, len(c)) for v, c in panel.categories.items()), panel.n_units,
        panel.covariate_matrix().shape,
        tuple((name, units.tobytes(), waves.tobytes()) for name, _, units, waves, _ in parts))
    if key is not None and key in _COMPILED:
        return _COMPILED[key]
    entry = {"model": build_categorical_model(cat, panel, prior_set, gaps)}
    if key is not None:
        _COMPILED[key] = entry
    return entry


def category_loglik(mean, cut, codes, waves: np.ndarray, n_categories: int, link: str,
                    scale=None):
    """Log probability of each observed category given its latent response's mean (PyTensor).

    ``cut`` holds the inner cuts, wave-major ((T, C-1) flattened); ``codes`` the categories
    0..C-1 (an array or the model's data, so that one compiled model serves other data of the
    same design) and ``waves`` the wave positions of the observations. With F the error's
    cdf (standard normal or logistic), P(y = c) = F(tau_c+1 - mean) - F(tau_c - mean): the
    first category needs only F(tau_1 - mean), the last only F(mean - tau_C-1) (F is
    symmetric), the others the difference, taken in log space so that no probability
    underflows: ``log_diff_normal_cdf`` (probit), and for the logit
    log(F(u) - F(l)) = log F(u) + log F(-l) + log(1 - exp(l - u)).
    Each observation's term is one of these three, chosen by its code; the middle one is
    given a harmless interval where it is not chosen, so that no infinite value reaches the
    gradient. PyMC's ordered distributions evaluate all C probabilities and renormalise them:
    the same likelihood at about 1.5 times the cost per gradient (docs/engine.md,
    "Categorical fits: cost and mixing"). ``scale`` (per observation, default 1) is the SD
    of the error left in the link, in units of the link's standard error, when part of its
    variance is drawn with the latents (:func:`latent_layout`).
    """
    import pytensor.tensor as pt
    from pymc.distributions.dist_math import log_diff_normal_cdf, normal_lcdf

    def log_cdf(x):
        return normal_lcdf(0.0, 1.0, x) if link == "probit" else -pt.softplus(-x)

    width = n_categories - 1
    codes = pt.as_tensor_variable(codes)
    base = np.asarray(waves, dtype=np.int64) * width
    scale = 1.0 if scale is None else np.asarray(scale, dtype=float)
    upper = (cut[base + pt.minimum(codes, width - 1)] - mean) / scale  # tau_c+1 - mean, c < C-1
    lower = (cut[base + pt.maximum(codes - 1, 0)] - mean) / scale      # tau_c - mean, c > 0
    first, last = log_cdf(upper), log_cdf(-lower)
    if width == 1:  # binary: no middle category
        return pt.switch(pt.eq(codes, 0), first, last)
    inside = (codes > 0) & (codes < width)
    lower_in = pt.switch(inside, lower, upper - 1.0)
    middle = (log_diff_normal_cdf(0.0, 1.0, upper, lower_in) if link == "probit" else
              log_cdf(upper) + log_cdf(-lower_in) + pt.log1mexp(lower_in - upper))
    return pt.switch(pt.eq(codes, 0), first, pt.switch(pt.eq(codes, width), last, middle))


#: Share of a probit response's error variance left in the link when the latents are drawn
#: through their implied covariance; the rest (0.1) is drawn with the latents
#: (:func:`latent_layout`, docs/engine.md "Categorical fits: cost and mixing").
LINK_SHARE = 0.9


@dataclass(frozen=True)
class LatentLayout:
    """How a categorical fit draws each unit's latents (:func:`latent_layout`).

    ``form``: "implied" (z_i scaled by the Cholesky factor of the loaded latents' implied
    covariance), "disturbances" (z_i scaled by that of the disturbances, then carried
    through B) or "none" (no person-level variance). ``latents``: positions in
    ``structure.latents`` of the latents (implied) or disturbances drawn. ``moved``: per
    drawn latent, the error variance moved from the link into it. ``link_scale``: per
    observed row, the SD of the error left in the link relative to the link's own.
    """

    form: str
    latents: tuple
    moved: np.ndarray
    link_scale: np.ndarray


def latent_layout(cat: Categorical, prior_set: PriorSet) -> LatentLayout:
    """Choose how the person-level latents are drawn (module notes).

    The implied form draws the latents that load on observed rows, eta_l, as
    E[eta_l | w] + chol(Phi_ll + M) z with Phi from
    :func:`bayeslong.model.moments.latent_moments`: a change of the structural parameters
    that leaves Phi_ll unchanged (the lag against the person-level covariances) then leaves
    every unit's latents where they are. It needs Phi_ll positive definite for generic
    parameter values, so that a model with fewer disturbances than loaded latents (random
    intercepts, growth without wave disturbances) keeps the disturbance form, which is then
    also the smaller one. M moves 1 - LINK_SHARE of the probit error of a latent measured by
    one categorical response alone (loading fixed at 1) into the latent: the link keeps
    LINK_SHARE of it, which is the same model (normal errors add), and Phi_ll + M stays
    positive definite when a variance of the process nears zero.
    """
    from bayeslong.model.moments import NUMPY, latent_moments

    structure = cat.structure
    active = _active_disturbances(cat)
    scale = np.ones(len(structure.observed))
    if not active:
        return LatentLayout("none", (), np.zeros(0), scale)
    Lam = structure.matrices["Lam"]
    nonzero = (Lam.index >= 0) | (Lam.fixed != 0)
    loaded = [l for l in range(nonzero.shape[1]) if nonzero[:, l].any()]
    rng = np.random.default_rng(0)  # generic values: variances 1, the rest small and non-zero
    theta = np.array([1.0 if p.target == "sd" else rng.uniform(-0.05, 0.05)
                      if p.target == "correlation" else rng.uniform(0.1, 0.4)
                      for p in prior_set.priors])
    theta = cat.full_theta(theta[list(cat.free)])  # the pinned values in their places
    Phi = latent_moments(structure, theta, NUMPY)[2][np.ix_(loaded, loaded)]
    eig = np.linalg.eigvalsh(0.5 * (Phi + Phi.T))
    if len(loaded) > len(active) or not eig[0] > 1e-9 * max(eig[-1], 1e-300):
        return LatentLayout("disturbances", tuple(active), np.zeros(len(active)), scale)
    moved = np.zeros(len(loaded))
    categorical_rows = {int(r) for v in cat.variables for r in cat.rows[v]}
    for j, l in enumerate(loaded):
        r = int(np.flatnonzero(nonzero[:, l])[0]) if nonzero[:, l].sum() == 1 else -1
        if (cat.link == "probit" and r in categorical_rows and nonzero[r].sum() == 1
                and Lam.index[r, l] < 0 and Lam.fixed[r, l] == 1.0):
            moved[j] = (1.0 - LINK_SHARE) * cat.error_variance
            scale[r] = np.sqrt(LINK_SHARE)
    return LatentLayout("implied", tuple(loaded), moved, scale)


def _active_disturbances(cat: Categorical) -> list[int]:
    """Latents whose disturbance has a free or non-zero variance (the rest are 0)."""
    Psi = cat.structure.matrices["Psi"]
    names = cat.structure.names
    out = []
    for l in range(Psi.index.shape[0]):
        k = int(Psi.index[l, l])
        if (k >= 0 and cat.pinned.get(names[k], 1.0) != 0.0) or (k < 0 and Psi.fixed[l, l] != 0):
            out.append(l)
    return out


def _unique_variances(cat: Categorical, Theta, m, name: str, rows: np.ndarray):
    """Theta on a continuous variable's rows, refused unless diagonal and free (mixed models)."""
    block = Theta.index[np.ix_(rows, np.arange(Theta.index.shape[0]))].copy()
    block[np.arange(len(rows)), rows] = -1
    if (block >= 0).any() or (Theta.fixed[np.ix_(rows, rows)] - np.diag(np.diag(
            Theta.fixed[np.ix_(rows, rows)]))).any():
        raise SpecError(f"continuous indicator {name!r} has unique covariances over waves; a model "
                        "with categorical indicators needs unique_covariance='none'")
    if (Theta.index[rows, rows] < 0).any() and not (Theta.fixed[rows, rows] > 0).all():
        raise SpecError(
            f"{name!r} is continuous and observed without measurement error (y = eta), which a "
            "model with categorical indicators cannot sample with person-level latents (the "
            "logit link) yet; use link='probit', measure that process by several indicators, "
            "or treat all variables alike")
    return m["Theta"][rows][:, rows]


@dataclass(frozen=True, kw_only=True, eq=False)
class CategoricalFit(Fit):
    """A :class:`~bayeslong.infer.sampling.Fit` of a model with categorical indicators.

    ``categorical`` is the model's categorical part (thresholds, fixed parameters);
    ``idata.posterior`` holds every structure parameter (fixed ones as constants) and the
    thresholds; ``idata.log_likelihood["y"]`` the per-unit marginal log-likelihood, with
    its numerical error in ``idata.log_likelihood.attrs``.
    """

    categorical: Categorical | None = None
    gaps: dict = dataclasses.field(default_factory=dict)

    def diagnostics(self) -> pd.DataFrame:
        return diagnose(self.idata, self.categorical.names)

    def summary(self) -> pd.DataFrame:
        import arviz as az

        names = list(self.categorical.names)
        table = az.summary(self.idata, var_names=names, hdi_prob=0.9, kind="stats")
        diag = self.diagnostics()
        table = table.join(diag[["r_hat", "ess_bulk", "ess_tail", "flag"]])
        table.index.name = "parameter"
        return table

    def file_attrs(self) -> dict:
        """:meth:`Fit.file_attrs` plus the priors of the thresholds' gaps (the panel's
        categories are among its labels); ``bl.load_fit`` reads them back."""
        return {**super().file_attrs(),
                "bayeslong_threshold_priors": json.dumps({k: list(v) for k, v in self.gaps.items()})}

    def threshold_draws(self) -> np.ndarray:
        """The thresholds' draws, (chains * draws, n_thresholds), ``categorical.thresholds`` order."""
        post = self.idata.posterior
        return np.stack([post[n].values.reshape(-1) for n in self.categorical.thresholds], axis=1) \
            if self.categorical.thresholds else np.empty((post.sizes["chain"] * post.sizes["draw"], 0))


#: A categorical fit's defaults: draws per chain and the NUTS target acceptance, those of a
#: continuous fit. Measured on binary alt, N = 200, T = 5 (docs/engine.md, "Categorical
#: fits: cost and mixing"): with the latent responses sampled, 4 x 1000 at 0.8 gave
#: ESS(lag) 2157 and 2900 on fit seeds 2 and 3 and no divergence (at 0.65: three
#: divergences); with the person-level latents sampled it had taken 4 x 2000 at 0.9 to reach
#: a median of 529 over eight seeds.
CATEGORICAL_DRAWS = 1000
CATEGORICAL_TARGET_ACCEPT = 0.8

#: What a flagged categorical fit's warning advises (docs/engine.md, "Categorical fits:
#: cost and mixing").
CATEGORICAL_ADVICE = (
    "Categorical fits cost more than continuous ones: every observed answer's latent "
    "response is sampled. With one binary or ordinal variable per wave the data say little "
    "about how persistence divides between the lag and the person-level variances, so their "
    "posteriors are wide. More draws (e.g. draws=2000) raise every ESS in proportion; "
    "target_accept=0.9 or 0.95 removes divergences; more indicators per wave, ordinal "
    "answers, more waves or units inform the variances themselves.")


def fit_categorical(spec, panel, *, draws: int = CATEGORICAL_DRAWS, tune: int = 1000, chains: int = 4,
                    seed: int = 1, priors: dict | None = None, sampler: str = "auto",
                    progressbar: bool = True, cores: int | None = None,
                    target_accept: float | None = None, loglik_draws: int = LOGLIK_DRAWS,
                    points: int = POINTS, replicates: int = REPLICATES) -> CategoricalFit:
    """Fit ``spec`` to a panel with categorical variables by NUTS with latent responses.

    Parameters are those of :func:`bayeslong.fit`, plus ``loglik_draws`` (the per-unit
    marginal log-likelihood is computed on at most this many draws, thinned evenly within
    each chain; ``attrs["thin"]`` of the log-likelihood group says by how much) and
    ``points``/``replicates`` (its quasi-Monte Carlo points, :mod:`bayeslong.infer.marginal`).
    ``progressbar``: True shows the sampler's own bar, a callable receives a
    :class:`bayeslong.infer.progress.SamplingProgress` as for continuous fits.
    ``draws`` defaults to 1000 per chain and ``target_accept`` (the NUTS step-size target)
    to 0.8, as for a continuous fit (``CATEGORICAL_DRAWS``). There is no careful re-run, as
    a categorical fit costs minutes: give 0.9 or 0.95 yourself when the fit reports
    divergences.
    ``spec``'s measurement options ``link`` (probit | logit) and ``thresholds`` (equal |
    free over waves) choose the categorical model (model/thresholds.py).

    Returns
    -------
    CategoricalFit
    """
    for label, value, low in (("draws", draws, 1), ("tune", tune, 0), ("chains", chains, 1),
                              ("loglik_draws", loglik_draws, 1)):
        whole_number(value, label, least=low, where="fit")
    seed_value(seed, where="fit")
    accept = acceptance_rate(target_accept, where="fit",
                             left_out=f"{CATEGORICAL_TARGET_ACCEPT}, a categorical fit's default")
    accept = CATEGORICAL_TARGET_ACCEPT if accept is None else accept
    if sampler not in SAMPLERS:
        raise SpecError(f"`sampler` must be one of {', '.join(SAMPLERS)}; got {sampler!r}")
    from importlib.util import find_spec

    which = "nutpie" if sampler == "nutpie" or (sampler == "auto" and find_spec("nutpie")) else "pymc"
    cat = categorical_structure(spec, panel)
    prior_set, gaps = categorical_priors(cat, panel, priors)
    t0 = time.perf_counter()
    entry = _entry(spec, cat, panel, prior_set, gaps)
    model = entry["model"]
    build_s = time.perf_counter() - t0
    keep = list(cat.structure.names) + list(cat.thresholds)
    cores = min(int(chains), os.cpu_count() or 1) if cores is None else int(cores)
    from bayeslong.threads import single_thread

    with single_thread(), warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=RuntimeWarning)
        warnings.filterwarnings("ignore", category=FutureWarning)
        t0 = time.perf_counter()
        report = progressbar if callable(progressbar) else None
        if report is not None:
            report(SamplingProgress(stage="compiling", sampler=which))
        if which == "nutpie":
            import nutpie

            if "nutpie" not in entry:
                entry["nutpie"] = nutpie.compile_pymc_model(model, backend="numba", var_names=keep)
            compiled = entry["nutpie"].with_data(**model_inputs(cat, panel, prior_set))
            compile_s = time.perf_counter() - t0
            t0 = time.perf_counter()
            # the low-rank-modified mass matrix, as for continuous fits (sampling.py): the lag
            # correlates strongly with the variances and the first wave's parameters; a
            # callable progressbar gets the draws per chain (infer/progress.py)
            raw = run_nutpie(compiled, draws=int(draws), tune=int(tune), chains=int(chains),
                             cores=cores, seed=int(seed), init_mean=np.zeros(compiled.n_dim),
                             progressbar=progressbar, target_accept=float(accept))
        else:
            import pymc as pm

            compile_s = 0.0
            counter = None if report is None else PymcCounter(int(chains), int(draws + tune), report)
            with model:
                pm.set_data(model_inputs(cat, panel, prior_set))
                raw = pm.sample(draws=int(draws), tune=int(tune), chains=int(chains), cores=1,
                                random_seed=int(seed), progressbar=progressbar is True,
                                var_names=keep, compute_convergence_checks=False, callback=counter,
                                target_accept=float(accept))
            if counter is not None:
                counter.finish()
        sample_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        idata = _tidy(raw, cat, panel, keep, int(loglik_draws), int(points), int(replicates), int(seed))
        loglik_s = time.perf_counter() - t0
    idata.posterior.attrs.update({"bayeslong_target_accept": float(accept), "bayeslong_rerun": ""})
    result = CategoricalFit(spec=spec, panel=panel, structure=cat.structure, seed=int(seed),
                            idata=idata, prior_set=prior_set, sampler=which, categorical=cat,
                            gaps=gaps,
                            timing={"build": build_s, "compile": compile_s, "sample": sample_s,
                                    "loglik": loglik_s})
    warn_convergence(result.diagnostics(), advice=CATEGORICAL_ADVICE)
    return result


def categorical_fit_from_file(idata, attrs, spec, panel, path) -> CategoricalFit:
    """The :class:`CategoricalFit` of a file read by
    :func:`bayeslong.infer.sampling.read_fit_file` (``bl.load_fit`` calls it)."""
    from bayeslong.infer.sampling import stored_priors

    cat = categorical_structure(spec, panel)
    gaps = {k: tuple(v) for k, v in json.loads(attrs.get("bayeslong_threshold_priors", "{}")).items()}
    prior_set, gaps = categorical_priors(cat, panel, {**stored_priors(attrs, path), **gaps})
    return CategoricalFit(spec=spec, panel=panel, structure=cat.structure,
                          seed=int(attrs["bayeslong_seed"]), idata=idata, prior_set=prior_set,
                          sampler=str(attrs.get("bayeslong_sampler", "")), categorical=cat,
                          gaps=gaps, timing={})


def _tidy(raw, cat: Categorical, panel, keep, loglik_draws, points, replicates, seed):
    """The parameters, the per-unit marginal log-likelihood, observed and constant data."""
    import xarray as xr

    post = raw.posterior[keep]
    post = post.drop_vars([c for c in post.coords if c not in ("chain", "draw")])
    nc, nd = post.sizes["chain"], post.sizes["draw"]
    thin = max(1, int(np.ceil(nc * nd / loglik_draws)))
    sub = post.isel(draw=slice(None, None, thin))
    theta = np.stack([sub[n].values for n in cat.structure.names], axis=-1)
    tau = (np.stack([sub[n].values for n in cat.thresholds], axis=-1) if cat.thresholds
           else np.empty(theta.shape[:2] + (0,)))
    s = theta.shape[0] * theta.shape[1]
    ll, err = unit_marginal_loglik(cat, panel, theta.reshape(s, -1), tau.reshape(s, -1),
                                   points=points, replicates=replicates, seed=seed,
                                   return_error=True)
    units = list(panel.units)
    loglik = xr.Dataset({"y": (("chain", "draw", UNIT), ll.reshape(nc, -1, panel.n_units))},
                        coords={"chain": sub.chain.values, "draw": sub.draw.values, UNIT: units})
    loglik.attrs.update({"thin": thin, "marginal": "latents integrated out",
                         "error_max": float(err.max()), "error_median": float(np.median(err)),
                         "points": points, "replicates": replicates})
    return inference_data(raw, post, loglik, panel, panel.observed_names)
