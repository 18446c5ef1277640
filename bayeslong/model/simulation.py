"""Simulate panels from a spec and parameter values, straight from the structural equations.

Notes
-----
Each unit draws its disturbances zeta ~ N(0, Psi) and measurement errors
eps ~ N(0, Theta) and the latents are solved from (docs/engine.md, "Matrix form")

    eta = a + B eta + G w + zeta,      y = nu + Lam eta + eps

by substitution: starting from eta_0 = a + G w + zeta, the step eta_(m+1) = r + B eta_m
gives eta_m = sum_(j <= m) B^j r, which is exact once B^m = 0. Every model here is
recursive (growth factors and earlier waves explain later waves, never the reverse), so B
is nilpotent and the substitution ends after at most as many steps as there are latents.
This is the wave-by-wave recursion of the equations themselves; nothing here uses the
implied moments of :mod:`bayeslong.moments`, so comparing a large simulated panel's sample
moments with them checks those formulas independently.

Covariates are drawn independently of everything (the model conditions on them):
time-varying ones independently over units and waves, time-invariant ones over units.
"""

from __future__ import annotations

import difflib
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from bayeslong.arguments import whole_number
from bayeslong.errors import SpecError
from bayeslong.model.spec import Spec, check_spec
from bayeslong.model.structure import Structure, build_structure

#: Generators of covariate values: family -> number of arguments and their meaning.
GENERATORS = {
    "normal": ("mean", "sd"),
    "uniform": ("low", "high"),
    "bernoulli": ("p",),
}

#: Kinds of missingness :func:`simulate` can impose.
MISSING_KINDS = ("dropout", "intermittent")

#: Measurement parts a bare name (or one naming only the indicator) sets for every
#: indicator and wave in :func:`parameter_vector`.
_EVERY_INDICATOR = ("loading", "unique_var", "unique_cov")

_WAVE_SUFFIX = re.compile(r"^(?P<base>[^\[]+)\[(?:(?P<keys>.*),)?(?P<wave>\d+)\]$")


def default_outcomes(spec: Spec) -> tuple[str, ...]:
    """Outcome names :func:`simulate` uses when none are given: ``y``, or ``y1, ..., yK``."""
    return ("y",) if spec.processes == 1 else tuple(f"y{k + 1}" for k in range(spec.processes))


def _covered_by(name: str, given: str) -> bool:
    """True when the wave-indexed parameter ``name`` is covered by the wave-free ``given``.

    ``resid_var`` covers ``resid_var[3]``; ``resid_var[y1]`` covers ``resid_var[y1,3]``;
    ``lag`` covers ``lag[4]`` (a time-varying lag) but not ``lag[y1<-y2]``. For the
    indicators' parts, ``unique_var`` covers every indicator's and ``unique_cov[b]``
    every ``unique_cov[b,s,t]`` (likewise ``loading``).
    """
    base = name.split("[")[0]
    if base in _EVERY_INDICATOR and "[" in name:
        indicator = name[len(base) + 1:-1].split(",")[0]
        if "<-" in indicator:  # a cross-loading is set by its own name, loading[j<-k]
            return given == f"{base}[{indicator}]"
        if given in (base, f"{base}[{indicator}]"):
            return True
    m = _WAVE_SUFFIX.match(name)
    if m is None:
        return False
    keys = m.group("keys")
    return given == (f"{m.group('base')}[{keys}]" if keys else m.group("base"))


