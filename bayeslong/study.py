"""The study file: one TOML file that says what data to read and which models to fit.

A study file lets a researcher go from a CSV (or Parquet) file of panel data to a report
without writing Python: ``bayeslong run study.toml``. :func:`load_study` reads and checks it
and returns a frozen :class:`Study`; :func:`run_study` carries it out (intake,
identification, fits, comparison, checks, sensitivity), saving every finished fit under the
output folder so that a second run reuses it while the study and the data are unchanged.

Layout
------
Paths are relative to the folder of the study file. Keys marked *required* must be given;
every other key has the default shown. An unknown key is an error that names the key and
the nearest valid one.

Top level

``title`` (text, required)
    The study's title, printed at the head of the report.
``output`` (text, default ``"bayeslong-output"``)
    Folder for saved fits, tables and the report.

``[data]``

``path`` (text, required)
    The data file: ``.csv`` or ``.parquet``.
``layout`` (``"long"`` or ``"wide"``, default ``"long"``)
    ``long``: one row per unit and wave. ``wide``: one row per unit, one column per
    variable and wave.
``unit`` (text, required)
    Column holding the unit id.
``wave`` (text, required when long)
    Column holding the wave label (long layout only).
``outcomes`` (required)
    Long: a list of outcome columns, ``["quality"]``. Wide: a table from each outcome
    to its columns in wave order, ``outcomes = { quality = ["q1", "q2", "q3"] }``.
``time_varying`` (default none)
    Time-varying covariates: a list of columns (long) or a table like ``outcomes`` (wide).
``time_invariant`` (list of text, default none)
    Time-invariant covariate columns.
``waves`` (list, wide layout only, default 1..T)
    Wave labels for the per-wave column lists.
``drop_incomplete_covariates`` (true/false, default false)
    Drop units with a missing covariate (with a warning naming them) instead of stopping.

``[[models]]`` (one table per candidate model; at least one, required)

``model`` (text, required)
    A catalog name (``bayeslong models`` lists them) or a path to a model TOML file of
    your own, in the catalog's format.
``label`` (text, default the model name, plus the options when two candidates share it)
    The name used in tables, plots and file names; labels must be unique.
``options`` (table, default the model's own)
    ``initial``, ``lag``, ``residuals``, ``effects``, ``intercepts``, as in
    ``bayeslong.model(name, **options)``.

``[priors]`` (default: the documented weakly informative defaults)

``<parameter> = ["<family>", number, ...]``
    A prior override by parameter name, e.g. ``lag = ["normal", 0.3, 0.1]``. It applies to
    every candidate that has the parameter; a name no candidate has is an error.

``[sampling]``

``method`` (``"bayes"`` or ``"ml"``, default ``"bayes"``)
    ``bayes``: NUTS posterior sampling. ``ml``: maximum likelihood only, a quick look
    without posteriors, LOO or predictive checks.
``draws`` (whole number, default 1000), ``tune`` (default 1000), ``chains`` (default 4),
``seed`` (default 1)
    Posterior draws kept per chain, warm-up draws per chain, chains, and the random seed.
``sampler`` (text, default ``"auto"``)
    Passed to :func:`bayeslong.fit` (``"auto"`` lets it choose).
``workers`` (whole number, default 1)
    Processes that sample candidates side by side (at most one per candidate to sample);
    0 is one per CPU core, 1 samples them one after another in this process. Each worker
    also makes its candidate's leave-future-out refit, with the model it has compiled.
    ``bayeslong run`` needs nothing more; a Python script that calls :func:`run_study` on
    such a study must guard its entry point with ``if __name__ == "__main__":`` (worker
    processes import the script), or pass ``workers=1``.

``[checks]``

``ppc`` (true/false, default true), ``ppc_draws`` (whole number, default 200)
    Posterior predictive checks and the number of posterior draws they use.
``ml`` (true/false, default false)
    Also fit each candidate by maximum likelihood and show the estimates beside the
    posterior (always done when ``sampling.method = "ml"``).

``[comparison]``

``future`` (true/false, default false)
    Also compare by leave-future-out: fit on all but the last wave, score the last.

``[sensitivity]`` (each true/false; all default false)

``prior_grid``
    Refit with the lag's prior on a grid of locations and widths.
``initial``
    Refit with the other treatment of the first wave (predetermined / endogenous).
``specification``
    The lag across every candidate that has one.
``power_scaling``
    Power-scaling sensitivity of the prior and the likelihood.

Example
-------
.. code-block:: toml

    title = "Sleep quality of shift workers (invented data)"
    output = "results"

    [data]
    path = "sleep.csv"
    layout = "long"
    unit = "worker"
    wave = "week"
    outcomes = ["quality"]
    time_varying = ["night_shifts"]
    time_invariant = ["age"]

    [[models]]
    model = "alt"

    [[models]]
    model = "alt"
    label = "alt, first wave endogenous"
    options = { initial = "endogenous" }

    [[models]]
    model = "linear-growth"

    [priors]
    lag = ["normal", 0.0, 0.5]

    [sampling]
    draws = 500
    tune = 500
    chains = 2
    seed = 7

    [comparison]
    future = true

    [sensitivity]
    specification = true
    initial = true

Resuming
--------
Each candidate's fit is identified by a content hash of the data settings, the bytes of the
data file, the sampling settings, the prior overrides, the model's full spec (catalog or
user file, after options) and the package version. Changing the title, the checks or
another candidate does not invalidate a saved fit; changing anything the fit depends on does.
"""

from __future__ import annotations

import dataclasses
import difflib
import hashlib
import json
import numbers
import sys
import time
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from bayeslong.errors import BayeslongError, DataError, SpecError

__all__ = ["Study", "Candidate", "load_study", "run_study", "StudyResults", "ModelResult"]

#: Default output folder (relative to the study file).
DEFAULT_OUTPUT = "bayeslong-output"

_TOP = ("title", "output", "data", "models", "priors", "sampling", "checks", "comparison",
        "sensitivity")
_DATA = ("path", "layout", "unit", "wave", "outcomes", "time_varying", "time_invariant",
         "waves", "drop_incomplete_covariates")
_MODEL = ("model", "label", "options")
_SAMPLING = {"method": "bayes", "draws": 1000, "tune": 1000, "chains": 4, "seed": 1,
             "sampler": "auto", "workers": 1}
_CHECKS = {"ppc": True, "ppc_draws": 200, "ml": False}
_COMPARISON = {"future": False}
_SENSITIVITY = {"prior_grid": False, "initial": False, "specification": False,
                "power_scaling": False}
_LAYOUTS = ("long", "wide")
_METHODS = ("bayes", "ml")
_DATA_SUFFIXES = (".csv", ".parquet")


# --------------------------------------------------------------------------------------------
# checking helpers (each raises a SpecError that names the key and the fix)
# --------------------------------------------------------------------------------------------


def _nearest(word: str, choices) -> str:
    close = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=0.5)
    return f"; did you mean '{close[0]}'?" if close else ""


