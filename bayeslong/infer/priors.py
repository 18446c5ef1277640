"""Priors: weakly informative defaults on the data's own scale, overrides, prior predictive.

Every free parameter of a model gets a named prior. The defaults follow one rule, written
out in :func:`default_priors`; a user replaces any of them by parameter name with a family
and its arguments, ``priors={"lag": ("normal", 0.3, 0.1)}``, or with a PyMC distribution
factory, ``priors={"lag": lambda name: pm.Normal(name, 0.0, 1.0)}``.

Variances are given priors through their standard deviations, and the correlations of a
free covariance block of two or more variables through an LKJ distribution, so every draw
of a block is a valid covariance matrix. :func:`assemble_theta` is the one place where the
parameter vector is put together from those pieces; the PyMC model (:mod:`bayeslong.build`)
and the prior predictive draws here both call it.

This module describes priors and draws from them with ``.dist`` objects; only
:mod:`bayeslong.build` places random variables in a model.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd

from bayeslong.arguments import seed_value, whole_number
from bayeslong.dims import UNIT, WAVE
from bayeslong.errors import SpecError
from bayeslong.infer import pooling as pool_terms
from bayeslong.model.structure import Structure, structure_for

#: Prior families: argument names and the support they cover.
FAMILIES: dict[str, tuple[tuple[str, ...], str]] = {
    "normal": (("mu", "sigma"), "real"),
    "student_t": (("nu", "mu", "sigma"), "real"),
    "uniform": (("lower", "upper"), "interval"),
    "halfnormal": (("sigma",), "positive"),
    "halfstudent_t": (("nu", "sigma"), "positive"),
    "exponential": (("lam",), "positive"),
    "lognormal": (("mu", "sigma"), "positive"),
    "gamma": (("alpha", "beta"), "positive"),
    "lkj": (("eta",), "correlation"),
}

#: What a prior is placed on: the parameter itself, the standard deviation of a variance
#: parameter, or the correlations of the covariance block a covariance belongs to.
TARGETS = ("value", "sd", "correlation")

#: Default LKJ shape of every covariance block's correlation matrix.
LKJ_ETA = 2.0


@dataclass(frozen=True, kw_only=True, eq=False)
class Prior:
    """The prior of one parameter.

    Attributes
    ----------
    parameter : str
        Parameter name (``structure.names``).
    family : str
        A key of :data:`FAMILIES`, or ``"callable"`` for a user factory.
    args : tuple of float
        Arguments in the order of ``FAMILIES[family][0]``.
    target : {"value", "sd", "correlation"}
        ``sd``: the prior is on the square root of this variance; ``correlation``: this
        covariance's correlation follows the LKJ prior of its block.
    source : {"default", "user"}
    block : int
        Index of the covariance block (``structure.blocks``) for ``sd`` and
        ``correlation`` targets, else -1.
    factory : callable or None
        ``factory(name)`` returning a PyMC random variable, for ``family == "callable"``.
    """

    parameter: str
    family: str
    args: tuple = ()
    target: str = "value"
    source: str = "default"
    block: int = -1
    factory: Callable | None = None

    @property
    def rv_name(self) -> str:
        """Name of the random variable that carries this prior in the PyMC model."""
        return f"{self.parameter}__sd" if self.target == "sd" else self.parameter

    def describe(self) -> str:
        if self.family == "callable":
            return getattr(self.factory, "__name__", "callable")
        names = FAMILIES[self.family][0]
        return ", ".join(f"{n}={_fmt(v)}" for n, v in zip(names, self.args))


def _fmt(v: float) -> str:
    return f"{v:.4g}"


@dataclass(frozen=True, kw_only=True, eq=False)
class PriorSet:
    """The priors of every parameter of one model on one panel, in ``structure.names`` order."""

    structure: Structure
    priors: tuple[Prior, ...]
    blocks: tuple[int, ...] = field(default=())  # indices of covariance blocks with q > 1 (LKJ)
    #: the partial pooling of residual log-SDs over waves, one term per process that has
    #: two or more free residual variances (infer/pooling.py; empty when switched off)
    pooling: tuple = field(default=())
    #: what ``priors`` gave for the pooling, ``(tau,)`` or ``("off",)``; None: the default
    pooling_user: tuple | None = None

    def __getitem__(self, name: str) -> Prior:
        for p in self.priors:
            if p.parameter == name:
                return p
        raise KeyError(name)

    @property
    def has_callable(self) -> bool:
        return any(p.factory is not None for p in self.priors)

    def lkj_eta(self, b: int) -> float:
        """The LKJ shape of block ``b`` (shared by all its covariances)."""
        for p in self.priors:
            if p.target == "correlation" and p.block == b:
                return float(p.args[0])
        return LKJ_ETA

    @property
    def key(self) -> str:
        """Equal for two prior sets that build the same model graph (families, not values)."""
        return json.dumps([(p.parameter, p.family, p.target) for p in self.priors]
                          + [(g.name, list(g.members)) for g in self.pooling])

    @property
    def hyper(self) -> np.ndarray:
        """All numeric hyperparameters, concatenated in parameter order (a model input)."""
        vals = [a for p in self.priors if p.family != "callable" for a in p.args]
        return np.asarray(vals + [g.tau for g in self.pooling], dtype=float)

    def hyper_slices(self) -> dict[str, slice]:
        """Where each parameter's arguments sit in :attr:`hyper`."""
        out, pos = {}, 0
        for p in self.priors:
            if p.family == "callable":
                continue
            out[p.parameter] = slice(pos, pos + len(p.args))
            pos += len(p.args)
        for g in self.pooling:  # after every parameter's arguments
            out[g.name] = slice(pos, pos + 1)
            pos += 1
        return out

    def table(self) -> pd.DataFrame:
        """One row per parameter: family, arguments, what the prior is on, and its source."""
        rows = []
        for p in self.priors:
            on = {"value": "value", "sd": "standard deviation",
                  "correlation": "correlation (LKJ over the block "
                  + ", ".join(self.structure.names[i] for i in _block_diag(self.structure, p.block))
                  + ")" if p.block >= 0 else "correlation"}[p.target]
            rows.append({"parameter": p.parameter, "family": p.family, "arguments": p.describe(),
                         "on": on, "source": p.source})
        for g in self.pooling:  # joint terms over several variances, after the parameters
            rows.append({"parameter": g.name, "family": pool_terms.FAMILY,
                         "arguments": f"tau={_fmt(g.tau)}",
                         "on": pool_terms.describe(g, self.structure), "source": g.source})
        return pd.DataFrame(rows).set_index("parameter")

    def to_dict(self) -> dict:
        """Plain data (JSON safe); user factories are recorded by name only."""
        out = {p.parameter: {"family": p.family, "args": list(p.args), "target": p.target,
                             "source": p.source, "describe": p.describe()} for p in self.priors}
        for g in self.pooling:
            out[g.name] = {"family": pool_terms.FAMILY, "args": [g.tau], "target": "log_sd",
                           "source": g.source, "describe": f"tau={_fmt(g.tau)}",
                           "members": [self.structure.names[k] for k in g.members]}
        return out

    def user_spec(self) -> dict:
        """The ``priors=`` argument that rebuilds this set (factories cannot be restored)."""
        out = {p.parameter: (p.family, *p.args) for p in self.priors
               if p.source == "user" and p.family != "callable"}
        if self.pooling_user is not None:  # the pooling's scale, or ("off",)
            out[pool_terms.POOLING_KEY] = self.pooling_user
        return out


