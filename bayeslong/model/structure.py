"""The parameter table: which entry of which model matrix each free parameter fills.

A :class:`Structure` turns a :class:`~bayeslong.spec.Spec` and the panel's dimensions
(waves, outcome names, covariate names) into the matrices of the engine (docs/engine.md, "Matrix form"):

    eta = a + B eta + G w + zeta,  zeta ~ N(0, Psi);   y = nu + Lam eta + eps,  eps ~ N(0, Theta)

Every matrix is stored as a fixed part and an index array: entry ``[i, j]`` equals
``fixed[i, j] + theta[index[i, j]]`` where the index is not -1. A parameter that fills
several entries is an equality restriction. Variances and covariances come in *blocks*
(sets of variables whose covariance is free), which the optimiser and the priors use to
keep covariance matrices positive definite.

No code here branches on a model's name: everything follows from the spec's fields.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from bayeslong.data.panel import check_panel
from bayeslong.errors import SpecError
from bayeslong.model.measurement import add_indicators, settle_design, within_means_move
from bayeslong.model.paths import (
    cross_loading_name,
    settle_cross_loadings,
    settle_paths,
)
from bayeslong.model.spec import Spec, check_spec

#: Names of the measurement part's parameters (model/measurement.py).
_MEASUREMENT_BASES = ("loading", "intercept", "unique_var", "unique_cov", "loading_deviation",
                      "intercept_deviation")

#: Parameter kinds, used by priors and start values.
KINDS = ("mean", "intercept", "loading", "lag", "effect", "var", "cov", "deviation")


@dataclass(frozen=True, eq=False)
class Matrix:
    """One model matrix: ``fixed + theta[index]`` where ``index >= 0``, plus ``terms``.

    ``terms`` holds entries that are linear combinations of parameters, as triples
    (flat position, parameter, coefficient) added to the fixed part: effects coding writes
    one loading as J minus the others (model/measurement.py). Most matrices have none.
    """

    fixed: np.ndarray
    index: np.ndarray
    terms: list = field(default_factory=list)

    @classmethod
    def zeros(cls, *shape) -> "Matrix":
        return cls(np.zeros(shape), np.full(shape, -1, dtype=np.int64))


@dataclass(frozen=True, eq=False)
class Block:
    """A free covariance block: ``index[r, c]`` is the parameter of entry (r, c), -1 if fixed 0."""

    index: np.ndarray  # (q, q) symmetric

    def matrix(self, theta: np.ndarray) -> np.ndarray:
        """The block's covariance matrix at ``theta`` (0 where an entry is fixed at zero)."""
        theta = np.asarray(theta)
        return np.where(self.index >= 0, theta[..., self.index], 0.0)