class _Reader:
    """Check one parsed study file, naming the file in every message."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, message: str, cls=SpecError) -> None:
        raise cls(f"study file {self.source}: {message}")

    def keys(self, table: dict, valid, where: str) -> None:
        for key in table:
            if key not in valid:
                place = f"`{where}.{key}`" if where else f"`{key}`"
                self.fail(f"unknown key {place}{_nearest(key, valid)} "
                          f"(valid keys{' in [' + where + ']' if where else ''}: "
                          f"{', '.join(valid)})")

    def required(self, table: dict, key: str, where: str) -> Any:
        if key not in table:
            place = f"{where}.{key}" if where else key
            section = f" in [{where}]" if where and "[" not in where else ""
            self.fail(f"the required key `{place}` is missing; add it{section}"
                      + (f" (see `{_EXAMPLES.get(key)}`)" if key in _EXAMPLES else ""))
        return table[key]

    def text(self, value: Any, where: str) -> str:
        if not isinstance(value, str) or not value.strip():
            self.fail(f"`{where}` must be text in quotes; got {value!r}")
        return value

    def texts(self, value: Any, where: str) -> tuple[str, ...]:
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            self.fail(f"`{where}` must be a list of column names, e.g. [\"a\", \"b\"]; got {value!r}")
        return tuple(value)

    def whole(self, value: Any, where: str, least: int) -> int:
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            self.fail(f"`{where}` must be a whole number; got {value!r}")
        if value < least:
            self.fail(f"`{where}` must be at least {least}; got {value}")
        return int(value)

    def flag(self, value: Any, where: str) -> bool:
        if not isinstance(value, bool):
            self.fail(f"`{where}` must be true or false (no quotes); got {value!r}")
        return value

    def choice(self, value: Any, choices, where: str) -> str:
        if value not in choices:
            self.fail(f"`{where}` must be one of {', '.join(repr(c) for c in choices)}; "
                      f"got {value!r}{_nearest(value, choices)}")
        return value

    def table(self, value: Any, where: str) -> dict:
        if not isinstance(value, dict):
            self.fail(f"`{where}` must be a table ([{where}] or {{ key = value }}); got {value!r}")
        return value

    def settings(self, raw: dict, name: str, defaults: dict) -> dict:
        """Fill a flat settings table from its defaults, checking each value's type."""
        table = self.table(raw.get(name, {}), name)
        self.keys(table, tuple(defaults), name)
        out = dict(defaults)
        for key, value in table.items():
            where = f"{name}.{key}"
            default = defaults[key]
            if isinstance(default, bool):
                out[key] = self.flag(value, where)
            elif isinstance(default, int):
                out[key] = self.whole(value, where, 0 if key in ("tune", "seed", "workers") else 1)
            else:
                out[key] = self.text(value, where)
        return out


_EXAMPLES = {
    "title": 'title = "My study"',
    "data": '[data] path = "panel.csv"',
    "models": '[[models]] model = "alt"',
    "path": 'path = "panel.csv"',
    "unit": 'unit = "id"',
    "wave": 'wave = "time"',
    "outcomes": 'outcomes = ["y"]',
    "model": 'model = "alt"',
}


# --------------------------------------------------------------------------------------------
# value objects
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class DataSource:
    """Where the panel data are and how to read them (the ``[data]`` table)."""

    path: Path
    layout: str = "long"
    unit: str
    wave: str | None = None
    outcomes: Any
    time_varying: Any = ()
    time_invariant: tuple[str, ...] = ()
    waves: tuple | None = None
    drop_incomplete_covariates: bool = False

    def settings(self) -> dict:
        """Plain-data form without the absolute path (used in the content hash and report)."""
        d = dataclasses.asdict(self)
        d["path"] = self.path.name
        for key in ("outcomes", "time_varying"):
            value = getattr(self, key)
            d[key] = {k: list(v) for k, v in value.items()} if isinstance(value, dict) else list(value)
        d["time_invariant"] = list(self.time_invariant)
        d["waves"] = None if self.waves is None else list(self.waves)
        return d

    def columns(self) -> list[tuple[str, str]]:
        """Every column the study names, with the key that names it."""
        cols = [(self.unit, "data.unit")]
        if self.layout == "long":
            cols.append((self.wave, "data.wave"))
            cols += [(c, "data.outcomes") for c in self.outcomes]
            cols += [(c, "data.time_varying") for c in self.time_varying]
        else:
            cols += [(c, f"data.outcomes.{k}") for k, v in self.outcomes.items() for c in v]
            cols += [(c, f"data.time_varying.{k}") for k, v in self.time_varying.items() for c in v]
        cols += [(c, "data.time_invariant") for c in self.time_invariant]
        return cols


@dataclass(frozen=True, kw_only=True)
class Candidate:
    """One candidate model of a study: the resolved spec and the label it is shown under."""

    label: str
    model: str
    options: dict = field(default_factory=dict)
    spec: Any = None  # bayeslong.spec.Spec, resolved at load time