#: Name of the transform of a block's correlation matrix to its canonical partial
#: correlations (``atanh`` scale): the sampler's value variable is ``<lkj name>_cpc__``.
CPC_TRANSFORM = "cpc"


def lkj_sd_name(prior_set: PriorSet, b: int) -> str:
    """Name of the vector of SDs of covariance block ``b`` (one entry per member)."""
    return lkj_name(prior_set, b) + "__sd"


def lkj_name(prior_set: PriorSet, b: int) -> str:
    """Name of the LKJ variable of covariance block ``b`` (the samplers' layouts share it)."""
    diag = np.diag(prior_set.structure.blocks[b].index)
    # no commas: samplers split dimension labels derived from variable names on commas
    return "lkj__" + "__".join(prior_set.structure.names[int(i)] for i in diag)


def _block_diag(structure: Structure, b: int) -> list[int]:
    return [int(i) for i in np.diag(structure.blocks[b].index)]


def _keys(name: str) -> list[str]:
    if "[" not in name:
        return []
    inner = name[name.index("[") + 1: name.rindex("]")]
    return [k for part in inner.split(",") for k in part.split("<-")]


def _scales(panel) -> tuple[dict, dict]:
    outcome = panel.summary_scale()
    cov = {}
    for j, name in enumerate(panel.time_varying):
        cov[name] = float(np.std(panel.x[:, :, j], ddof=1))
    for j, name in enumerate(panel.time_invariant):
        cov[name] = float(np.std(panel.z[:, j], ddof=1))
    cov = {k: (v if np.isfinite(v) and v > 0 else 1.0) for k, v in cov.items()}
    return outcome, cov


