"""Model descriptions: the catalog of named special cases and the frozen `Spec`.

A model is described declaratively in a TOML file (``models/*.toml``, shipped inside
the package). The file says which growth factors the model has, how the lag acts, which
restrictions identify it, and which option values it allows; no code branches on a
model's name. A user may load a file of their own with :func:`load_model`.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from bayeslong.errors import SpecError

#: Option values every model understands (a file narrows them with ``[allowed]``).
OPTION_VALUES: dict[str, tuple[str, ...]] = {
    "initial": ("predetermined", "endogenous"),
    "lag": ("none", "constant", "time-varying"),
    "residuals": ("equal", "free"),
    "effects": ("constant", "time-varying"),
    "intercepts": ("equal", "free"),
}

#: Options of the measurement part (docs/model-family.md, "Several indicators per wave"). They
#: act only on processes measured by several indicators; a single indicator is the latent.
#: The first value is the default. ``marker`` (an indicator name, or one per process) and
#: ``release`` (indicator names, or a mapping part -> names) are free-form, checked
#: against the panel's indicators when the structure is built.
MEASUREMENT_VALUES: dict[str, tuple[str, ...]] = {
    "invariance": ("scalar", "configural", "metric", "strict", "approximate"),
    "scale": ("marker", "effects"),
    "unique_covariance": ("same-indicator", "none"),
    # categorical indicators (model/thresholds.py): the latent response's error
    # distribution, and whether thresholds are equal over waves
    "link": ("probit", "logit"),
    "thresholds": ("equal", "free"),
}
#: Invariance levels from the least to the most restricted (Meredith 1993).
INVARIANCE_LEVELS = ("configural", "metric", "scalar", "strict")
#: Parts of the measurement model a release frees from the invariance level's equalities.
RELEASE_PARTS = ("loading", "intercept", "unique_var")
MEASUREMENT_KEYS = (*MEASUREMENT_VALUES, "marker", "release", "cross_loadings", "deviation_sd")
#: Default SD ``s`` of the Normal(0, s) prior on each wave's deviation of a loading and of an
#: intercept from the indicator's common value under ``invariance="approximate"``, in the
#: indicator's standard deviations (docs/model-family.md, "Approximate invariance").
DEVIATION_SD = {"loading": 0.05, "intercept": 0.05}
#: Options of the paths among several processes (docs/model-family.md, "Several processes"):
#: ``cross_lags`` ("all", "none", or {"drop": ["y<-x", ...]}) and ``same_wave`` (a list of
#: "y<-x" pairs, regressions among the latents of one wave). Names are checked against the
#: panel's processes when the structure is built (model/paths.py).
PATH_KEYS = ("cross_lags", "same_wave")
#: Every keyword :func:`model` accepts besides the file's own: ``processes`` sets K of a
#: model written for several processes.
MODEL_KEYWORDS = (*OPTION_VALUES, *MEASUREMENT_KEYS, *PATH_KEYS, "processes")

#: Keys of a model file and what each may hold.
_FORMS = ("latent", "within")
_SCORES = ("linear", "quadratic", "basis", "constant")
_FACTOR_NAMES = ("level", "slope", "curve")
_LEVEL_COVARIATES = ("none", "every-wave")
_RESIDUALS_AT = ("latent", "indicator")
_FILE_KEYS = {
    "description", "processes", "form", "factors", "scores", "lag_name", "lag_offset",
    "level_covariates", "residuals_at", "initial_is_level", "options", "allowed", "use",
    "wave_covariance",
    "measurement", "paths",
}


def _nearest(word: str, choices) -> str:
    close = difflib.get_close_matches(str(word), list(choices), n=1)
    return f"; did you mean '{close[0]}'?" if close else ""


def _choice(what: str, value: Any, choices, where: str = "") -> str:
    if value not in choices:
        listed = ", ".join(str(c) for c in choices)
        raise SpecError(
            f"`{what}`{where} must be one of {listed}; got {value!r}{_nearest(value, choices)}"
        )
    return value


@dataclass(frozen=True, kw_only=True)
class Spec:
    """A frozen model description with its resolved options.

    Parameters
    ----------
    name : str
        Catalog name or file stem.
    description : str
        One line for tables and reports.
    processes : int
        Number of outcome processes K (1 or more; a model file written for several
        processes takes any K >= 2 through the keyword ``processes``).
    form : {"latent", "within"}
        ``latent``: growth factors and the lag act on the latent outcome (ALT family).
        ``within``: factors load on the observed outcome and the lag acts on the
        wave-specific deviations (RI-CLPM).
    factors : tuple of str
        Growth factors in order, from ``level``, ``slope``, ``curve``.
    scores : {"linear", "quadratic", "basis", "constant"}
        Time scores of the slope (and curve): ``linear`` 0..T-1, ``quadratic`` adds
        (t-1)^2, ``basis`` fixes the scores of the first two waves whose equation holds
        the growth factors at their linear values and frees the rest (latent basis),
        ``constant`` gives the slope loading 1 at every change (latent change score).
    lag_name : str
        Parameter name of the lag (``lag``; ``proportional_change`` for dual change).
    lag_offset : float
        Fixed value added to the lag parameter in the structural matrix (1 for
        proportional change: eta_t = (1 + beta) eta_(t-1) + ...).
    level_covariates : {"none", "every-wave"}
        ``every-wave``: the level factor is regressed on x at every wave (the
        correlated-effects projection of the fixed-effects model); no z may enter.
    wave_covariance : {"none", "free"}
        ``free``: one process's wave disturbances covary freely over waves (one covariance
        block; parameters ``resid_cov[s,t]``), the saturated model of a model without
        factors or lag (``waves-free``). One process, latent residuals, no lag.
    residuals_at : {"latent", "indicator"}
        Where the wave-specific variance sits: the latent disturbance, or a measurement
        error on the observed outcome with a disturbance-free latent (dual change).
    initial_is_level : bool
        The first wave's latent is the level factor itself, and the level reaches later
        waves only through it, carried by the lag (latent change score: each change is
        slope + beta x previous latent score, so ``slope`` is the constant change).
        Needs a level factor, the latent form and a lag.
    options : dict
        Resolved options: initial, lag, residuals, effects, intercepts.
    allowed : dict
        Option values this model's identification allows.
    measurement : dict
        Resolved options of the measurement part, used where a process has several
        indicators: ``invariance`` (configural | metric | scalar | strict, default scalar),
        ``scale`` (marker | effects), ``marker`` (None: each process's first listed indicator),
        ``release`` (part -> indicator names freed from the level's equalities) and
        ``unique_covariance`` (same-indicator | none) and ``cross_loadings`` (indicator ->
        the other processes it also loads on). See docs/model-family.md.
    paths : dict
        Resolved options of the paths among several processes: ``cross_lags`` ("all",
        "none", or {"drop": ("y<-x", ...)}) and ``same_wave`` (("y<-x", ...): y at wave t
        regressed on x at wave t). See model/paths.py.
    """

    name: str
    description: str = ""
    processes: int = 1
    form: str = "latent"
    factors: tuple[str, ...] = ()
    scores: str = "linear"
    lag_name: str = "lag"
    lag_offset: float = 0.0
    level_covariates: str = "none"
    residuals_at: str = "latent"
    wave_covariance: str = "none"
    initial_is_level: bool = False
    options: dict = field(default_factory=dict)
    allowed: dict = field(default_factory=dict)
    measurement: dict = field(default_factory=dict)
    paths: dict = field(default_factory=dict)

    def __post_init__(self):
        where = f" in model '{self.name}'"
        if isinstance(self.processes, bool) or not isinstance(self.processes, int) \
                or self.processes < 1:
            raise SpecError(f"`processes`{where} must be a whole number of outcome processes, "
                            f"1 or more; got {self.processes!r}")
        _choice("form", self.form, _FORMS, where)
        _choice("scores", self.scores, _SCORES, where)
        _choice("level_covariates", self.level_covariates, _LEVEL_COVARIATES, where)
        _choice("residuals_at", self.residuals_at, _RESIDUALS_AT, where)
        _choice("wave_covariance", self.wave_covariance, ("none", "free"), where)
        if self.wave_covariance == "free" and (self.processes != 1 or self.residuals_at != "latent"):
            raise SpecError(f"`wave_covariance = \"free\"`{where} needs one process with "
                            "latent residuals")
        factors = tuple(self.factors)
        for f in factors:
            _choice("factors", f, _FACTOR_NAMES, where)
        if factors and factors != _FACTOR_NAMES[: len(factors)]:
            raise SpecError(
                f"`factors`{where} must be a leading part of level, slope, curve; got {list(factors)}"
            )
        object.__setattr__(self, "factors", factors)
        allowed = {k: tuple(v) for k, v in OPTION_VALUES.items()}
        for key, values in dict(self.allowed).items():
            _choice("allowed", key, OPTION_VALUES, where)
            for v in values:
                _choice(f"allowed.{key}", v, OPTION_VALUES[key], where)
            allowed[key] = tuple(values)
        object.__setattr__(self, "allowed", allowed)
        options = dict(self.options)
        for key in options:
            _choice("option", key, OPTION_VALUES, where)
        for key, values in allowed.items():
            value = options.setdefault(key, values[0])
            if value not in values:
                listed = ", ".join(values)
                raise SpecError(
                    f"`{key}` must be one of {listed} for model '{self.name}'; got {value!r}"
                    f"{_nearest(value, values)}"
                )
        object.__setattr__(self, "options", options)
        object.__setattr__(self, "measurement", _resolve_measurement(self.measurement, where))
        object.__setattr__(self, "paths", resolve_paths(self.paths, self.processes, where))
        if self.initial_is_level:
            # the lag is what carries the level (the first wave) to later waves
            if "level" not in factors or self.form != "latent":
                raise SpecError(
                    f"`initial_is_level = true`{where} needs a level factor in the latent form "
                    f"(factors = [\"level\", ...], form = \"latent\"); got factors = {list(factors)}, "
                    f"form = {self.form!r}")
            if options["lag"] == "none":
                raise SpecError(
                    f"`initial_is_level = true`{where} needs a lag: the level enters only the "
                    "first wave and reaches later waves through the lag on the previous latent "
                    "score; choose lag = \"constant\" or \"time-varying\" (and leave \"none\" out of "
                    "[allowed] lag)")

    # --- conveniences -----------------------------------------------------------------
    @property
    def has_lag(self) -> bool:
        return self.options["lag"] != "none"

    def replace(self, **changes) -> "Spec":
        """Return a copy with fields or options changed, validated again.

        Option names (``initial``, ``lag``, ``residuals``, ``effects``, ``intercepts``) may
        be given directly: ``spec.replace(initial="endogenous")``.
        """
        opts = {k: changes.pop(k) for k in list(changes) if k in OPTION_VALUES}
        if opts:
            changes["options"] = {**self.options, **changes.get("options", {}), **opts}
        meas = {k: changes.pop(k) for k in list(changes) if k in MEASUREMENT_KEYS}
        if meas:
            changes["measurement"] = {**self.measurement, **changes.get("measurement", {}),
                                      **meas}
        paths = {k: changes.pop(k) for k in list(changes) if k in PATH_KEYS}
        if paths:
            changes["paths"] = {**self.paths, **changes.get("paths", {}), **paths}
        unknown = [k for k in changes if k not in {f.name for f in dataclasses.fields(self)}]
        if unknown:
            raise SpecError(
                f"Spec has no field {unknown[0]!r}; fields are "
                + ", ".join(f.name for f in dataclasses.fields(self))
                + ", and the options " + ", ".join((*OPTION_VALUES, *MEASUREMENT_KEYS, *PATH_KEYS))
            )
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        """Plain-data form (JSON/TOML safe) that :meth:`from_dict` reads back."""
        d = dataclasses.asdict(self)
        d["factors"] = list(self.factors)
        d["allowed"] = {k: list(v) for k, v in self.allowed.items()}
        d["measurement"] = {k: (list(v) if isinstance(v, tuple) else
                                {p: list(n) if isinstance(n, tuple) else n for p, n in v.items()}
                                if isinstance(v, dict) else v)
                            for k, v in self.measurement.items()}
        d["paths"] = {k: (list(v) if isinstance(v, tuple) else
                          {p: list(n) for p, n in v.items()} if isinstance(v, dict) else v)
                      for k, v in self.paths.items()}
        return d

    @classmethod
    def from_dict(cls, data: dict) -> "Spec":
        """Rebuild a spec from :meth:`to_dict` output."""
        return cls(**data)

    def __str__(self) -> str:
        opts = ", ".join(f"{k}={v}" for k, v in self.options.items())
        cross, same = self.paths.get("cross_lags", "all"), self.paths.get("same_wave", ())
        extra = "" if self.processes < 3 else f", processes={self.processes}"
        extra += (f", cross_lags={cross}" if cross == "none" else
                  f", cross_lags drop {', '.join(cross['drop'])}" if isinstance(cross, dict) else "")
        extra += f", same_wave {', '.join(same)}" if same else ""
        return f"{self.name} ({opts}{extra})"


def _resolve_measurement(given, where: str = "") -> dict:
    """Check the measurement options and fill in their defaults (module notes)."""
    given = dict(given or {})
    for key in given:
        _choice("measurement option", key, MEASUREMENT_KEYS, where)
    out = {}
    for key, values in MEASUREMENT_VALUES.items():
        out[key] = _choice(key, given.get(key, values[0]), values, where)
    marker = given.get("marker")
    if marker is not None:
        names = (marker,) if isinstance(marker, str) else tuple(marker)
        if not names or not all(isinstance(n, str) and n for n in names):
            raise SpecError(f"`marker`{where} must be an indicator name or one name per process; "
                            f"got {marker!r}")
        marker = names
    out["marker"] = marker
    release = given.get("release") or {}
    if isinstance(release, str):
        release = (release,)
    if isinstance(release, dict):
        for part in release:
            _choice("release", part, RELEASE_PARTS, where)
        parts = {p: release.get(p, ()) for p in RELEASE_PARTS}
    else:
        parts = {p: release for p in RELEASE_PARTS}
    resolved = {}
    for part, names in parts.items():
        names = (names,) if isinstance(names, str) else tuple(names)
        if not all(isinstance(n, str) and n for n in names):
            raise SpecError(f"`release`{where} must name indicators, e.g. release=('fell_asleep',) "
                            "or release={'intercept': ['fell_asleep']}; got " + repr(release))
        resolved[part] = tuple(dict.fromkeys(names))
    out["release"] = resolved
    cross = given.get("cross_loadings") or {}
    if not isinstance(cross, dict) or not all(
            isinstance(i, str) and i and (isinstance(p, str) and p or isinstance(p, (list, tuple))
                                          and p and all(isinstance(q, str) and q for q in p))
            for i, p in cross.items()):
        raise SpecError(f"`cross_loadings`{where} must map an indicator to the other process(es) "
                        "it also loads on, e.g. cross_loadings={'woke_rarely': 'stress'}; got "
                        + repr(cross))
    out["cross_loadings"] = {i: ((p,) if isinstance(p, str) else tuple(dict.fromkeys(p)))
                             for i, p in cross.items()}
    out["deviation_sd"] = _deviation_sd(given.get("deviation_sd"), where)
    return out


def _deviation_sd(given, where: str) -> dict:
    """``deviation_sd``: one number for loadings and intercepts, or a mapping part -> number.

    Kept whatever the invariance level (a spec changed to another level and back keeps it);
    only ``invariance="approximate"`` reads it.
    """
    if given is None:
        return dict(DEVIATION_SD)
    parts = given if isinstance(given, dict) else {p: given for p in DEVIATION_SD}
    out = dict(DEVIATION_SD)
    for part, value in parts.items():
        _choice("deviation_sd", part, tuple(DEVIATION_SD), where)
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if not ok or not math.isfinite(value) or value <= 0:
            raise SpecError(f"`deviation_sd`{where} must be a positive number (the SD of each "
                            "wave's deviation, in the indicator's SDs), or a mapping such as "
                            f"{{'loading': 0.05, 'intercept': 0.1}}; got {given!r}")
        out[part] = float(value)
    return out


def _pair(text, option: str, where: str) -> str:
    """One "y<-x" pair (also written "x->y"), returned as "y<-x"."""
    example = ("same_wave=['sleep<-stress']" if option == "same_wave"
               else "cross_lags={'drop': ['sleep<-stress']}")
    if isinstance(text, str) and text.count("<-") + text.count("->") == 1:
        left, arrow, right = text.partition("<-") if "<-" in text else text.partition("->")
        left, right = left.strip(), right.strip()
        if left and right and left != right:
            return f"{left}<-{right}" if arrow == "<-" else f"{right}<-{left}"
    raise SpecError(f"`{option}`{where} must list pairs of two different processes written "
                    f"'y<-x' (y regressed on x) or 'x->y', e.g. {example}; got {text!r}")


def resolve_paths(given, processes: int, where: str = "") -> dict:
    """Check the syntax of the path options and fill in their defaults (``Spec.paths``).

    The process names are checked against the panel later (model/paths.py).
    """
    given = dict(given or {})
    for key in given:
        _choice("path option", key, PATH_KEYS, where)
    cross = given.get("cross_lags", "all")
    if isinstance(cross, dict):
        for key in cross:
            _choice("cross_lags", key, ("drop",), where)
        drop = cross.get("drop", ())
        drop = (drop,) if isinstance(drop, str) else drop
        if not isinstance(drop, (list, tuple)):
            raise SpecError(f"`cross_lags`{where}: `drop` must list pairs 'y<-x', e.g. "
                            f"cross_lags={{'drop': ['sleep<-stress']}}; got {drop!r}")
        drop = tuple(dict.fromkeys(_pair(p, "cross_lags", where) for p in drop))
        cross = {"drop": drop} if drop else "all"
    elif cross not in ("all", "none"):
        raise SpecError(f"`cross_lags`{where} must be 'all', 'none' or a table of pairs to drop, "
                        f"e.g. cross_lags={{'drop': ['sleep<-stress']}}; got {cross!r}"
                        f"{_nearest(cross, ('all', 'none'))}")
    same = given.get("same_wave", ())
    same = (same,) if isinstance(same, str) else same
    if not isinstance(same, (list, tuple)):
        raise SpecError(f"`same_wave`{where} must list pairs 'y<-x', e.g. "
                        f"same_wave=['sleep<-stress']; got {same!r}")
    same = tuple(dict.fromkeys(_pair(p, "same_wave", where) for p in same))
    if processes < 2 and (same or cross != "all"):
        option = "same_wave" if same else "cross_lags"
        raise SpecError(f"`{option}`{where} acts among several processes, and this model has "
                        "one; choose a model for several processes (clpm, ri-clpm, "
                        "bivariate-alt) or leave the option out")
    return {"cross_lags": cross, "same_wave": same}


# --- the catalog ----------------------------------------------------------------------
def _catalog_files() -> dict[str, Any]:
    root = resources.files("bayeslong.models")
    return {p.name[:-5]: p for p in root.iterdir() if p.name.endswith(".toml")}


def catalog() -> list[str]:
    """Return the names of the models in the catalog (the ``models/*.toml`` stems)."""
    return sorted(_catalog_files())


def _spec_from_text(name: str, text: str, source: str, options: dict) -> Spec:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise SpecError(f"model file {source} is not valid TOML: {err}") from err
    unknown = sorted(set(data) - _FILE_KEYS)
    if unknown:
        raise SpecError(
            f"model file {source} has an unknown key '{unknown[0]}'{_nearest(unknown[0], _FILE_KEYS)} "
            f"(valid keys: {', '.join(sorted(_FILE_KEYS))})"
        )
    data.pop("use", None)
    file_options = dict(data.pop("options", {}))
    file_measurement = dict(data.pop("measurement", {}))
    file_paths = dict(data.pop("paths", {}))
    options = dict(options)
    for key in options:
        _choice("option", key, MODEL_KEYWORDS)
    measurement = {k: options.pop(k) for k in list(options) if k in MEASUREMENT_KEYS}
    paths = {k: options.pop(k) for k in list(options) if k in PATH_KEYS}
    if "processes" in options:
        k = options.pop("processes")
        if data.get("processes", 1) < 2 and k != data.get("processes", 1):
            raise SpecError(f"model {source} is written for one process, so `processes` cannot "
                            f"be set to {k!r}; for several processes choose clpm, ri-clpm or "
                            "bivariate-alt (or a model file with processes >= 2)")
        if isinstance(k, bool) or not isinstance(k, int) or k < 2:
            raise SpecError(f"`processes` of model {source} must be a whole number, 2 or more; "
                            f"got {k!r}")
        data["processes"] = k
    return Spec(name=name, **data, options={**file_options, **options},
                measurement={**file_measurement, **measurement},
                paths={**file_paths, **paths})


def model(name: str, **options) -> Spec:
    """Return the catalog model ``name`` with options resolved.

    Parameters
    ----------
    name : str
        A catalog name (see :func:`catalog`) or a path to a model TOML file.
    **options
        ``initial`` (predetermined | endogenous), ``lag`` (none | constant |
        time-varying), ``residuals`` (equal | free), ``effects`` (constant |
        time-varying), ``intercepts`` (equal | free); the model file narrows them.
        Measurement options (processes with several indicators): ``invariance``
        (configural | metric | scalar | strict | approximate), ``deviation_sd`` (the SD of
        the per-wave deviations under approximate invariance, a number or
        {"loading": s, "intercept": s}), ``marker``, ``release``,
        ``unique_covariance`` (same-indicator | none), ``scale`` (marker | effects),
        ``cross_loadings`` (indicator -> other process). Several processes: ``processes``
        (K, for a model written for several), ``cross_lags`` ("all", "none" or
        {"drop": ["y<-x"]}), ``same_wave`` (["y<-x"]); see docs/model-family.md. Categorical indicators: ``link``
        (probit | logit), ``thresholds`` (equal | free over waves).

    Raises
    ------
    SpecError
        Unknown model name or option value; the message lists the valid ones.

    Examples
    --------
    >>> spec = model("alt", initial="endogenous")
    >>> spec.options["initial"]
    'endogenous'
    """
    if str(name).endswith(".toml"):
        return load_model(name, **options)
    files = _catalog_files()
    if name not in files:
        raise SpecError(
            f"no model named {name!r}{_nearest(name, files)} "
            f"(the catalog has: {', '.join(sorted(files))}; a path ending in .toml loads your own file)"
        )
    return _spec_from_text(name, files[name].read_text(), f"'{name}.toml'", options)


def load_model(path, **options) -> Spec:
    """Load a model file of the user's own, in the catalog's TOML format."""
    path = Path(path)
    if not path.is_file():
        raise SpecError(f"model file {str(path)!r} does not exist")
    return _spec_from_text(path.stem, path.read_text(), repr(str(path)), options)


def describe_catalog() -> list[dict]:
    """One row per catalog model: name, description, default options, allowed values."""
    rows = []
    for name in catalog():
        s = model(name)
        rows.append({"model": name, "description": s.description, "processes": s.processes,
                     **{k: s.options[k] for k in OPTION_VALUES},
                     "allowed": {k: list(v) for k, v in s.allowed.items() if len(v) > 1}})
    return rows


def check_spec(spec: Any) -> Spec:
    """Return ``spec`` if it is a :class:`Spec`; otherwise raise saying what to pass."""
    if isinstance(spec, Spec):
        return spec
    if isinstance(spec, str):
        raise SpecError(f"`spec` must be a model from bl.model(...); got the text {spec!r}. "
                        f"Pass bl.model({spec!r}) (bl.catalog() lists the names).")
    raise SpecError(f"`spec` must be a model from bl.model(...), e.g. bl.model('alt'); got a "
                    f"{type(spec).__name__}.")