@dataclass(frozen=True, kw_only=True)
class Study:
    """A checked study file (see the module docstring for the layout).

    Attributes
    ----------
    title : str
    source : pathlib.Path
        The study file.
    output : pathlib.Path
        The output folder (absolute).
    data : DataSource
    models : tuple of Candidate
    priors : dict
        Parameter name -> tuple (family, *numbers).
    sampling, checks, comparison, sensitivity : dict
        Settings with defaults filled in.
    """

    title: str
    source: Path
    output: Path
    data: DataSource
    models: tuple[Candidate, ...]
    priors: dict = field(default_factory=dict)
    sampling: dict = field(default_factory=lambda: dict(_SAMPLING))
    checks: dict = field(default_factory=lambda: dict(_CHECKS))
    comparison: dict = field(default_factory=lambda: dict(_COMPARISON))
    sensitivity: dict = field(default_factory=lambda: dict(_SENSITIVITY))

    # ---------------------------------------------------------------- data

    def read_data(self):
        """Read the data file into a pandas DataFrame and check the named columns exist."""
        import pandas as pd

        path = self.data.path
        try:
            if path.suffix.lower() == ".csv":
                df = pd.read_csv(path)
            else:
                df = pd.read_parquet(path)
        except (OSError, ValueError, ImportError) as err:
            raise DataError(f"could not read the data file {str(path)!r} "
                            f"(named in `data.path`): {err}") from err
        columns = [str(c) for c in df.columns]
        for name, key in self.data.columns():
            if name not in df.columns:
                close = difflib.get_close_matches(str(name), columns, n=1, cutoff=0.5)
                hint = (f"did you mean {close[0]!r}?" if close
                        else "its columns are " + ", ".join(repr(c) for c in columns[:20]))
                raise DataError(f"`{key}` names the column {name!r}, which is not in "
                                f"{path.name}; {hint}")
        return df

    def panel(self, *, record: list | None = None):
        """Build the :class:`~bayeslong.Panel` the study describes.

        Parameters
        ----------
        record : list, optional
            Intake warnings (as text) are appended here instead of being issued.
        """
        from bayeslong.data import Panel

        df = self.read_data()
        d = self.data
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if d.layout == "long":
                panel = Panel.from_long(
                    df, unit=d.unit, wave=d.wave, outcomes=list(d.outcomes),
                    time_varying=list(d.time_varying), time_invariant=list(d.time_invariant),
                    drop_incomplete_covariates=d.drop_incomplete_covariates)
            else:
                panel = Panel.from_wide(
                    df, unit=d.unit, outcomes={k: list(v) for k, v in d.outcomes.items()},
                    time_varying={k: list(v) for k, v in d.time_varying.items()},
                    time_invariant=list(d.time_invariant),
                    waves=None if d.waves is None else list(d.waves),
                    drop_incomplete_covariates=d.drop_incomplete_covariates)
        for w in caught:
            if record is not None:
                record.append(str(w.message))
            else:
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        return panel

    # ---------------------------------------------------------------- identity of fits

    def data_digest(self) -> str:
        """SHA-256 of the data file's bytes."""
        h = hashlib.sha256()
        with open(self.data.path, "rb") as fh:
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
        return h.hexdigest()

    def fit_key(self, candidate: Candidate, *, extra: dict | None = None) -> str:
        """Content hash identifying ``candidate``'s fit (see "Resuming" in the module notes).

        Parameters
        ----------
        candidate : Candidate
        extra : dict, optional
            More settings the result depends on (e.g. ``{"kind": "ml"}``).
        """
        content = {
            "data": self.data.settings(),
            "data_sha256": self._digest(),
            "sampling": self.sampling,
            "priors": {k: list(v) for k, v in sorted(self.priors.items())},
            "spec": candidate.spec.to_dict(),
            "version": package_version(),
            "extra": extra or {},
        }
        text = json.dumps(content, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def _digest(self) -> str:
        # hashing a large file once per candidate would be wasteful; the study is frozen,
        # but the file is not, so the digest is cached by (size, mtime).
        st = self.data.path.stat()
        key = (str(self.data.path), st.st_size, st.st_mtime_ns)
        if key not in _DIGESTS:
            _DIGESTS[key] = self.data_digest()
        return _DIGESTS[key]

    def to_dict(self) -> dict:
        """Plain-data form of the settings (for the report and ``--json``)."""
        return {
            "title": self.title,
            "source": str(self.source),
            "output": str(self.output),
            "data": self.data.settings(),
            "models": [{"label": c.label, "model": c.model, "options": dict(c.spec.options)}
                       for c in self.models],
            "priors": {k: list(v) for k, v in self.priors.items()},
            "sampling": dict(self.sampling),
            "checks": dict(self.checks),
            "comparison": dict(self.comparison),
            "sensitivity": dict(self.sensitivity),
        }


_DIGESTS: dict = {}


# --------------------------------------------------------------------------------------------
# loading
# --------------------------------------------------------------------------------------------


def load_study(path) -> Study:
    """Read and check a study file.

    Parameters
    ----------
    path : str or pathlib.Path
        The study TOML file.

    Returns
    -------
    Study

    Raises
    ------
    SpecError
        The file is missing or not valid TOML; a key is unknown (the nearest valid key is
        suggested), missing, or of the wrong type; a model name is not in the catalog; a
        label repeats; a prior is malformed.
    DataError
        The data file does not exist or is not CSV/Parquet.

    Examples
    --------
    >>> study = load_study("examples/shift_sleep.toml")  # doctest: +SKIP
    >>> [c.label for c in study.models]  # doctest: +SKIP
    ['alt (growth + lag)', 'growth only', 'lag only']
    """
    path = Path(path)
    if not path.is_file():
        raise SpecError(f"study file {str(path)!r} does not exist; check the path "
                        "(`bayeslong demo` writes an example study to start from)")
    source = path.name
    r = _Reader(source)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as err:
        r.fail(f"is not valid TOML: {err}")
    except UnicodeDecodeError as err:
        r.fail(f"is not UTF-8 text: {err}")
    r.keys(raw, _TOP, "")
    base = path.resolve().parent

    title = r.text(r.required(raw, "title", ""), "title")
    output = base / r.text(raw.get("output", DEFAULT_OUTPUT), "output")
    data = _read_data(r, r.table(r.required(raw, "data", ""), "data"), base)
    models = _read_models(r, r.required(raw, "models", ""), base)
    priors = _read_priors(r, r.table(raw.get("priors", {}), "priors"))
    sampling = r.settings(raw, "sampling", _SAMPLING)
    r.choice(sampling["method"], _METHODS, "sampling.method")
    checks = r.settings(raw, "checks", _CHECKS)
    comparison = r.settings(raw, "comparison", _COMPARISON)
    sensitivity = r.settings(raw, "sensitivity", _SENSITIVITY)
    return Study(title=title, source=path.resolve(), output=output, data=data, models=models,
                 priors=priors, sampling=sampling, checks=checks, comparison=comparison,
                 sensitivity=sensitivity)


def _read_data(r: _Reader, raw: dict, base: Path) -> DataSource:
    r.keys(raw, _DATA, "data")
    rel = r.text(r.required(raw, "path", "data"), "data.path")
    path = (base / rel).resolve()
    if path.suffix.lower() not in _DATA_SUFFIXES:
        r.fail(f"`data.path` must name a .csv or .parquet file; got {rel!r}", DataError)
    if not path.is_file():
        r.fail(f"the data file {rel!r} (`data.path`) does not exist; looked for {str(path)!r}. "
               "Paths are relative to the study file's folder.", DataError)
    layout = r.choice(raw.get("layout", "long"), _LAYOUTS, "data.layout")
    unit = r.text(r.required(raw, "unit", "data"), "data.unit")
    invariant = r.texts(raw.get("time_invariant", []), "data.time_invariant")
    drop = r.flag(raw.get("drop_incomplete_covariates", False), "data.drop_incomplete_covariates")
    if layout == "long":
        if "waves" in raw:
            r.fail("`data.waves` is for the wide layout only; in the long layout the wave "
                   "labels come from the `data.wave` column: remove `data.waves`")
        wave = r.text(r.required(raw, "wave", "data"), "data.wave")
        outcomes = r.texts(r.required(raw, "outcomes", "data"), "data.outcomes")
        varying = r.texts(raw.get("time_varying", []), "data.time_varying")
        waves = None
    else:
        if "wave" in raw:
            r.fail("`data.wave` is for the long layout only; in the wide layout give the "
                   "columns per wave in `data.outcomes` (and optional labels in `data.waves`)")
        wave = None

        def per_wave(value, where):
            value = r.table(value, where)
            return {name: r.texts(cols, f"{where}.{name}") for name, cols in value.items()}

        outcomes = per_wave(r.required(raw, "outcomes", "data"), "data.outcomes")
        varying = per_wave(raw.get("time_varying", {}), "data.time_varying")
        waves = raw.get("waves")
        if waves is not None:
            if not isinstance(waves, list):
                r.fail(f"`data.waves` must be a list of wave labels; got {waves!r}")
            waves = tuple(waves)
    if not outcomes:
        r.fail("`data.outcomes` is empty; name at least one outcome column")
    return DataSource(path=path, layout=layout, unit=unit, wave=wave, outcomes=outcomes,
                      time_varying=varying, time_invariant=invariant, waves=waves,
                      drop_incomplete_covariates=drop)


def _read_models(r: _Reader, raw: Any, base: Path) -> tuple[Candidate, ...]:
    from bayeslong.spec import OPTION_VALUES, catalog, model

    if isinstance(raw, dict):
        raw = [raw]
    if not isinstance(raw, list) or not raw or not all(isinstance(m, dict) for m in raw):
        r.fail("`models` must be one or more [[models]] tables, each with a `model` key, e.g. "
               '[[models]] model = "alt"')
    found = []
    for i, entry in enumerate(raw, start=1):
        where = f"models[{i}]"
        r.keys(entry, _MODEL, where)
        if "model" not in entry:
            r.fail(f"the required key `model` is missing from the {_ordinal(i)} [[models]] "
                   f"table; add e.g. model = \"alt\" (the catalog: {', '.join(catalog())})")
        name = r.text(entry["model"], f"{where}.model")
        options = r.table(entry.get("options", {}), f"{where}.options")
        r.keys(options, tuple(OPTION_VALUES), f"{where}.options")
        for key, value in options.items():
            r.text(value, f"{where}.options.{key}")
        if name.endswith(".toml"):
            file = (base / name).resolve()
            if not file.is_file():
                r.fail(f"`{where}.model` names the model file {name!r}, which does not exist "
                       f"(looked for {str(file)!r}; paths are relative to the study file)")
            target = str(file)
        else:
            if name not in catalog():
                r.fail(f"`{where}.model` is {name!r}, which is not in the catalog"
                       f"{_nearest(name, catalog())} (the catalog has: {', '.join(catalog())}; "
                       "or give a path ending in .toml to a model file of your own)")
            target = name
        try:
            spec = model(target, **options)
        except SpecError as err:
            r.fail(f"`{where}`: {err}")
        label = entry.get("label")
        if label is not None:
            label = r.text(label, f"{where}.label")
        found.append((label, name, options, spec))
    names = [spec.name for _, _, _, spec in found]
    candidates = []
    for label, name, options, spec in found:
        if label is None:
            label = spec.name
            if names.count(spec.name) > 1 and options:
                label += " (" + ", ".join(f"{k}={v}" for k, v in options.items()) + ")"
        candidates.append(Candidate(label=label, model=name, options=dict(options), spec=spec))
    labels = [c.label for c in candidates]
    for label in labels:
        if labels.count(label) > 1:
            r.fail(f"two candidates are labelled {label!r}; give each [[models]] table its own "
                   "`label`")
    return tuple(candidates)


def _read_priors(r: _Reader, raw: dict) -> dict:
    priors = {}
    for name, value in raw.items():
        where = f"priors.{name}"
        if (not isinstance(value, list) or not value or not isinstance(value[0], str)
                or not all(isinstance(v, numbers.Real) and not isinstance(v, bool)
                           for v in value[1:])):
            r.fail(f"`{where}` must be a list of a distribution name and its numbers, e.g. "
                   f'{name} = ["normal", 0.0, 0.5]; got {value!r}')
        priors[name] = (value[0], *[float(v) for v in value[1:]])
    return priors


def _ordinal(i: int) -> str:
    return {1: "first", 2: "second", 3: "third", 4: "fourth", 5: "fifth"}.get(i, f"{i}th")


# --------------------------------------------------------------------------------------------
# running a study
# --------------------------------------------------------------------------------------------


def package_version(name: str = "bayeslong") -> str:
    """Installed version of a distribution, or ``"not installed"`` (no import needed)."""
    from importlib import metadata

    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return "not installed"


def software_versions() -> dict[str, str]:
    """Versions of Python and of the packages a result depends on (for reproducibility)."""
    import platform

    out = {"python": platform.python_version()}
    for name in ("bayeslong", "pymc", "pytensor", "arviz", "numpy", "pandas", "scipy", "nutpie"):
        out[name] = package_version(name)
    return out


@dataclass(frozen=True, kw_only=True, eq=False)
class Step:
    """The outcome of one optional step of a run (comparison, checks, sensitivity ...).

    Attributes
    ----------
    ran : bool
    reason : str
        Why the step did not run or failed (empty when it ran).
    value : object
        The step's result (a table, a result object) when it ran.
    seconds : float
    """

    ran: bool
    reason: str = ""
    value: Any = None
    seconds: float = 0.0

    @classmethod
    def skipped(cls, reason: str) -> "Step":
        return cls(ran=False, reason=reason)


@dataclass(frozen=True, kw_only=True, eq=False)
class ModelResult:
    """Everything a run learned about one candidate.

    Attributes
    ----------
    candidate : Candidate
    key : str
        Content hash of the fit (file names under ``<output>/fits``).
    identification : bayeslong.Identification or None
    ml : dict or None
        ``loglik``, ``aic``, ``bic``, ``n_params``, ``converged``, ``boundary`` and the
        ``table`` (DataFrame of estimate and se) of the maximum-likelihood fit.
    fit : bayeslong.fit.Fit or None
        The Bayesian fit (None for ``method = "ml"``, or when it could not run).
    reused : bool
        The Bayesian fit was loaded from a saved file instead of sampled.
    notes : tuple of str
        What went wrong or was skipped, in words.
    problems : tuple of str
        Convergence problems, each naming the parameter and the threshold.
    check : Step
        Posterior predictive checks.
    seconds : float
    forecast : ForecastScore or None
        The leave-future-out score, when the worker process that sampled the candidate made
        it (see ``sampling.workers``); otherwise the comparison makes it.
    """

    candidate: Candidate
    key: str
    identification: Any = None
    ml: dict | None = None
    fit: Any = None
    reused: bool = False
    notes: tuple[str, ...] = ()
    problems: tuple[str, ...] = ()
    check: Step = field(default_factory=lambda: Step.skipped("not requested"))
    seconds: float = 0.0
    forecast: Any = None

    @property
    def label(self) -> str:
        return self.candidate.label


@dataclass(frozen=True, kw_only=True, eq=False)
class StudyResults:
    """The outcome of :func:`run_study`, which :func:`bayeslong.report.write_report` renders.

    Attributes
    ----------
    study : Study
    panel : Panel
    intake_warnings : tuple of str
    models : tuple of ModelResult
    comparison, future, sensitivity : Step
    method : str
        ``"bayes"``, ``"ml"`` (asked for), or ``"ml-fallback"`` (the Bayesian fit module
        is absent).
    fitted, reused : int
        The run's fits (Bayesian; maximum likelihood when that is the method) made in this
        run, and loaded from saved files.
    versions : dict
    seconds : float
    started : str
        UTC time stamp of the run.
    stages : tuple of (str, float, str)
        Where the time went: each step of the run, its seconds and a detail (e.g. the
        compile and sampling seconds of a fit), in the order they ran.
    """

    study: Study
    panel: Any
    intake_warnings: tuple[str, ...] = ()
    models: tuple[ModelResult, ...] = ()
    comparison: Step = field(default_factory=lambda: Step.skipped("not requested"))
    future: Step = field(default_factory=lambda: Step.skipped("not requested"))
    sensitivity: Step = field(default_factory=lambda: Step.skipped("not requested"))
    method: str = "bayes"
    fitted: int = 0
    reused: int = 0
    versions: dict = field(default_factory=dict)
    seconds: float = 0.0
    started: str = ""
    stages: tuple = ()

    def to_dict(self) -> dict:
        """Machine-readable summary (JSON safe) of the run."""
        models = []
        for m in self.models:
            ident = m.identification
            models.append({
                "label": m.label,
                "model": m.candidate.spec.name,
                "options": dict(m.candidate.spec.options),
                "key": m.key,
                "identified": None if ident is None else bool(ident.identified),
                "deficient": [] if ident is None else list(ident.deficient),
                "ml": None if m.ml is None else {k: m.ml[k] for k in
                                                 ("loglik", "aic", "bic", "n_params", "converged")},
                "bayes": m.fit is not None,
                "reused": m.reused,
                "problems": list(m.problems),
                "notes": list(m.notes),
            })

        def step(s: Step):
            out = {"ran": s.ran, "reason": s.reason}
            table = _table_of(s.value)
            if table is not None:
                out["table"] = json.loads(table.to_json(orient="index", default_handler=str))
            return out

        return {
            "title": self.study.title,
            "method": self.method,
            "n_units": self.panel.n_units,
            "n_waves": self.panel.n_waves,
            "fitted": self.fitted,
            "reused": self.reused,
            "models": models,
            "comparison": step(self.comparison),
            "future": step(self.future),
            "sensitivity": step(self.sensitivity),
            "output": str(self.study.output),
            "seconds": round(self.seconds, 1),
            "stages": [{"step": step, "seconds": round(sec, 1), "detail": detail}
                       for step, sec, detail in self.stages],
            "versions": self.versions,
        }


def _table_of(value):
    """The DataFrame inside a step's value, if any (a DataFrame or an object with .table)."""
    import pandas as pd

    if isinstance(value, pd.DataFrame):
        return value
    table = getattr(value, "table", None)
    return table if isinstance(table, pd.DataFrame) else None


def _installed(package: str) -> bool:
    from importlib.util import find_spec

    return find_spec(package) is not None


def optional_module(name: str):
    """Import ``bayeslong.<name>`` if it exists; return (module, reason it is absent)."""
    import importlib

    try:
        return importlib.import_module(f"bayeslong.{name}"), ""
    except ModuleNotFoundError as err:
        if err.name in (f"bayeslong.{name}",):
            return None, f"this installation has no bayeslong.{name} module"
        raise


def _slug(text: str) -> str:
    import re

    return re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower()[:40] or "model"


def _stderr(message: str) -> None:
    print(f"[bayeslong] {message}", file=sys.stderr, flush=True)


def check_priors(study: Study, panel) -> None:
    """Check every prior override against the candidates' parameters and prior rules.

    Raises
    ------
    SpecError
        A prior names a parameter no candidate has (nearest name suggested), or a prior
        is malformed for a model that has the parameter (the model is named).
    """
    from bayeslong.priors import resolve_priors
    from bayeslong.structure import structure_for

    if not study.priors:
        return
    structures = {c.label: structure_for(c.spec, panel) for c in study.models}
    every = sorted({n for s in structures.values() for n in s.names})
    for name in study.priors:
        if not any(name in s.names for s in structures.values()):
            raise SpecError(
                f"study file {study.source.name}: `priors.{name}` names no parameter of any "
                f"candidate{_nearest(name, every)} (the candidates' parameters: {', '.join(every)})")
    for label, structure in structures.items():
        mine = {k: v for k, v in study.priors.items() if k in structure.names}
        try:
            resolve_priors(structure, panel, mine)
        except SpecError as err:
            raise SpecError(f"study file {study.source.name}, candidate {label!r}: {err}") from err


def _priors_for(study: Study, spec, panel) -> dict:
    from bayeslong.structure import structure_for

    names = structure_for(spec, panel).names
    return {k: v for k, v in study.priors.items() if k in names}


def run_study(study: Study, *, fit: bool = True, progress: Callable[[str], None] | None = _stderr,
              quiet_sampler: bool = False, strict: bool = False,
              workers: int | None = None) -> StudyResults:
    """Carry out a study: intake, identification, fits, comparison, checks, sensitivity.

    Parameters
    ----------
    study : Study
        From :func:`load_study`.
    fit : bool, default True
        Sample fits that have no saved copy. ``False`` only loads saved fits (for
        re-rendering a report) and raises if one is missing.
    progress : callable, optional
        Receives one line of text per step (default: printed on stderr); ``None`` is silent.
    quiet_sampler : bool
        Hide the sampler's progress bar.
    strict : bool
        Let unexpected (internal) exceptions of a step propagate instead of recording them
        as "failed" in the results (for debugging).
    workers : int, optional
        Overrides ``sampling.workers`` of the study file (0: one per CPU core; 1: sample in
        this process, which needs no ``if __name__ == "__main__":`` guard in a script).

    Returns
    -------
    StudyResults

    Raises
    ------
    DataError, SpecError
        The data or a prior override cannot be used (before anything is fitted).

    Notes
    -----
    Every finished fit is saved under ``<output>/fits`` with its content hash in the file
    name (see "Resuming" in the module notes) and reused by later runs while the hash is
    unchanged. Two or more candidates to sample are sampled side by side in worker
    processes (``sampling.workers``); each worker also makes its candidate's
    leave-future-out refit, which reuses the model compiled there. Steps whose module is not installed, or that fail, are recorded as "not run"
    with the reason instead of stopping the run; convergence problems are recorded per model.
    """
    import datetime

    say = progress or (lambda message: None)
    t0 = time.perf_counter()
    started = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    record: list[str] = []
    panel = study.panel(record=record)
    intake_s = time.perf_counter() - t0
    say(f"data: {panel.n_units} units, {panel.n_waves} waves, "
        f"{panel.patterns().n_patterns} missing-data pattern(s)")
    check_priors(study, panel)
    fits_dir = study.output / "fits"
    fits_dir.mkdir(parents=True, exist_ok=True)

    method = study.sampling["method"]
    fit_module = None
    if method == "bayes":
        fit_module, absent = optional_module("fit")
        samplers = getattr(fit_module, "SAMPLERS", None)
        if samplers and study.sampling["sampler"] not in samplers:
            raise SpecError(
                f"study file {study.source.name}: `sampling.sampler` must be one of "
                f"{', '.join(repr(x) for x in samplers)}; got {study.sampling['sampler']!r}"
                f"{_nearest(study.sampling['sampler'], samplers)}")
        if study.sampling["sampler"] == "nutpie" and not _installed("nutpie"):
            raise SpecError(
                f"study file {study.source.name}: `sampling.sampler = \"nutpie\"` needs the "
                "nutpie package, which is not installed; install it with `pip install nutpie` "
                "(or `pip install bayeslong[fast]`), or set `sampler = \"auto\"` to use "
                "PyMC's NUTS (slower for many draws)")
        if fit_module is None:
            method = "ml-fallback"
            say("NOTE: " + absent + "; falling back to MAXIMUM LIKELIHOOD ONLY "
                "(no posteriors, no LOO/WAIC, no predictive checks)")

    def tell(i):
        return lambda m: say(f"[{i}/{len(study.models)}] {m}")

    # candidates to sample run side by side in worker processes when there are several and
    # the machine has the cores (see `sampling.workers`); each worker also makes its
    # candidate's leave-future-out refit while the model is compiled there
    jobs, pool = {}, None
    to_sample = ({c.label for c in study.models if _needs_sampling(study, panel, c, fits_dir)}
                 if fit and fit_module is not None else set())
    workers = _worker_count(study.sampling["workers"] if workers is None else workers,
                            len(to_sample))
    models = []
    fitted = reused = 0
    t_fits = time.perf_counter()
    try:
        if workers > 1:
            pool = _pool(workers)
            future_kwargs = _future_kwargs(study, panel, fits_dir)
            for i, cand in enumerate(study.models, start=1):
                if cand.label in to_sample:
                    jobs[cand.label] = _submit(pool, study, panel, cand, fits_dir, future_kwargs,
                                               tell(i), workers)
        for i, cand in enumerate(study.models, start=1):
            result, did_fit = _run_candidate(study, panel, cand, fit_module, fits_dir, fit=fit,
                                             say=tell(i), quiet_sampler=quiet_sampler,
                                             strict=strict, job=jobs.get(cand.label))
            fitted += did_fit == "fitted"
            reused += did_fit == "reused"
            models.append(result)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    fits_s = time.perf_counter() - t_fits
    if reused:
        say(f"reused {reused} saved fit{'s' if reused != 1 else ''} (unchanged study, data "
            "and model)")
    scores = {m.label: m.forecast for m in models if m.forecast is not None}

    comparison, future = _compare(study, panel, models, method, say, strict, scores)
    models = [_check(study, panel, m, say, strict) for m in models]
    sensitivity = _sensitivity(study, panel, models, method, say, strict)
    stages = [("intake", intake_s, f"{panel.n_units} units, {panel.n_waves} waves")]
    if jobs:
        stages.append(("candidates (all)", fits_s,
                       f"{len(jobs)} sampled side by side in {workers} worker processes, with "
                       "their leave-future-out refits where needed; the rows below are each "
                       "fit's own time in its worker"))
    stages += [(f"{m.label}: identification and fit", m.seconds,
                ("in a worker process: " if m.label in jobs and m.fit is not None else "")
                + _fit_detail(m)) for m in models]
    stages += [("comparison", comparison.seconds, _comparison_detail(comparison, scores)),
               ("predictive checks", sum(m.check.seconds for m in models), ""),
               ("lag sensitivity", sensitivity.seconds, _sensitivity_detail(sensitivity))]
    return StudyResults(
        study=study, panel=panel, intake_warnings=tuple(record), models=tuple(models),
        comparison=comparison, future=future, sensitivity=sensitivity, method=method,
        fitted=fitted, reused=reused, versions=software_versions(),
        seconds=time.perf_counter() - t0, started=started, stages=tuple(stages))


def _timing_text(timing: dict) -> str:
    """``compile 12 s, sampling 3 s`` from a :attr:`Fit.timing` (empty when there is none)."""
    names = {"compile": "compile", "sample": "sampling", "loglik": "log-likelihood"}
    return ", ".join(f"{label} {timing[key]:.0f} s" for key, label in names.items()
                     if key in timing)


def _fit_detail(m: ModelResult) -> str:
    if m.fit is None:
        return "no posterior fit"
    if m.reused:
        return "reused the saved fit"
    return _timing_text(getattr(m.fit, "timing", {}) or {})


def _comparison_detail(step: Step, elsewhere=()) -> str:
    """The leave-future-out refits' times (``elsewhere``: those made by worker processes)."""
    table = _table_of(step.value) if step.ran else None
    timing = table.attrs.get("lfo_timing", {}) if table is not None else {}
    return "; ".join(f"leave-future-out refit of {name}"
                     + (" (in its worker process)" if name in elsewhere else "")
                     + f": {_timing_text(t)}" for name, t in timing.items() if t)


def _sensitivity_detail(step: Step) -> str:
    reused = tuple(getattr(step.value, "reused", ())) if step.ran else ()
    return f"read from the candidates' fits, not refitted: {', '.join(reused)}" if reused else ""


def _stem(study: Study, cand: Candidate) -> str:
    """File name stem of a candidate's saved results: its label and content hash."""
    return f"{_slug(cand.label)}-{study.fit_key(cand)}"


def _needs_sampling(study, panel, cand, fits_dir: Path) -> bool:
    """Whether a run would sample ``cand``: identified, and no saved fit."""
    ident = _identification(cand, panel, fits_dir / f"{_stem(study, cand)}.identify.json", [])
    if ident is not None and not ident.identified:
        return False
    return not (fits_dir / f"{_stem(study, cand)}.nc").exists()


def _worker_count(asked: int, n_jobs: int) -> int:
    """Worker processes for ``n_jobs`` candidate fits (1: sample here, one after another)."""
    from bayeslong.batch import default_workers

    if isinstance(asked, bool) or not isinstance(asked, int) or asked < 0:
        raise SpecError(f"`workers` must be a whole number >= 0 (0: one per CPU core); "
                        f"got {asked!r}")
    return max(1, min(asked or default_workers(), n_jobs))


def _pool(workers: int):
    from bayeslong.batch import _default_executor

    return _default_executor(workers)


def _future_kwargs(study, panel, fits_dir: Path) -> dict | None:
    """Settings of the workers' leave-future-out refits; None when none is needed.

    Not needed when the comparison does not ask for it, or when its result for these
    candidates (all fitted) is saved already.
    """
    if not study.comparison["future"] or study.sampling["method"] != "bayes":
        return None
    keys = {}
    for c in study.models:
        ident = _identification(c, panel, fits_dir / f"{_stem(study, c)}.identify.json", [])
        if ident is None or ident.identified:
            keys[c.label] = study.fit_key(c)
    if len(keys) < 2 or _step_path(study, "compare", _compare_parts(keys, True)).exists():
        return None
    return {**_fit_settings(study), "progressbar": False}


def _submit(pool, study, panel, cand, fits_dir, future_kwargs, say, workers):
    s = study.sampling
    say(f"{cand.label}: sampling {s['chains']} chains x {s['draws']} draws (+{s['tune']} "
        f"tuning) in one of {workers} worker processes")
    priors = _priors_for(study, cand.spec, panel) or None
    # in a worker the pool is the parallelism: the chains run one after another there
    kwargs = dict(_fit_settings(study), priors=priors, progressbar=False, cores=1)
    future = (None if future_kwargs is None
              else {**future_kwargs, "cores": 1, **({"priors": priors} if priors else {})})
    path = fits_dir / f"{_stem(study, cand)}.nc"
    return pool.submit(_sample_job, cand.spec, panel, kwargs, str(path), future)


def _sample_job(spec, panel, kwargs: dict, path: str, future_kwargs: dict | None) -> dict:
    """Sample one candidate and save it to ``path`` (in a worker process).

    With ``future_kwargs``, also make its leave-future-out score while its model is
    compiled in this process. Returns the fit's timing and the score (or why not).
    """
    from bayeslong.errors import ConvergenceWarning
    from bayeslong.fit import fit

    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # recorded from the saved fit
        result = fit(spec, panel, **kwargs)
    result.save(path)
    out = {"timing": dict(result.timing), "seconds": time.perf_counter() - t0, "forecast": None}
    if future_kwargs is not None:
        from bayeslong.compare import forecast_score

        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ConvergenceWarning)  # kept in score.problems
                out["forecast"] = forecast_score(spec, panel, **future_kwargs)
        except BayeslongError:
            pass  # the comparison meets the same error and says so
    return out