def default_priors(structure: Structure, panel) -> list[Prior]:
    """Return the default prior of every parameter, following one documented rule.

    Parameters
    ----------
    structure : Structure
    panel : Panel
        Supplies the scale: for each outcome y, ``m`` = its first-wave mean and ``s`` = its
        pooled SD (:meth:`~bayeslong.data.Panel.summary_scale`); for each covariate x its
        SD ``s_x`` (pooled over waves; 1 if constant).

    Returns
    -------
    list of Prior

    Notes
    -----
    The rule (y is the parameter's process, x its covariate):

    ============================================  =====================================
    parameter                                     default prior
    ============================================  =====================================
    level / initial means, intercepts             Normal(m, 3 s + |m|)
    slope and curve means (dual change: the       Normal(0, s)
    constant change per wave)
    lag (autoregression, proportional change)     Normal(0, 0.5)
    cross-lag y <- y'                             Normal(0, 0.5 s / s')
    covariate effects on y (any wave, factor)     Normal(0, 2.5 s / s_x)
    free time score of wave t                     Normal(t - 1, 2)
    first-wave loading on factor f                Normal(f's loading at wave 1, 1)
    variance                                      its SD ~ HalfNormal(s)
    covariances of a block of q > 1 variables     correlation matrix ~ LKJ(eta = 2)
    indicator loading ``loading[j]``              Normal(1, 1)
    cross-loading ``loading[j<-k]``               Normal(0, 1)
    same-wave path ``same_wave[y<-y']``           as a cross-lag
    indicator intercept ``intercept[j]``          Normal(0, 3 s_j + |m_j|)
    unique variance ``unique_var[j]``             its SD ~ HalfNormal(s_j)
    deviation ``intercept_deviation[j,t]``        Normal(0, d_nu s_j)
    deviation ``loading_deviation[j,t]``          Normal(0, d_lambda s_j / s)
    ============================================  =====================================

    For a process measured by several indicators, m and s are those of its first listed
    indicator (the default marker, whose unit the latent takes), and m_j, s_j those of
    indicator j (:meth:`~bayeslong.data.Panel.indicator_scale`); the variance of indicator
    j's random intercept (within form, ``level_var[j]``) is on s_j. A loading is centred on the
    marker's 1 (an indicator on the marker's scale); an intercept is the indicator's mean
    minus its loading times the latent's mean, centred on 0 with the same wide location
    scale as the means. Under approximate invariance each wave's deviation of an intercept
    or a loading from the indicator's common value has the small SD ``deviation_sd``
    (d_nu, d_lambda; default 0.05) in the indicator's SDs; for a loading, whose unit is the
    indicator's per marker unit, that is d_lambda s_j / s (Muthén & Asparouhov 2012;
    docs/model-family.md, "Approximate invariance").

    A slope mean is a change per wave (per unit of time score); in the dual change model
    it is the constant change added at every wave, so 0 with scale s (the pooled SD, which
    also holds the change of the mean over waves) is a wide, neutral centre for both.
    The location scale ``3 s + |m|`` keeps both the first-wave mean and 0 within about one
    prior SD, because with a lag part of the mean moves into the lag term. The scale 2.5 for
    effects on the standardised scale follows Gelman et al. (2008). LKJ(2) puts mild weight
    away from correlations of +-1 (Lewandowski, Kurowicka & Joe 2009).

    References
    ----------
    Gelman, A., Jakulin, A., Pittau, M. G., & Su, Y.-S. (2008). A weakly informative default
    prior distribution for logistic and other regression models. Annals of Applied
    Statistics 2(4), 1360-1383. doi:10.1214/08-AOAS191
    Lewandowski, D., Kurowicka, D., & Joe, H. (2009). Generating random correlation matrices
    based on vines and extended onion method. J. Multivariate Analysis 100(9), 1989-2001.
    doi:10.1016/j.jmva.2009.04.008
    """
    outcome, cov = _scales(panel)
    names = list(panel.outcomes)
    block_of = _block_membership(structure)
    every = panel.indicator_scale()
    items = {n: v for n, v in every.items() if n not in outcome}
    out = []
    home = {n: k for k, group in (structure.indicators or {}).items() for n in group}
    for i, (name, kind) in enumerate(zip(structure.names, structure.kinds)):
        keys = _keys(name)
        if kind == "deviation":  # approximate invariance (model/measurement.py)
            part = "loading" if name.startswith("loading_") else "intercept"
            sj = every[keys[0]]["sd"]
            unit = sj if part == "intercept" else sj / outcome[home[keys[0]]]["sd"]
            out.append(Prior(parameter=name, family="normal",
                             args=(0.0, structure.spec.measurement["deviation_sd"][part] * unit)))
            continue
        if keys and keys[0] in items and name.startswith(("loading[", "intercept[", "unique_")):
            mj, sj = items[keys[0]]["mean"], items[keys[0]]["sd"]
            if name.startswith("loading["):  # a cross-loading (j<-k) is centred on none
                out.append(Prior(parameter=name, family="normal",
                                 args=(0.0 if "<-" in name else 1.0, 1.0)))
            elif name.startswith("intercept["):
                out.append(Prior(parameter=name, family="normal", args=(0.0, 3.0 * sj + abs(mj))))
            elif kind == "var":
                out.append(Prior(parameter=name, family="halfnormal", args=(sj,), target="sd",
                                 block=block_of[i]))
            else:
                out.append(Prior(parameter=name, family="lkj", args=(LKJ_ETA,),
                                 target="correlation", block=block_of[i]))
            continue
        procs = [k for k in keys if k in outcome]
        y = procs[0] if procs else names[0]
        m, s = outcome[y]["mean"], outcome[y]["sd"]
        if not procs and keys and keys[0] in items:  # an indicator's random intercept
            m, s = items[keys[0]]["mean"], items[keys[0]]["sd"]
        xs = [k for k in keys if k in cov]
        base = name.split("[")[0]
        if kind in ("mean", "intercept"):
            if base.startswith(("slope", "curve")):
                out.append(Prior(parameter=name, family="normal", args=(0.0, s)))
            else:
                out.append(Prior(parameter=name, family="normal", args=(m, 3.0 * s + abs(m))))
        elif kind == "lag":
            ratio = outcome[procs[0]]["sd"] / outcome[procs[1]]["sd"] if len(procs) == 2 and procs[0] != procs[1] else 1.0
            out.append(Prior(parameter=name, family="normal", args=(0.0, 0.5 * ratio)))
        elif kind == "effect":
            sx = cov[xs[0]] if xs else 1.0
            out.append(Prior(parameter=name, family="normal", args=(0.0, 2.5 * s / sx)))
        elif kind == "loading":
            if base.startswith("slope_score") or base.startswith("curve_score"):
                t = int(keys[-1])
                out.append(Prior(parameter=name, family="normal", args=(float(t - 1), 2.0)))
            else:
                at_one = 1.0 if base.endswith("_level") else 0.0
                out.append(Prior(parameter=name, family="normal", args=(at_one, 1.0)))
        elif kind == "var":
            out.append(Prior(parameter=name, family="halfnormal", args=(s,), target="sd",
                             block=block_of[i]))
        elif kind == "cov":
            out.append(Prior(parameter=name, family="lkj", args=(LKJ_ETA,), target="correlation",
                             block=block_of[i]))
        else:  # a kind added to the structure without a rule here
            raise SpecError(f"no default prior rule for parameter {name!r} of kind {kind!r}; "
                            "give it one with priors={...}")
    return out