def parameter_vector(structure: Structure, params: dict) -> np.ndarray:
    """Turn ``params`` (by name) into a vector in ``structure.names`` order.

    A name without a wave index stands for all its wave-indexed versions (``resid_var``
    gives every ``resid_var[t]``; ``lag`` every ``lag[t]`` of a time-varying lag), so one
    dictionary serves designs with different numbers of waves. An exact name wins.

    Raises
    ------
    SpecError
        A parameter is not given (the message lists the missing ones and all required
        names), a given name matches no parameter (with the nearest suggestion), or a value
        is not a finite number.
    """
    spec = structure.spec
    names = structure.names
    given = dict(params)
    for key, value in given.items():
        try:
            ok = np.isfinite(float(value))
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise SpecError(f"params[{key!r}] must be a finite number; got {value!r}")
    theta = np.full(len(names), np.nan)
    used = set()
    for i, name in enumerate(names):
        if name in given:
            theta[i] = float(given[name])
            used.add(name)
            continue
        for key in given:
            if _covered_by(name, key):
                theta[i] = float(given[key])
                used.add(key)
                break
    unknown = [k for k in given if k not in used]
    if unknown:
        key = unknown[0]
        close = difflib.get_close_matches(key, list(names), n=1)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        raise SpecError(
            f"params has {key!r}, which is not a parameter of model '{spec.name}' with "
            f"{structure.n_waves} waves{hint} (its parameters are: {', '.join(names)})"
        )
    missing = [n for n, v in zip(names, theta) if np.isnan(v)]
    if missing:
        raise SpecError(
            f"params lacks {len(missing)} parameter(s) of model '{spec.name}' with "
            f"{structure.n_waves} waves: {', '.join(missing)}. Give a value for each of: "
            f"{', '.join(names)} (a name without its wave index, such as 'resid_var', "
            "sets every wave at once)"
        )
    return theta


def _covariance_root(structure: Structure, theta: np.ndarray, which: str) -> np.ndarray:
    """A matrix R with R R' = the filled ``which`` (semi-definite allowed), or a SpecError."""
    matrix = structure.fill(theta, which)
    w, v = np.linalg.eigh(0.5 * (matrix + matrix.T))
    scale = max(float(np.max(np.abs(w))), 1e-300)
    if w.min() < -1e-10 * scale:
        blocks = []
        for b in structure.blocks:
            S = np.where(b.index >= 0, theta[b.index], 0.0)
            if np.linalg.eigvalsh(S).min() < -1e-10 * max(np.abs(S).max(), 1e-300):
                blocks.append(", ".join(dict.fromkeys(structure.names[i] for i in b.index.ravel()
                                                      if i >= 0)))
        where = "; ".join(f"({b})" for b in blocks) or which
        raise SpecError(
            f"the covariance block {where} of model '{structure.spec.name}' is not positive "
            "semi-definite at the given params; make each covariance at most the product of "
            "the two standard deviations (|cov| <= sqrt(var1 * var2)) and no variance negative"
        )
    return v * np.sqrt(np.clip(w, 0.0, None))


def _draw_covariate(rng, name: str, how, shape, role: str) -> np.ndarray:
    if isinstance(how, np.ndarray) or (isinstance(how, (list,)) and how and not isinstance(how[0], str)):
        values = np.asarray(how, dtype=float)
        if values.shape != shape:
            raise SpecError(f"{role}[{name!r}] has shape {values.shape}; expected {shape} "
                            "(units x waves for time-varying, units for time-invariant)")
        return values
    if not isinstance(how, tuple) or not how or how[0] not in GENERATORS:
        raise SpecError(
            f"{role}[{name!r}] must be a tuple (family, *arguments) with family one of "
            + ", ".join(f"{f}({', '.join(a)})" for f, a in GENERATORS.items())
            + f", or an array of shape {shape}; got {how!r}"
        )
    family, args = how[0], how[1:]
    if len(args) != len(GENERATORS[family]):
        raise SpecError(f"{role}[{name!r}]: {family} takes {len(GENERATORS[family])} argument(s) "
                        f"({', '.join(GENERATORS[family])}); got {len(args)}")
    if family == "normal":
        return rng.normal(args[0], args[1], size=shape)
    if family == "uniform":
        return rng.uniform(args[0], args[1], size=shape)
    return (rng.uniform(size=shape) < args[0]).astype(float)