def _run_candidate(study, panel, cand, fit_module, fits_dir, *, fit, say, quiet_sampler,
                   strict, job=None):
    """Identify, ML-fit and (when asked) sample one candidate; return (result, what happened).

    ``job`` is the future of the candidate's sampling in a worker process (see
    :func:`_submit`), which is waited for instead of sampling here.
    """
    t0 = time.perf_counter()
    key = study.fit_key(cand)
    notes: list[str] = []
    stem = f"{_slug(cand.label)}-{key}"
    ident_path = fits_dir / f"{stem}.identify.json"
    if not fit and not ident_path.exists():
        raise SpecError(
            f"candidate {cand.label!r} has no saved results for the current study and data "
            f"(nothing for hash {key} in {fits_dir}); run `bayeslong run {study.source.name}` "
            "first")
    ident = _identification(cand, panel, ident_path, notes)
    if ident is not None and not ident.identified:
        notes.append("not identified on this panel (" + ", ".join(ident.deficient)
                     + "); not fitted. " + ident.advice)
        say(f"{cand.label}: NOT IDENTIFIED, skipped")
        return ModelResult(candidate=cand, key=key, identification=ident, notes=tuple(notes),
                           seconds=time.perf_counter() - t0), "skipped"

    ml, what = None, "none"
    if fit_module is None or study.checks["ml"]:
        ml, ml_reused = _ml(study, panel, cand, fits_dir / f"{stem}.ml.json", notes, say,
                            fit=fit)
        if fit_module is None and ml is not None:  # the ML fit is the run's fit
            what = "reused" if ml_reused else "fitted"
    bayes, problems, forecast = None, (), None
    if job is not None:  # sampled in a worker process, which saved the fit
        try:
            done = job.result()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # problems are recorded below, once
                bayes = dataclasses.replace(fit_module.load_fit(fits_dir / f"{stem}.nc"),
                                            timing=done["timing"])
            forecast = done["forecast"]
            what = "fitted"
            detail = _timing_text(done["timing"])
            say(f"{cand.label}: fitted in {done['seconds']:.0f} s in a worker process"
                + (f" ({detail})" if detail else ""))
        except BayeslongError as err:
            notes.append(f"Bayesian fit failed: {err}")
            say(f"{cand.label}: Bayesian fit failed: {err}")
        except Exception as err:  # an internal failure of one fit must not lose the others
            if strict:
                raise
            notes.append(f"Bayesian fit failed with an internal error ({type(err).__name__}: "
                         f"{err}); rerun with --debug for the traceback and report it")
            say(f"{cand.label}: Bayesian fit FAILED ({type(err).__name__}: {err})")
        if bayes is not None:
            problems = tuple(convergence_problems(bayes))
            if problems:
                say(f"{cand.label}: CONVERGENCE PROBLEMS: " + "; ".join(problems))
    elif fit_module is not None:
        path = fits_dir / f"{stem}.nc"
        if path.exists():
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")  # problems are recorded below, once
                    bayes = fit_module.load_fit(path)
                what = "reused"
                say(f"{cand.label}: reused the saved fit {path.name}")
            except Exception as err:  # a damaged or outdated file: refit rather than stop
                notes.append(f"the saved fit {path.name} could not be read ({err}); refitted")
        if bayes is None:
            if not fit:
                raise SpecError(
                    f"candidate {cand.label!r} has no saved fit for the current study and data "
                    f"(looked for {path.name} in {fits_dir}); run `bayeslong run "
                    f"{study.source.name}` first")
            s = study.sampling
            say(f"{cand.label}: sampling {s['chains']} chains x {s['draws']} draws "
                f"(+{s['tune']} tuning)")
            try:
                kwargs = dict(_fit_settings(study),
                              priors=_priors_for(study, cand.spec, panel) or None,
                              progressbar=not quiet_sampler)
                with warnings.catch_warnings():
                    # convergence problems are recorded (and shown) below, once
                    warnings.simplefilter("ignore", _convergence_warning())
                    bayes = fit_module.fit(cand.spec, panel, **kwargs)
                bayes.save(path)
                what = "fitted"
                detail = _timing_text(getattr(bayes, "timing", {}) or {})
                say(f"{cand.label}: fitted in {time.perf_counter() - t0:.0f} s"
                    + (f" ({detail})" if detail else ""))
            except BayeslongError as err:
                notes.append(f"Bayesian fit failed: {err}")
                say(f"{cand.label}: Bayesian fit failed: {err}")
            except Exception as err:  # an internal failure of one fit must not lose the others
                if strict:
                    raise
                notes.append(f"Bayesian fit failed with an internal error ({type(err).__name__}: "
                             f"{err}); rerun with --debug for the traceback and report it")
                say(f"{cand.label}: Bayesian fit FAILED ({type(err).__name__}: {err})")
        if bayes is not None:
            problems = tuple(convergence_problems(bayes))
            if problems:
                say(f"{cand.label}: CONVERGENCE PROBLEMS: " + "; ".join(problems))
    seconds = time.perf_counter() - t0
    if job is not None and bayes is not None:
        seconds = done["seconds"]  # the worker's time; this process only waited for it
    return ModelResult(candidate=cand, key=key, identification=ident, ml=ml, fit=bayes,
                       reused=what == "reused", notes=tuple(notes), problems=problems,
                       seconds=seconds, forecast=forecast), what