def _block_membership(structure: Structure) -> dict[int, int]:
    """Parameter position -> index of the covariance block it belongs to."""
    member: dict[int, int] = {}
    for b, block in enumerate(structure.blocks):
        idx = block.index
        if (idx < 0).any():
            raise SpecError(
                f"model '{structure.spec.name}': a covariance block with fixed zero covariances "
                "is not supported by the Bayesian fit (a same-wave path among three or more "
                "processes fixes its pair's disturbance covariance at zero); fit it by maximum "
                "likelihood, or free those covariances in the model file")
        # one variance on the whole diagonal (strict invariance with unique covariances over
        # waves) is one SD times the block's correlation matrix; only a partly shared
        # diagonal has no such form
        if 1 < len(set(np.diag(idx).tolist())) < len(idx):
            raise SpecError(
                f"model '{structure.spec.name}': the variances "
                f"{structure.names[int(idx[0, 0])]!r}... are held equal within one covariance "
                "block, some but not all of them, which the Bayesian fit's SD and LKJ priors "
                "cannot express; give the block's variances one parameter or one each, or fit "
                "this model by maximum likelihood (bl.fit_ml)")
        for k in np.unique(idx):
            if int(k) in member and member[int(k)] != b:
                raise SpecError(
                    f"model '{structure.spec.name}': parameter {structure.names[int(k)]!r} sits in "
                    "two covariance blocks; the Bayesian fit needs each in one block")
            member[int(k)] = b
    return member