def _missing_rates(missing) -> tuple[float, float]:
    if missing is None:
        return 0.0, 0.0
    if not isinstance(missing, dict):
        raise SpecError("`missing` must be a dict such as {'dropout': 0.1, 'intermittent': 0.05}; "
                        f"got {missing!r}")
    for key in missing:
        if key not in MISSING_KINDS:
            close = difflib.get_close_matches(str(key), MISSING_KINDS, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            raise SpecError(f"`missing` has an unknown kind {key!r}{hint} (kinds: "
                            + ", ".join(MISSING_KINDS) + ")")
    rates = []
    for key in MISSING_KINDS:
        value = missing.get(key, 0.0)
        if not (isinstance(value, (int, float)) and 0.0 <= value < 1.0):
            raise SpecError(f"missing[{key!r}] must be a rate in [0, 1); got {value!r}")
        rates.append(float(value))
    return rates[0], rates[1]


def _solve_latents(structure: Structure, B: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Solve eta = r + B eta row-wise by substitution (exact for recursive systems)."""
    eta = r.copy()
    for _ in range(B.shape[0] + 1):
        new = r + eta @ B.T
        if np.array_equal(new, eta):
            return eta
        eta = new
    raise SpecError(
        f"model '{structure.spec.name}' is not recursive (a latent depends on itself through "
        "its lags), so it cannot be simulated wave by wave"
    )


def simulate(spec: Spec, params: dict, n_units: int, n_waves: int, seed: int | None = None, *,
             covariates: dict | None = None, time_invariant: dict | None = None,
             outcomes=None, missing: dict | None = None, indicators: dict | None = None,
             categorical: dict | None = None) -> pd.DataFrame:
    """Draw a panel in long form from ``spec`` at parameter values ``params``.

    Parameters
    ----------
    spec : Spec
        Any catalog (or user) model, e.g. ``bl.model("alt")``.
    params : dict of str to float
        One value per parameter, named as in the structure (``lag``, ``level_mean``,
        ``resid_var[3]`` ...). A name without a wave index sets all waves
        (``"resid_var": 1.0``). Variances and covariances are those of the model (not SDs).
    n_units, n_waves : int
        N units and T waves (T >= 3).
    seed : int, optional
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same panel.
    covariates : dict, optional
        Time-varying covariates x: ``{"x": ("normal", 0, 1)}``; families ``normal(mean, sd)``,
        ``uniform(low, high)``, ``bernoulli(p)``, drawn independently over units and waves,
        or an (N, T) array of fixed values.
    time_invariant : dict, optional
        Time-invariant covariates z, as ``covariates`` (an array has shape (N,)).
    outcomes : sequence of str, optional
        Outcome names; default ``y`` (one process) or ``y1, ..., yK``.
    indicators : dict, optional
        For each process, its indicator names, ``{"y": ["y_a", "y_b", "y_c"]}``: the process
        is then a latent measured by those indicators at every wave, with the parameters of
        the measurement part (``loading[y_b]``, ``intercept[y_b]``, ``unique_var[y_b]``...,
        named as the model's ``invariance`` option makes them; in the within form, ri-clpm,
        also each indicator's random intercept, ``level_var[y_b]`` and ``level_cov[y_a,y_b]``).
        Default: each process is observed directly.
    missing : dict, optional
        ``{"dropout": d, "intermittent": p}``. Dropout is monotone: at each wave t >= 2 a unit
        still in the study leaves with probability d and is missing from then on.
        Intermittent missingness is completely at random: each remaining outcome row at
        t >= 2 is missing with probability p. Wave 1 is never removed, so every unit keeps
        an observation; the expected share observed at wave t is (1 - d)^(t-1) (1 - p).
    categorical : dict, optional
        Categorical outcomes or indicators and their number of categories, ``{"y": 3}``
        (or ``"binary"``): the variable is then the category (1..C) in which its latent
        response y* = nu + lambda eta + eps falls, with eps from the model's ``link``
        (standard normal or logistic) and the thresholds among the params
        (``threshold[y,2]`` ...; the first is 0, and parameters the categorical model fixes,
        such as an uncarried ``resid_var``, take their fixed values when not given;
        model/thresholds.py).

    Returns
    -------
    pandas.DataFrame
        Long form: ``unit`` (1..N), ``wave`` (1..T), the outcomes, or the indicators, (NaN
        where missing; a missing row loses all of them) and the covariates (always present). ``bl.Panel.from_long(df, unit="unit",
        wave="wave", outcomes=..., time_varying=..., time_invariant=...)`` reads it.

    Raises
    ------
    SpecError
        Missing or unknown parameter names (listing the required ones, with the nearest
        match), a covariance block that is not positive semi-definite, a bad covariate
        generator or missingness rate.

    Notes
    -----
    Generated from the structural equations, not from the implied moments (see the module
    notes): eta = a + B eta + G w + zeta solved by substitution, y = nu + Lam eta + eps.

    Examples
    --------
    >>> import bayeslong as bl
    >>> df = bl.simulate(bl.model("ar"), {"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0,
    ...                                   "initial_var": 1.0, "resid_var": 1.0}, 50, 4, seed=1)
    >>> df.shape
    (200, 3)
    """
    return Simulation(spec=spec, params=dict(params), n_units=n_units, n_waves=n_waves, seed=seed,
                      covariates=covariates or {}, time_invariant=time_invariant or {},
                      outcomes=outcomes, missing=missing, indicators=indicators,
                      categorical=categorical).data()


@dataclass(frozen=True, kw_only=True, eq=False)
class Simulation:
    """A picklable recipe for one simulated panel (the arguments of :func:`simulate`).

    Batch runs ship the recipe, not the data, to the workers: ``Simulation(...).panel()``
    draws the same panel wherever it runs.
    """

    spec: Spec
    params: dict
    n_units: int
    n_waves: int
    seed: int | None = None
    covariates: dict = field(default_factory=dict)
    time_invariant: dict = field(default_factory=dict)
    outcomes: tuple | None = None
    missing: dict | None = None
    indicators: dict | None = None
    categorical: dict | None = None

    def __post_init__(self):
        check_spec(self.spec)
        whole_number(self.n_units, "n_units", least=1)
        whole_number(self.n_waves, "n_waves", least=3)
        outcomes = tuple(self.outcomes) if self.outcomes is not None else default_outcomes(self.spec)
        object.__setattr__(self, "outcomes", outcomes)
        if self.indicators is not None:
            if not isinstance(self.indicators, dict) or set(self.indicators) - set(outcomes):
                raise SpecError(f"`indicators` must map outcomes {list(outcomes)} to indicator "
                                f"names, e.g. {{{outcomes[0]!r}: ['a', 'b', 'c']}}; got "
                                f"{self.indicators!r}")
            object.__setattr__(self, "indicators", {k: tuple(self.indicators.get(k, (k,)))
                                                    for k in outcomes})
        _missing_rates(self.missing)

    @property
    def structure(self) -> Structure:
        if self.categorical:
            return self._categorical().structure
        return build_structure(self.spec, outcomes=self.outcomes, n_waves=int(self.n_waves),
                               time_varying=tuple(self.covariates),
                               time_invariant=tuple(self.time_invariant),
                               indicators=self.indicators)

    def theta(self) -> np.ndarray:
        """The parameter vector in ``structure.names`` order."""
        return self._theta_tau()[0]

    def _categorical(self, with_error: bool = False):
        from bayeslong.model.thresholds import categorical_design

        counts = {v: 2 if c == "binary" else c for v, c in (self.categorical or {}).items()}
        for v, c in counts.items():
            if not isinstance(c, int) or c < 2:
                raise SpecError(f"categorical[{v!r}] must be a number of categories >= 2 or "
                                f"'binary'; got {self.categorical[v]!r}")
        return categorical_design(self.spec, outcomes=self.outcomes, n_waves=int(self.n_waves),
                                  time_varying=tuple(self.covariates),
                                  time_invariant=tuple(self.time_invariant),
                                  indicators=self.indicators, n_categories=counts,
                                  with_error=with_error)

    def _theta_tau(self):
        """The structure's parameters and the free thresholds (empty without categories)."""
        if not self.categorical:
            return parameter_vector(self.structure, self.params), np.empty(0)
        cat = self._categorical()
        params = dict(self.params)
        fitted = self._categorical(with_error=True).pinned
        for name, value in cat.pinned.items():
            if name in params and float(params[name]) != fitted[name]:
                raise SpecError(f"params[{name!r}] is {params[name]!r}, but with categorical "
                                f"indicators the model fixes it at {fitted[name]:g} "
                                "(model/thresholds.py); leave it out of params")
            params[name] = value
        tau = np.array([float(params.pop(n)) if n in params else np.nan for n in cat.thresholds])
        if np.isnan(tau).any():
            missing = [n for n, v in zip(cat.thresholds, tau) if np.isnan(v)]
            raise SpecError(f"params lacks the thresholds {', '.join(missing)} (each the cut "
                            "between two neighbouring categories; the first cut is 0)")
        return parameter_vector(cat.structure, params), tau

    def data(self) -> pd.DataFrame:
        """Draw the panel in long form (see :func:`simulate`)."""
        structure = self.structure
        theta, tau = self._theta_tau()
        N, T = int(self.n_units), int(self.n_waves)
        names = [n for g in (self.indicators or {k: (k,) for k in self.outcomes}).values() for n in g]
        K = len(names)  # observed variables
        dropout, intermittent = _missing_rates(self.missing)
        rng = np.random.default_rng(self.seed)
        # covariates w = (x[., 1..T] for each x, z), the structure's column order
        xs = {n: _draw_covariate(rng, n, how, (N, T), "covariates") for n, how in self.covariates.items()}
        zs = {n: _draw_covariate(rng, n, how, (N,), "time_invariant")
              for n, how in self.time_invariant.items()}
        w = np.concatenate([xs[n] for n in xs] + [zs[n][:, None] for n in zs], axis=1) \
            if (xs or zs) else np.zeros((N, 0))
        a, B, G = (structure.fill(theta, m) for m in ("a", "B", "G"))
        nu, Lam = structure.fill(theta, "nu"), structure.fill(theta, "Lam")
        psi_root = _covariance_root(structure, theta, "Psi")
        theta_root = _covariance_root(structure, theta, "Theta")
        zeta = rng.standard_normal((N, len(structure.latents))) @ psi_root.T
        eps = rng.standard_normal((N, len(structure.observed))) @ theta_root.T
        eta = _solve_latents(structure, B, a + w @ G.T + zeta)
        y = nu + eta @ Lam.T + eps  # (N, K*T), process-major
        if self.categorical:  # latent responses cut at the thresholds
            from bayeslong.model.thresholds import categorize

            cat = self._categorical()
            for v, cuts in cat.cut_values(tau).items():
                r = cat.rows[v]
                noise = (rng.standard_normal((N, len(r))) if cat.link == "probit"
                         else rng.logistic(size=(N, len(r))))
                y[:, r] = 1 + categorize(y[:, r] + noise, cuts[None])
        y = y.reshape(N, K, T).transpose(0, 2, 1).copy()  # (N, T, K observed variables)
        # missingness, wave 1 always kept
        if dropout > 0 or intermittent > 0:
            u_drop = rng.uniform(size=(N, T))
            u_int = rng.uniform(size=(N, T))
            gone = np.cumsum(np.where(np.arange(T) >= 1, u_drop < dropout, False), axis=1) > 0
            skip = (u_int < intermittent) & (np.arange(T) >= 1)
            y[gone | skip] = np.nan
        cols = {"unit": np.repeat(np.arange(1, N + 1), T), "wave": np.tile(np.arange(1, T + 1), N)}
        for k, name in enumerate(names):
            cols[name] = y[:, :, k].ravel()
        for n, values in xs.items():
            cols[n] = values.ravel()
        for n, values in zs.items():
            cols[n] = np.repeat(values, T)
        return pd.DataFrame(cols)

    def panel(self):
        """Draw the panel as a :class:`~bayeslong.data.Panel`."""
        from bayeslong.data import Panel

        outcomes = ({k: list(v) for k, v in self.indicators.items()} if self.indicators
                    else list(self.outcomes))
        categorical = {v: "ordinal" for v in self.categorical or {}}
        return Panel.from_long(self.data(), unit="unit", wave="wave", outcomes=outcomes,
                               time_varying=list(self.covariates),
                               time_invariant=list(self.time_invariant),
                               categorical=categorical or None)