def _convergence_warning():
    from bayeslong.errors import ConvergenceWarning

    return ConvergenceWarning


def _identification(cand, panel, path: Path, notes: list):
    """Local identification of one candidate, saved as JSON and reused when present."""
    from bayeslong.identify import Identification, identify

    if path.exists():
        try:
            saved = json.loads(path.read_text())
            return Identification(**{**saved, "deficient": tuple(saved["deficient"])})
        except (ValueError, TypeError, KeyError):
            pass
    try:
        ident = identify(cand.spec, panel)
    except BayeslongError as err:
        notes.append(f"identification check failed: {err}")
        return None
    path.write_text(json.dumps(dataclasses.asdict(ident), indent=1))
    return ident


def _ml(study, panel, cand, path: Path, notes: list, say, *, fit: bool = True
        ) -> tuple[dict | None, bool]:
    """Maximum-likelihood fit of one candidate, saved as JSON and reused when present.

    Returns the result (None when it failed) and whether it was read from the saved file.
    """
    import pandas as pd

    from bayeslong.ml import fit_ml

    if path.exists():
        try:
            saved = json.loads(path.read_text())
            saved["table"] = pd.DataFrame(saved["table"]).set_index("parameter")
            notes.extend(saved.pop("notes", []))
            say(f"{cand.label}: reused the saved maximum-likelihood fit {path.name}")
            return saved, True
        except (ValueError, KeyError):
            pass
    if not fit:
        raise SpecError(
            f"candidate {cand.label!r} has no saved maximum-likelihood fit for the current study "
            f"and data (looked for {path.name} in {path.parent}); run `bayeslong run "
            f"{study.source.name}` first")
    say(f"{cand.label}: maximum likelihood")
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            res = fit_ml(cand.spec, panel, check=False)
    except BayeslongError as err:
        notes.append(f"maximum likelihood failed: {err}")
        return None, False
    found = [f"maximum likelihood: {w.message}" for w in caught]
    notes.extend(found)
    table = pd.DataFrame({"estimate": res.params, "se": res.se})
    table.index.name = "parameter"
    out = {"loglik": float(res.loglik), "aic": float(res.aic), "bic": float(res.bic),
           "n_params": int(res.n_params), "converged": bool(res.converged),
           "boundary": list(res.boundary)}
    path.write_text(json.dumps({**out, "notes": found, "table": json.loads(
        table.reset_index().to_json(orient="records"))}, indent=1))
    return {**out, "table": table}, False