def _user_prior(default: Prior, value: Any, structure: Structure) -> Prior:
    name = default.parameter
    if callable(value):
        if default.target == "correlation":
            raise SpecError(
                f"prior for {name!r}: a covariance takes its prior from the LKJ distribution of "
                "its block; give ('lkj', eta) instead of a factory")
        return Prior(parameter=name, family="callable", target=default.target, source="user",
                     block=default.block, factory=value)
    if isinstance(value, str):
        value = (value,)
    if not isinstance(value, (tuple, list)) or not value or not isinstance(value[0], str):
        raise SpecError(
            f"prior for {name!r} must be a tuple (family, *arguments) such as ('normal', 0, 1) "
            f"or a callable name -> PyMC variable; got {value!r}")
    family, *args = value
    family = family.lower().replace("-", "_")
    if family not in FAMILIES:
        raise SpecError(
            f"prior for {name!r} has unknown family {value[0]!r}; families are "
            + ", ".join(FAMILIES))
    arg_names, support = FAMILIES[family]
    if len(args) != len(arg_names):
        raise SpecError(
            f"prior for {name!r}: family {family!r} takes {len(arg_names)} argument(s) "
            f"({', '.join(arg_names)}); got {len(args)}: {tuple(args)!r}")
    try:
        args = tuple(float(a) for a in args)
    except (TypeError, ValueError):
        raise SpecError(f"prior for {name!r}: arguments must be numbers; got {tuple(args)!r}") from None
    if not all(math.isfinite(a) for a in args):
        raise SpecError(f"prior for {name!r}: arguments must be finite; got {args!r}")
    for an, a in zip(arg_names, args):
        if an in ("sigma", "nu", "lam", "eta", "alpha", "beta") and a <= 0:
            raise SpecError(f"prior for {name!r}: {family} needs {an} > 0; got {a:g}")
    if family == "uniform" and not args[0] < args[1]:
        raise SpecError(f"prior for {name!r}: uniform needs lower < upper; got {args!r}")
    if default.target == "correlation":
        if family != "lkj":
            raise SpecError(
                f"prior for {name!r}: a covariance takes its prior from the LKJ distribution "
                f"of its block's correlation matrix; give ('lkj', eta), not {family!r}")
    elif family == "lkj":
        raise SpecError(f"prior for {name!r}: 'lkj' is for covariances only; {name!r} is not one")
    elif default.target == "sd":
        if support == "real" or (family == "uniform" and args[0] < 0):
            raise SpecError(
                f"prior for {name!r}: a variance's prior is on its standard deviation, which "
                f"must be positive; use halfnormal, halfstudent_t, exponential, lognormal, "
                f"gamma or uniform with lower >= 0, not {family!r} {args!r}")
    return Prior(parameter=name, family=family, args=args, target=default.target, source="user",
                 block=default.block)