@dataclass(frozen=True, eq=False)
class Structure:
    """Parameter table of one spec on one panel design (see module docstring)."""

    spec: Spec
    names: tuple[str, ...]
    kinds: tuple[str, ...]
    latents: tuple[str, ...]
    observed: tuple[str, ...]
    covariates: tuple[str, ...]
    matrices: dict
    blocks: tuple[Block, ...]
    n_waves: int
    outcomes: tuple[str, ...]
    indicators: dict | None = None  # process -> indicator names (every process, in order)

    @property
    def n_params(self) -> int:
        return len(self.names)

    def position(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            raise SpecError(
                f"model '{self.spec.name}' has no parameter {name!r}; its parameters are "
                + ", ".join(self.names)
            ) from None

    @cached_property
    def variance_params(self) -> np.ndarray:
        """Indices of parameters that are variances (diagonal of some block)."""
        return np.array(sorted({int(i) for b in self.blocks for i in np.diag(b.index) if i >= 0}),
                        dtype=np.int64)

    @cached_property
    def path_depth(self) -> int:
        """Smallest k with B^k = 0 for every value of the parameters (1 when B is zero).

        The longest chain of regressions among the latents plus one; it bounds the series
        (I - B)^-1 = I + B + ... + B^(k-1) (:func:`bayeslong.moments._total_effects`).
        """
        m = self.matrices["B"]
        pattern = ((m.index >= 0) | (m.fixed != 0)).astype(np.int64)
        power, k = pattern, 1
        while power.any():
            if k > len(pattern):
                raise SpecError(f"model '{self.spec.name}': the latent regressions form a loop "
                                "(the model is not recursive)")
            power = np.minimum(power @ pattern, 1)
            k += 1
        return k

    def fill(self, theta: np.ndarray, which: str) -> np.ndarray:
        """Numeric matrix ``which`` at parameter vector ``theta`` (NumPy; for checks and starts)."""
        m = self.matrices[which]
        ext = np.append(np.asarray(theta, dtype=float), 0.0)
        out = m.fixed + np.where(m.index >= 0, ext[m.index], 0.0)
        for pos, k, coef in m.terms:
            out.flat[pos] += coef * ext[k]
        return out


class _Table:
    """Accumulates parameters and matrix entries while a structure is built."""

    def __init__(self, n_latent, n_obs, n_cov):
        self.names: list[str] = []
        self.kinds: list[str] = []
        self.m = {
            "a": Matrix.zeros(n_latent), "B": Matrix.zeros(n_latent, n_latent),
            "G": Matrix.zeros(n_latent, n_cov), "Psi": Matrix.zeros(n_latent, n_latent),
            "nu": Matrix.zeros(n_obs), "Lam": Matrix.zeros(n_obs, n_latent),
            "Theta": Matrix.zeros(n_obs, n_obs),
        }
        self.blocks: dict[tuple, Block] = {}

    def param(self, name: str, kind: str) -> int:
        if name in self.names:
            return self.names.index(name)
        self.names.append(name)
        self.kinds.append(kind)
        return len(self.names) - 1

    def put(self, which: str, pos, name: str, kind: str, offset: float = 0.0) -> None:
        self.m[which].index[pos] = self.param(name, kind)
        self.m[which].fixed[pos] = offset

    def fix(self, which: str, pos, value: float) -> None:
        self.m[which].index[pos] = -1
        self.m[which].fixed[pos] = value

    def combine(self, which: str, pos, value: float, parts: list[tuple[str, str, float]]) -> None:
        """Entry ``value + sum coef * theta[name]`` over ``parts`` = [(name, kind, coef)]."""
        self.fix(which, pos, value)
        flat = int(np.ravel_multi_index(pos, self.m[which].fixed.shape)) \
            if isinstance(pos, tuple) else int(pos)
        for name, kind, coef in parts:
            self.m[which].terms.append((flat, self.param(name, kind), float(coef)))

    def reorder(self, order: list[int]) -> None:
        """Renumber the parameters so that old parameter ``order[n]`` becomes number n."""
        if order == sorted(order):
            return
        new = np.empty(len(order) + 1, dtype=np.int64)
        new[np.array(order)] = np.arange(len(order))
        new[-1] = -1  # index -1 stays -1
        self.names = [self.names[i] for i in order]
        self.kinds = [self.kinds[i] for i in order]
        for m in self.m.values():
            m.index[...] = new[m.index]
            m.terms[:] = [(pos, int(new[k]), coef) for pos, k, coef in m.terms]
        self.blocks = {key: Block(new[b.index]) for key, b in self.blocks.items()}

    def block(self, which: str, rows: list[int], names: list[list[str | None]]) -> None:
        """Place a free covariance block on ``rows`` of Psi or Theta."""
        q = len(rows)
        idx = np.full((q, q), -1, dtype=np.int64)
        for r in range(q):
            for c in range(r + 1):
                if names[r][c] is None:
                    continue
                k = self.param(names[r][c], "var" if r == c else "cov")
                idx[r, c] = idx[c, r] = k
                self.m[which].index[rows[r], rows[c]] = k
                self.m[which].index[rows[c], rows[r]] = k
        self.blocks.setdefault(tuple(idx.ravel()), Block(idx))


def _label(base: str, *keys) -> str:
    keys = [str(k) for k in keys if k is not None and k != ""]
    return f"{base}[{','.join(keys)}]" if keys else base


def build_structure(spec: Spec, *, outcomes, n_waves: int, time_varying=(), time_invariant=(),
                    indicators=None) -> Structure:
    """Build the parameter table of ``spec`` for a panel design.

    Parameters
    ----------
    spec : Spec
    outcomes : sequence of str
        Outcome (process) names; their number must equal ``spec.processes``.
    n_waves : int
        Number of waves T (equally spaced).
    time_varying, time_invariant : sequence of str
        Covariate names x (one column per wave) and z.
    indicators : mapping of str to sequence of str, optional
        For each process, its indicators (default: the process is its own single
        indicator, y = eta). A process with several gets the measurement part of
        :mod:`bayeslong.model.measurement`.

    Returns
    -------
    Structure

    Notes
    -----
    Latent order: growth factors (process-major), then eta[k, t] (process-major, wave
    minor). Observed order: y[k, t], process-major. Covariate order: x[., 1..T] for each
    x, then z. These match :meth:`bayeslong.data.Panel.outcome_matrix` and
    :meth:`~bayeslong.data.Panel.covariate_matrix`.
    """
    outcomes = tuple(outcomes)
    if len(outcomes) != spec.processes:
        how = (f"set processes={len(outcomes)} (bl.model({spec.name!r}, processes={len(outcomes)}), "
               f"or options = {{ processes = {len(outcomes)} }} in a study file)"
               if spec.processes > 1 and len(outcomes) > 1 else
               f"choose a model with processes = {len(outcomes)}")
        raise SpecError(
            f"model '{spec.name}' is for {spec.processes} outcome process(es) but the panel has "
            f"{len(outcomes)} ({', '.join(map(str, outcomes))}); {how}, or give the panel that "
            "many outcomes"
        )
    T, K = int(n_waves), len(outcomes)
    xs, zs = tuple(time_varying), tuple(time_invariant)
    opts = spec.options
    multi = K > 1
    pk = (lambda k: outcomes[k]) if multi else (lambda k: None)
    F = spec.factors
    nF = len(F)
    lag = opts["lag"]
    within = spec.form == "within"
    initial = opts["initial"] if lag != "none" else "none"
    if spec.initial_is_level:
        initial = "level"

    indicators = settle_design(spec, outcomes, indicators)
    paths = settle_paths(spec, outcomes)
    cross_loads = settle_cross_loadings(spec, outcomes, indicators)
    obs_names = [n for k in range(K) for n in indicators[outcomes[k]]]
    first_v = [obs_names.index(indicators[outcomes[k]][0]) for k in range(K)]
    several = [len(indicators[outcomes[k]]) > 1 for k in range(K)]
    if any(several) and spec.residuals_at == "indicator" and K > 1:
        raise SpecError(f"model '{spec.name}' puts its residuals on the indicators, which is not "
                        "available with several indicators per wave and several processes yet")
    # the factors: per process its growth factors, or in the within form with several
    # indicators one random intercept per indicator (Mulder & Hamaker 2021), keyed by name
    members = [("level", j, k) if within and several[k] else (F[f], pk(k), k)
               for k in range(K) for f in range(nF)
               for j in (indicators[outcomes[k]] if within and several[k] and f == 0 else [None])]
    latents = [_label(f, key) for f, key, _ in members]
    latents += [_label("eta", pk(k), t) for k in range(K) for t in range(1, T + 1)]
    observed = [_label(v, t) for v in obs_names for t in range(1, T + 1)]
    covariates = [_label(x, t) for x in xs for t in range(1, T + 1)] + list(zs)
    rows_of = {k: [i for i, m in enumerate(members) if m[2] == k] for k in range(K)}
    fac = lambda k, f: rows_of[k][f]  # noqa: E731  (f: a factor, or an indicator's intercept)
    n_fac = len(members)
    eta = lambda k, t: n_fac + k * T + (t - 1)  # noqa: E731
    obs = lambda k, t: first_v[k] * T + (t - 1)  # noqa: E731  (a process's first indicator)
    xcol = lambda j, t: j * T + (t - 1)  # noqa: E731
    zcol = lambda j: len(xs) * T + j  # noqa: E731
    tab = _Table(len(latents), len(observed), len(covariates))

    if spec.level_covariates == "every-wave" and not F:
        raise SpecError(f"model '{spec.name}': level_covariates needs a level factor")

    # Which waves follow the structural equation (growth + lag + effects).
    first_eq = 1 if initial in ("none", "endogenous") else 2
    eq_waves = range(first_eq, T + 1)

    # --- time scores of the growth factors -------------------------------------------
    def score(f: int, t: int, k: int):
        """Fixed loading of factor f at wave t, or a parameter name for a free score."""
        if f == 0:
            # when the first wave is the level (latent change score), the level is the
            # initial true score and reaches later waves only through it, carried forward
            # by the lag, so the slope is the constant change itself (McArdle & Hamagami
            # 2001, in Collins & Sayer, New Methods for the Analysis of Change; McArdle
            # 2009, Annu. Rev. Psychol. 60, 577-605). Loading the level on every change
            # too would make the slope "constant change minus level": same likelihood,
            # other meaning.
            return 0.0 if spec.initial_is_level else 1.0
        if spec.scores == "constant":
            return 1.0 if t >= 2 else 0.0
        if spec.scores == "basis":
            # the scores of the first two waves whose equation holds the growth factors are
            # fixed at their linear values (they set the slope's origin and unit); the rest
            # are free. With a predetermined first wave those are waves 2 and 3, since
            # anchoring on wave 1, which does not load, would leave the slope's unit free.
            if t < first_eq + 2:
                return float(t - 1)
            return _label("slope_score", pk(k), t)
        return float(t - 1) ** f  # linear: t-1; quadratic adds (t-1)^2

    # --- measurement part ------------------------------------------------------------
    free_origin: dict[int, set] = {}
    for k in range(K):
        if several[k]:
            free_origin[k] = add_indicators(
                tab, spec, indicators[outcomes[k]], T, lambda t, k=k: eta(k, t),
                lambda j, t, k=k: (first_v[k] + j) * T + (t - 1),
                (lambda j, k=k: fac(k, j)) if within else None)
            continue
        for t in range(1, T + 1):
            tab.fix("Lam", (obs(k, t), eta(k, t)), 1.0)
            if within:
                for f in range(nF):
                    s = score(f, t, k)
                    if isinstance(s, str):
                        tab.put("Lam", (obs(k, t), fac(k, f)), s, "loading")
                    else:
                        tab.fix("Lam", (obs(k, t), fac(k, f)), s)
                name = _label("intercept", pk(k), t if opts["intercepts"] == "free" else None)
                tab.put("nu", obs(k, t), name, "intercept")

    # an indicator that also measures another process's latent (model/paths.py)
    for name, k, l in cross_loads:
        v = obs_names.index(name)
        for t in range(1, T + 1):
            tab.put("Lam", (v * T + (t - 1), eta(l, t)),
                    cross_loading_name(spec, name, outcomes[l], t), "loading")

    # --- factor means ----------------------------------------------------------------
    if not within:
        for k in range(K):
            for f in range(nF):
                tab.put("a", fac(k, f), _label(f"{F[f]}_mean", pk(k)), "mean")

    # --- structural equations ----------------------------------------------------------
    for k in range(K):
        anchored = False
        for t in eq_waves:
            row = eta(k, t)
            # growth loadings (latent form only)
            if not within:
                for f in range(nF):
                    s = score(f, t, k)
                    if isinstance(s, str):
                        tab.put("B", (row, fac(k, f)), s, "loading")
                    elif s != 0.0:
                        tab.fix("B", (row, fac(k, f)), s)
            # wave intercepts (in the within form with several indicators: the within
            # factor's, from wave 2 on, when an indicator's intercept ties them down)
            if within and several[k] and t >= 2 and opts["intercepts"] == "free" \
                    and within_means_move(spec, indicators[outcomes[k]]):
                tab.put("a", row, _label("intercept", pk(k), t), "intercept")
            if not within:
                has_level = nF > 0
                if opts["intercepts"] == "free":
                    if has_level and not anchored:
                        anchored = True  # first equation wave anchors the level mean
                    elif t in free_origin.get(k, ()):
                        pass  # the indicators' free intercepts carry this wave's mean
                    else:
                        tab.put("a", row, _label("intercept", pk(k), t), "intercept")
                elif not has_level:
                    tab.put("a", row, _label("intercept", pk(k)), "intercept")
            # lags
            if lag != "none" and t >= 2:
                for l in range(K):
                    if (k, l) not in paths.lags:
                        continue  # a dropped cross-lag (model/paths.py)
                    who = f"{outcomes[k]}<-{outcomes[l]}" if multi else None
                    name = _label(spec.lag_name, who, t if lag == "time-varying" else None)
                    tab.put("B", (row, eta(l, t - 1)), name, "lag",
                            offset=spec.lag_offset if k == l else 0.0)
            # covariate effects
            for j, x in enumerate(xs):
                who = f"{outcomes[k]}<-{x}" if multi else x
                name = _label("effect", who, t if opts["effects"] == "time-varying" else None)
                tab.put("G", (row, xcol(j, t)), name, "effect")
            if within or not F or spec.level_covariates == "every-wave":
                for j, zname in enumerate(zs):
                    who = f"{outcomes[k]}<-{zname}" if multi else zname
                    name = _label("effect", who, t if opts["effects"] == "time-varying" else None)
                    tab.put("G", (row, zcol(j)), name, "effect")

    # --- growth factors regressed on covariates ---------------------------------------
    if F and not within:
        for k in range(K):
            for f in range(nF):
                targets = []
                if spec.level_covariates == "every-wave" and f == 0:
                    targets = [(xcol(j, t), _label("level_on", pk(k), x, t)) for j, x in enumerate(xs)
                               for t in range(1, T + 1)]
                    targets += [(zcol(j), _label("level_on", pk(k), zname)) for j, zname in enumerate(zs)]
                else:
                    targets = [(zcol(j), _label(f"{F[f]}_effect", pk(k), zname)) for j, zname in enumerate(zs)]
                for col, name in targets:
                    tab.put("G", (fac(k, f), col), name, "effect")

    # --- the first wave ------------------------------------------------------------------
    if initial == "level":
        for k in range(K):
            tab.fix("B", (eta(k, 1), fac(k, 0)), 1.0)
    elif initial == "predetermined":
        for k in range(K):
            row = eta(k, 1)
            if not within:
                tab.put("a", row, _label("initial_mean", pk(k)), "mean")
            for j, x in enumerate(xs):
                tab.put("G", (row, xcol(j, 1)), _label("initial_effect", pk(k), x), "effect")
            for j, zname in enumerate(zs):
                tab.put("G", (row, zcol(j)), _label("initial_effect", pk(k), zname), "effect")
    elif initial == "endogenous":
        for k in range(K):
            row = eta(k, 1)
            for f in range(nF):
                tab.put("B", (row, fac(k, f)), _label(f"initial_on_{F[f]}", pk(k)), "loading")
            tab.put("a", row, _label("initial_intercept", pk(k)), "intercept")

    # --- covariance blocks ---------------------------------------------------------------
    def pair_name(a, ka, b, kb):
        # ka, kb: the keys of the two members (a process, an indicator, or None)
        base = a if a == b else f"{a}_{b}"
        suffix = "var" if a == b and ka == kb else "cov"
        return _label(f"{base}_{suffix}", *([ka] if ka == kb else [ka, kb]))

    # growth factors or random intercepts (+ predetermined first wave in the latent form)
    block = [(f, key, i) for i, (f, key, _) in enumerate(members)]  # (name, key, row)
    if initial == "predetermined" and not within:
        block += [("initial", pk(k), eta(k, 1)) for k in range(K)]
    if block:
        rows = [m[2] for m in block]

        def member_pair(r, c):
            # the earlier member names first (level_slope_cov), except that the first
            # wave reads first against a factor (initial_level_cov)
            (a, ka, _), (b, kb, _) = block[c], block[r]
            if b == "initial" and a != "initial":
                return pair_name(b, kb, a, ka)
            return pair_name(a, ka, b, kb)

        names = [[member_pair(r, c) if c <= r else None for c in range(len(block))]
                 for r in range(len(block))]
        tab.block("Psi", rows, names)
    # first wave's own block (within form predetermined; endogenous disturbance)
    if initial == "endogenous" or (initial == "predetermined" and within):
        tab.block("Psi", [eta(k, 1) for k in range(K)],
                  [[pair_name("initial", pk(c), "initial", pk(r)) if c <= r else None
                    for c in range(K)] for r in range(K)])

    # wave residuals: latent disturbances, or measurement errors (dual change)
    resid_waves = range(1, T + 1) if spec.residuals_at == "indicator" else [
        t for t in eq_waves if not (initial == "endogenous" and t == 1)]
    # same-wave paths act at the waves whose latents have the wave's disturbances (not the
    # first wave's own covariance), and replace the pair's disturbance covariance
    for t in ([] if spec.residuals_at == "indicator" else resid_waves):
        for k, l in paths.same_wave:
            tab.put("B", (eta(k, t), eta(l, t)),
                    _label("same_wave", f"{outcomes[k]}<-{outcomes[l]}"), "lag")
    zero = paths.uncorrelated if spec.residuals_at == "latent" else frozenset()
    if spec.residuals_at == "indicator" and any(several):
        # the latent is disturbance-free and the indicators' unique variances are its
        # measurement error (one process: checked above)
        resid_waves = []
    if spec.wave_covariance == "free":  # one free block over the waves (saturated)
        if lag != "none" or opts["residuals"] != "free":
            raise SpecError(f"model '{spec.name}': free covariances of the wave disturbances "
                            "need lag = \"none\" and residuals = \"free\"")
        tab.block("Psi", [eta(0, t) for t in resid_waves],
                  [[_label("resid_var", t) if s_ == t else _label("resid_cov", s_, t)
                    if s_ < t else None for s_ in resid_waves] for t in resid_waves])
        resid_waves = []
    groups = [list(range(K))] if spec.residuals_at == "indicator" else paths.groups(K)
    for t in resid_waves:
        tt = t if opts["residuals"] == "free" else None
        for group in groups:
            names = [[(_label("resid_var", outcomes[r] if multi else None, tt) if r == c else
                       None if frozenset((r, c)) in zero else
                       _label("resid_cov", outcomes[c], outcomes[r], tt)) if i >= j else None
                      for j, c in enumerate(group)] for i, r in enumerate(group)]
            if spec.residuals_at == "indicator":
                tab.block("Theta", [obs(k, t) for k in group], names)
            else:
                tab.block("Psi", [eta(k, t) for k in group], names)

    # the structural parameters first, the indicators' measurement parameters after them
    tab.reorder(sorted(range(len(tab.names)), key=lambda i: tab.names[i].split("[")[0] in
                       _MEASUREMENT_BASES and tab.names[i][tab.names[i].find("[") + 1:]
                       .split(",")[0].rstrip("]").split("<-")[0] in obs_names and any(several)))
    structure = Structure(
        spec=spec, names=tuple(tab.names), kinds=tuple(tab.kinds), latents=tuple(latents),
        observed=tuple(observed), covariates=tuple(covariates), matrices=tab.m,
        blocks=tuple(tab.blocks.values()), n_waves=T, outcomes=outcomes,
        indicators=indicators,
    )
    _check_recursive(structure)
    return structure


def structure_key(spec: Spec, *, outcomes, n_waves, time_varying=(), time_invariant=(),
                  indicators=None) -> str:
    """A string that is equal exactly when two designs give the same structure."""
    import json

    extra = [] if indicators is None else [{k: list(v) for k, v in indicators.items()}]
    return json.dumps([spec.to_dict(), list(outcomes), int(n_waves), list(time_varying),
                       list(time_invariant), *extra], sort_keys=True)


_CACHE: dict[str, Structure] = {}


def structure_for(spec: Spec, panel) -> Structure:
    """The (cached) structure of ``spec`` on ``panel``'s design.

    Cached by content, so compiled functions keyed on the structure are reused by every
    panel of the same design (docs/engine.md: compile once per model structure).
    """
    spec, panel = check_spec(spec), check_panel(panel)
    design = dict(outcomes=panel.outcomes, n_waves=panel.n_waves,
                  time_varying=panel.time_varying, time_invariant=panel.time_invariant,
                  indicators=dict(panel.indicators) if panel.has_indicators else None)
    key = structure_key(spec, **design)
    if key not in _CACHE:
        _CACHE[key] = build_structure(spec, **design)
    return _CACHE[key]


def _check_recursive(structure: Structure) -> None:
    """The engine assumes no loops among the latents (B nilpotent); a user file could break it."""
    pattern = (structure.matrices["B"].index >= 0) | (structure.matrices["B"].fixed != 0)
    reach = pattern.astype(float)
    for _ in range(len(structure.latents)):
        reach = reach @ pattern
    if reach.any():
        raise SpecError(
            f"model '{structure.spec.name}' has a loop among its latent variables; the engine "
            "needs a recursive model (every lag points to an earlier wave, and the same-wave "
            "paths have an order)")