def convergence_problems(bayes) -> list[str]:
    """Name each failed convergence criterion of a fit, from :meth:`Fit.diagnostics`.

    The criteria and thresholds are the fit module's (R-hat, bulk and tail ESS per
    parameter; divergences and E-BFMI per run); this only puts them in words.
    """
    table = bayes.diagnostics()
    out = [f"{name}: {flag}" for name, flag in table["flag"].items() if flag]
    n_div = int(table.attrs.get("divergences", 0) or 0)
    if n_div:
        out.append(f"{n_div} divergent transition{'s' if n_div != 1 else ''} after warm-up "
                   "(threshold 0: the sampler met geometry it could not follow; estimates may "
                   "be biased)")
    floor = table.attrs.get("thresholds", {}).get("ebfmi")
    low = [i for i, v in enumerate(table.attrs.get("ebfmi", [])) if floor is not None and v < floor]
    if low:
        out.append(f"E-BFMI below {floor} in chain(s) {', '.join(map(str, low))}")
    return out


def _ml_comparison(models) -> Step:
    """Rank ML fits by AIC (BIC beside it): the comparison available without posteriors."""
    import pandas as pd

    rows = {m.label: {"loglik": m.ml["loglik"], "n_params": m.ml["n_params"],
                      "aic": m.ml["aic"], "bic": m.ml["bic"]}
            for m in models if m.ml is not None}
    if len(rows) < 2:
        return Step.skipped("fewer than two candidates have a maximum-likelihood fit")
    table = pd.DataFrame.from_dict(rows, orient="index").sort_values("aic")
    table["d_aic"] = table["aic"] - table["aic"].min()
    table["d_bic"] = table["bic"] - table["bic"].min()
    table.index.name = "model"
    return Step(ran=True, value=table)