def resolve_priors(structure: Structure, panel, priors: dict | None = None, *,
                   pooling: bool = True) -> PriorSet:
    """Merge user overrides into the defaults and validate them.

    Parameters
    ----------
    structure : Structure
    panel : Panel
    priors : dict, optional
        Parameter name -> ``(family, *args)`` or a callable ``name -> PyMC variable``.
        For a variance the prior is on its standard deviation (the factory receives the name
        ``"<parameter>__sd"``); for a covariance ``("lkj", eta)`` sets the LKJ shape of its
        whole block. ``"residual_pooling"``: the scale tau of the partial pooling of the
        residual log-SDs over waves (a positive number; default
        :data:`~bayeslong.infer.pooling.DEFAULT_TAU`), or None / "off" to switch it off
        (:mod:`bayeslong.infer.pooling`; docs/priors.md, "Pooled residual variances").
    pooling : bool, default True
        False for a model that cannot take the pooling (the categorical model): none, and a
        tau given in ``priors`` is an error.

    Returns
    -------
    PriorSet

    Raises
    ------
    SpecError
        Unknown parameter name (the message lists the valid ones), unknown family (lists
        the families), wrong number or range of arguments, or conflicting LKJ shapes.
    """
    defaults = default_priors(structure, panel)
    if priors is not None and not isinstance(priors, dict):
        raise SpecError(f"`priors` must be a dict of parameter name -> prior; got {type(priors).__name__}")
    priors = dict(priors or {})
    given = pool_terms.POOLING_KEY in priors
    tau = priors.pop(pool_terms.POOLING_KEY, pool_terms.DEFAULT_TAU)
    if not pooling:
        if given and pool_terms.parse_tau(tau) is not None:
            raise SpecError(f"priors[{pool_terms.POOLING_KEY!r}]: this model (categorical "
                            "variables) has no pooling of residual variances; leave it out")
        tau = None
    pools = pool_terms.poolings(structure, tau, "user" if given else "default")
    unknown = [k for k in priors if k not in structure.names]
    if unknown:
        import difflib

        close = difflib.get_close_matches(str(unknown[0]), structure.names, n=1)
        hint = f" (did you mean {close[0]!r}?)" if close else ""
        raise SpecError(
            f"`priors` names {unknown[0]!r}{hint}, which is not a parameter of model "
            f"'{structure.spec.name}' on this panel; valid names are: " + ", ".join(structure.names))
    out = [(_user_prior(p, priors[p.parameter], structure) if p.parameter in priors else p)
           for p in defaults]
    # one LKJ shape per block: a user value applies to every covariance of the block
    etas: dict[int, tuple[float, str]] = {}
    for p in out:
        if p.target == "correlation" and p.source == "user":
            if p.block in etas and etas[p.block][0] != p.args[0]:
                raise SpecError(
                    f"priors give the covariance block of {etas[p.block][1]!r} and {p.parameter!r} "
                    f"two LKJ shapes ({etas[p.block][0]:g} and {p.args[0]:g}); one block has one "
                    "correlation prior, give the same eta")
            etas[p.block] = (p.args[0], p.parameter)
    out = [Prior(parameter=p.parameter, family="lkj", args=(etas[p.block][0],),
                 target="correlation", source="user", block=p.block)
           if p.target == "correlation" and p.block in etas else p for p in out]
    lkj_blocks = tuple(b for b, blk in enumerate(structure.blocks) if len(blk.index) > 1)
    for b in lkj_blocks:
        members = [out[int(i)] for i in np.diag(structure.blocks[b].index)]
        families = {m.family for m in members}
        if len(families) > 1 or "callable" in families:
            listed = ", ".join(f"{m.parameter}: {m.family}" for m in members)
            raise SpecError(
                "the variances of one covariance block take their SD priors from one family "
                f"(they form the scales of an LKJ covariance prior); got {listed}. Give "
                f"{', '.join(m.parameter for m in members)} the same family, e.g. "
                + ", ".join(f"{m.parameter!r}: ('halfnormal', <sigma>)" for m in members))
    user_tau = pool_terms.parse_tau(tau) if given else None
    given = given and bool(pool_terms.residual_groups(structure))  # else nothing to record
    return PriorSet(structure=structure, priors=tuple(out), blocks=lkj_blocks, pooling=pools,
                    pooling_user=None if not given else (user_tau,) if user_tau else ("off",))


# --- one assembly of the parameter vector (used by build and by prior draws) ---------------
def assemble_theta(prior_set: PriorSet, values: dict, corr: dict, stack: Callable):
    """Put the parameter vector together from prior draws.

    Parameters
    ----------
    prior_set : PriorSet
    values : dict
        ``rv_name -> value`` for every ``value`` and ``sd`` prior (scalars or arrays over
        draws; NumPy or PyTensor).
    corr : dict
        Block index -> correlation matrix (``(..., q, q)``) for blocks of size > 1.
    stack : callable
        ``numpy.stack`` or ``pytensor.tensor.stack`` (applied along the last axis).

    Returns
    -------
    theta in ``structure.names`` order: variances are ``sd**2`` and a covariance of block
    members r, c is ``sd_r * sd_c * corr[r, c]``.
    """
    structure = prior_set.structure
    pos_of = {}
    for b, block in enumerate(structure.blocks):
        q = len(block.index)
        for r in range(q):
            for c in range(q):
                pos_of.setdefault(int(block.index[r, c]), (b, r, c))
    entries = []
    for i, p in enumerate(prior_set.priors):
        if p.target == "value":
            entries.append(values[p.rv_name])
        elif p.target == "sd":
            entries.append(values[p.rv_name] ** 2)
        else:
            b, r, c = pos_of[i]
            diag = np.diag(structure.blocks[b].index)
            sd_r = values[prior_set.priors[int(diag[r])].rv_name]
            sd_c = values[prior_set.priors[int(diag[c])].rv_name]
            entries.append(sd_r * sd_c * corr[b][..., r, c])
    return stack(entries, axis=-1)


def family_dist(family: str, args):
    """The PyMC distribution class and keyword arguments of ``family`` at ``args``.

    ``cls.dist(**kwargs)`` draws outside a model; ``cls(name, **kwargs)`` places the prior
    in a model (only :mod:`bayeslong.build` does that).
    """
    import pymc as pm

    makers = {
        "normal": (pm.Normal, ("mu", "sigma")),
        "student_t": (pm.StudentT, ("nu", "mu", "sigma")),
        "uniform": (pm.Uniform, ("lower", "upper")),
        "halfnormal": (pm.HalfNormal, ("sigma",)),
        "halfstudent_t": (pm.HalfStudentT, ("nu", "sigma")),
        "exponential": (pm.Exponential, ("lam",)),
        "lognormal": (pm.LogNormal, ("mu", "sigma")),
        "gamma": (pm.Gamma, ("alpha", "beta")),
    }
    cls, names = makers[family]
    return cls, dict(zip(names, args))