def _step_path(study: Study, name: str, parts: dict) -> Path:
    """Where :func:`_cached` saves the value of step ``name`` for ``parts``."""
    key = hashlib.sha256(json.dumps({"step": name, **parts, "version": package_version()},
                                    sort_keys=True, default=str).encode()).hexdigest()[:16]
    return study.output / "steps" / f"{name}-{key}.pkl"


def _compare_parts(keys: dict, future: bool) -> dict:
    """What the saved comparison depends on: the fits, and how leave-future-out refits."""
    # "lfo": the refits take each fit's priors and may hide wave T (compare.forecast_score)
    parts = {"fits": keys, "future": future}
    if future:
        parts["lfo"] = "fit priors, wave T hidden"
    return parts


def _cached(study: Study, name: str, parts: dict, compute: Callable[[], Any], say=None,
            message: str = "") -> Callable[[], Any]:
    """Wrap ``compute`` so its value is saved under ``<output>/steps`` and reused by content.

    ``parts`` must hold everything the value depends on (fit keys and settings);
    ``message`` is said before computing, or with "reused" when the saved value serves.
    """
    say = say or (lambda m: None)
    import pickle

    path = _step_path(study, name, parts)

    def run():
        if path.exists():
            try:
                with open(path, "rb") as fh:
                    value = pickle.load(fh)
                say(f"{message}: reused the saved result")
                return value
            except Exception:  # unreadable (other version): compute again
                pass
        say(message)
        value = compute()
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            with open(path, "wb") as fh:
                pickle.dump(value, fh)
        except Exception:  # not picklable: it is simply recomputed next time
            path.unlink(missing_ok=True)
        return value

    return run


def _timed(step: Callable[[], Any], what: str, say, strict: bool = False) -> Step:
    """Run one optional step; a failure becomes a 'not run' record with the reason."""
    t0 = time.perf_counter()
    try:
        value = step()
    except BayeslongError as err:
        say(f"{what}: not run: {err}")
        return Step(ran=False, reason=str(err), seconds=time.perf_counter() - t0)
    except Exception as err:  # an unexpected failure in one step must not lose the others
        if strict:
            raise
        say(f"{what}: FAILED ({type(err).__name__}: {err})")
        return Step(ran=False, reason=f"failed with {type(err).__name__}: {err}",
                    seconds=time.perf_counter() - t0)
    return Step(ran=True, value=value, seconds=time.perf_counter() - t0)


#: Columns of the comparison table that belong to leave-future-out.
_LFO_COLUMNS = ("elpd_lfo", "se_lfo", "lfo_diff", "lfo_dse")


def _compare(study, panel, models, method, say, strict=False,
             scores: dict | None = None) -> tuple[Step, Step]:
    """Compare the candidates by LOO/WAIC (and leave-future-out when asked).

    ``scores``: leave-future-out scores the workers made, by label (not refitted here).
    """
    want_future = study.comparison["future"]
    if method != "bayes":
        ml = _ml_comparison(models)
        reason = ("leave-future-out needs posterior fits, which this run "
                  + ("did not make (sampling.method = \"ml\")" if method == "ml"
                     else "could not make (no Bayesian fit module)"))
        return ml, (Step.skipped(reason) if want_future else Step.skipped("not requested"))
    fits = {m.label: m.fit for m in models if m.fit is not None}
    if len(fits) < 2:
        skipped = Step.skipped(f"needs two or more fitted candidates; {len(fits)} fitted")
        return skipped, (skipped if want_future else Step.skipped("not requested"))
    module, absent = optional_module("compare")
    if module is None:
        skipped = Step.skipped(absent)
        return skipped, (skipped if want_future else Step.skipped("not requested"))
    keys = {m.label: m.key for m in models if m.fit is not None}
    kwargs = {}
    if want_future:
        given = {k: v for k, v in (scores or {}).items() if k in fits}
        kwargs = {"future": True, "fit_kwargs": {**_fit_settings(study), "progressbar": False},
                  "future_scores": given}
        left = len(fits) - len(given)
        message = ("comparing candidates by PSIS-LOO, WAIC and leave-future-out ("
                   + (f"{left} refit{'s' if left != 1 else ''} on all but the last wave"
                      if left else "no refit")
                   + (f"; {len(given)} made by the worker processes" if given else "") + ")")
    else:
        message = "comparing candidates by PSIS-LOO and WAIC"
    comparison = _timed(_cached(study, "compare", _compare_parts(keys, want_future),
                                lambda: module.compare(fits, **kwargs), say, message),
                        "comparison", say, strict)
    future = Step.skipped("not requested (set `comparison.future = true`)")
    if want_future:
        table = comparison.value
        if comparison.ran and "elpd_lfo" in getattr(table, "columns", ()):
            future = Step(ran=True, value=table[[c for c in _LFO_COLUMNS if c in table.columns]])
        else:
            future = Step.skipped(comparison.reason or "the comparison gave no leave-future-out "
                                  "scores")
    return comparison, future


#: Units whose predictive trajectory bands the report shows.
N_TRAJECTORY_UNITS = 6


def _check(study, panel, m: ModelResult, say, strict=False) -> ModelResult:
    """Posterior predictive checks of one fitted candidate."""
    if not study.checks["ppc"]:
        return dataclasses.replace(m, check=Step.skipped("not requested (`checks.ppc = false`)"))
    if m.fit is None:
        return dataclasses.replace(m, check=Step.skipped("no posterior fit"))
    module, absent = optional_module("check")
    if module is None:
        return dataclasses.replace(m, check=Step.skipped(absent))
    draws, seed = study.checks["ppc_draws"], study.sampling["seed"]

    def compute():
        table = module.ppc(m.fit, draws=draws, seed=seed)
        units = list(m.fit.panel.units[:N_TRAJECTORY_UNITS])
        bands = module.trajectories(m.fit, units, draws=draws, seed=seed)
        return {"ppc": table, "trajectories": bands}

    step = _timed(_cached(study, "check", {"fit": m.key, "checks": study.checks}, compute,
                          say, f"{m.label}: posterior predictive checks"),
                  f"{m.label}: checks", say, strict)
    return dataclasses.replace(m, check=step)


def _sensitivity(study, panel, models, method, say, strict=False) -> Step:
    """Lag sensitivity along the axes the study turns on."""
    axes = [k for k, on in study.sensitivity.items() if on]
    if not axes:
        return Step.skipped("not requested (turn axes on in [sensitivity])")
    if method != "bayes":
        return Step.skipped("lag sensitivity needs posterior fits, which this run did not make")
    module, absent = optional_module("sensitivity")
    if module is None:
        return Step.skipped(absent)
    specs, seen = [], set()
    for m in models:
        spec = m.candidate.spec
        key = json.dumps(spec.to_dict(), sort_keys=True)
        if m.fit is not None and module.lag_parameter(spec, panel.outcomes) and key not in seen:
            seen.add(key)
            specs.append(spec)
    if not specs:
        return Step.skipped("no fitted candidate has a constant lag")
    message = ("lag sensitivity: " + ", ".join(axes) + " around "
               + ", ".join(str(spec) for spec in specs) + " with the study's priors "
               "(settings equal to a candidate's fit reuse it; the others are refitted)")
    on = study.sensitivity
    # the candidates' own sampling settings (as in _run_candidate), so that a setting equal
    # to a candidate is that candidate's fit and needs no refit
    fit_kwargs = {**_fit_settings(study), "progressbar": False}
    fits = [m.fit for m in models if m.fit is not None]
    keys = {m.label: m.key for m in models if m.fit is not None}
    return _timed(_cached(study, "sensitivity", {"fits": keys, "axes": axes,
                                                 "priors": "study", "kwargs": fit_kwargs},
                          lambda: module.lag_sensitivity(
                              panel, models=specs,
                              prior_grid=None if on["prior_grid"] else False,
                              variance_scales=None if on["prior_grid"] else False,
                              initial=on["initial"], specification=on["specification"],
                              power_scaling=on["power_scaling"], fit_kwargs=fit_kwargs,
                              priors=study.priors, fits=fits),
                          say, message),
                  "lag sensitivity", say, strict)


def _fit_settings(study: Study) -> dict:
    """Keyword arguments of :func:`bayeslong.fit` from ``[sampling]`` (without priors)."""
    s = study.sampling
    kwargs = {"draws": s["draws"], "tune": s["tune"], "chains": s["chains"], "seed": s["seed"]}
    if s["sampler"] != "auto":
        kwargs["sampler"] = s["sampler"]
    return kwargs