def prior_draws(prior_set: PriorSet, *, draws: int, seed: int = 0) -> np.ndarray:
    """Draw parameter vectors from the priors, shape (draws, n_params), in names order."""
    import pymc as pm

    rng = np.random.default_rng(seed)
    names, dists = [], []
    for p in prior_set.priors:
        if p.target == "correlation":
            continue
        if p.factory is not None:
            with pm.Model():
                dists.append(p.factory(p.rv_name))
        else:
            cls, kwargs = family_dist(p.family, p.args)
            dists.append(cls.dist(**kwargs))
        names.append(p.rv_name)
    for b in prior_set.blocks:
        q = len(prior_set.structure.blocks[b].index)
        dists.append(pm.LKJCorr.dist(n=q, eta=prior_set.lkj_eta(b), return_matrix=True))
        names.append(b)
    # one compiled draw function for all priors (a compile per prior costs seconds each)
    out = pm.draw(dists, draws=draws, random_seed=rng)
    drawn = dict(zip(names, (np.asarray(o, dtype=float) for o in out)))
    values = {k: v for k, v in drawn.items() if isinstance(k, str)}
    corr = {k: v for k, v in drawn.items() if not isinstance(k, str)}
    if prior_set.pooling:  # the pooled SDs are independent of the rest a priori
        values.update(pool_terms.sd_draws(prior_set.pooling, prior_set.priors, int(draws), rng,
                                           family_dist))
    return assemble_theta(prior_set, values, corr, np.stack)



def prior_predictive(spec, panel, *, draws: int = 500, seed: int = 0, priors: dict | None = None):
    """Draw outcome trajectories from the prior, given the panel's covariates.

    Parameters
    ----------
    spec : Spec
    panel : Panel
        Supplies the design (waves, covariates) and the scale of the default priors.
    draws : int, default 500
    seed : int, default 0
    priors : dict, optional
        Overrides, as in :func:`resolve_priors`.

    Returns
    -------
    xarray.Dataset
        One variable per outcome with dims (draw, unit, wave) holding complete simulated
        trajectories (no missing entries), and one variable per parameter with dim draw.

    Notes
    -----
    For each parameter draw theta, the outcomes of unit i are drawn from
    N(c + D w_i, Sigma) with (c, D, Sigma) from :func:`bayeslong.moments.moments_at`.

    Examples
    --------
    >>> pp = prior_predictive(bl.model("linear-growth"), panel, draws=200)  # doctest: +SKIP
    >>> pp["Reaction"].mean("unit").quantile([0.05, 0.95], "draw")        # doctest: +SKIP
    """
    import xarray as xr

    from bayeslong.model.moments import moments_at

    draws = whole_number(draws, "draws", where="prior_predictive")
    seed = seed_value(seed, where="prior_predictive")
    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel, priors)
    theta = prior_draws(prior_set, draws=int(draws), seed=seed)
    rng = np.random.default_rng([seed, 1])
    w = panel.covariate_matrix()
    n, t, k = panel.n_units, panel.n_waves, len(panel.outcomes)
    y = np.empty((int(draws), n, k * t))
    for d in range(int(draws)):
        c, D, Sigma = moments_at(structure, theta[d])
        vals, vecs = np.linalg.eigh(Sigma)  # eigen root: robust when a draw is near singular
        root = vecs * np.sqrt(np.clip(vals, 0.0, None))
        y[d] = c + w @ D.T + rng.standard_normal((n, k * t)) @ root.T
    y = y.reshape(int(draws), n, k, t)
    data = {name: (("draw", UNIT, WAVE), y[:, :, j, :]) for j, name in enumerate(panel.outcomes)}
    for i, name in enumerate(structure.names):
        data[name] = (("draw",), theta[:, i])
    return xr.Dataset(data, coords={"draw": np.arange(int(draws)), UNIT: list(panel.units),
                                    WAVE: list(panel.waves)})
