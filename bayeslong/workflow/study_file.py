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
    A process measured by several indicators (items of a scale) is a latent variable
    named by its key. Long: a table from each process to its indicator columns, one
    column per indicator, ``outcomes = { sleep = ["rested", "fell_asleep", "woke_rarely"],
    stress = ["stress"] }`` (a process observed directly lists its own column). Wide: a
    table from the process to a table from each indicator to its columns in wave order,
    ``outcomes = { sleep = { rested = ["r1", "r2", "r3"], fell_asleep = ["f1", "f2",
    "f3"] } }``, with ``""`` at a wave where an indicator was not asked. An indicator
    measures one process; to let it load on another too, use the model option
    ``cross_loadings``.
``time_varying`` (default none)
    Time-varying covariates: a list of columns (long) or a table like ``outcomes`` (wide).
``time_invariant`` (list of text, default none)
    Time-invariant covariate columns.
``waves`` (list, wide layout only, default 1..T)
    Wave labels for the per-wave column lists.
``drop_incomplete_covariates`` (true/false, default false)
    Drop units with a missing covariate (with a warning naming them) instead of stopping.
``categorical`` (table, default none: every outcome is continuous)
    Binary and ordinal outcomes or indicators, as ``Panel.from_long(..., categorical=...)``
    takes them: ``categorical = { rested = "ordinal", woke = "binary" }`` reads the
    categories from integer codes in the data, ``categorical = { rested = ["never",
    "sometimes", "often"] }`` gives the labels in order. Each key names an observed
    variable (an outcome, or an indicator). Candidates are then fitted with person-level
    latents and thresholds (docs/model-family.md, "Categorical indicators").

``[[models]]`` (one table per candidate model; at least one, required)

``model`` (text, required)
    A catalog name (``bayeslong models`` lists them) or a path to a model TOML file of
    your own, in the catalog's format.
``label`` (text, default the model name, plus the options when two candidates share it)
    The name used in tables, plots and file names; labels must be unique.
``options`` (table, default the model's own)
    As in ``bayeslong.model(name, **options)``: ``initial``, ``lag``, ``residuals``,
    ``effects``, ``intercepts`` (text). Several processes: ``processes`` (a whole number,
    for a model written for several, e.g. ``clpm`` with three outcomes: ``processes = 3``),
    ``cross_lags`` (``"all"``, ``"none"``, or ``{ drop = ["stress<-sleep"] }``: the lag of
    stress on the previous wave's sleep left out), ``same_wave`` (``["sleep<-stress"]``:
    sleep regressed on stress at the same wave; ``"stress->sleep"`` says the same).
    Processes measured by several indicators: ``invariance`` (``"configural"``,
    ``"metric"``, ``"scalar"``, ``"strict"``, ``"approximate"`` with ``deviation_sd``, a
    number or ``{ loading = 0.05, intercept = 0.05 }``; Bayesian fits only), ``release``
    (indicator names, or
    ``{ intercept = ["fell_asleep"] }``), ``unique_covariance`` (``"same-indicator"``,
    ``"none"``), ``scale`` (``"marker"``, ``"effects"``), ``marker`` (an indicator name, or
    a list with one per process), ``cross_loadings`` (``{ woke_rarely = "stress" }``).
    docs/model-family.md describes each.

``[priors]`` (default: the documented weakly informative defaults)

``<parameter> = ["<family>", number, ...]``
    A prior override by parameter name, e.g. ``lag = ["normal", 0.3, 0.1]``. It applies to
    every candidate that has the parameter; a name no candidate has is an error.

``residual_pooling = 0.5`` or ``"off"``
    The scale tau of the default pooling of the residual log-SDs over waves (default
    0.35), or off, for every candidate with two or more free residual variances of one
    process (docs/priors.md, "Pooled residual variances").

``[sampling]``

``method`` (``"bayes"`` or ``"ml"``, default ``"bayes"``)
    ``bayes``: NUTS posterior sampling. ``ml``: maximum likelihood only, a quick look
    without posteriors, LOO or predictive checks.
``draws`` (whole number, default 1000), ``tune`` (default 1000), ``chains`` (default 4),
``seed`` (default 1)
    Posterior draws kept per chain, warm-up draws per chain, chains, and the random seed.
    A study with categorical variables (``[data] categorical``) has the draws
    :func:`bayeslong.fit` gives them by default (1000, as for continuous data).
``target_accept`` (number between 0 and 1, optional)
    The NUTS target acceptance rate. Left out, each fit uses its default: 0.8, with a
    careful re-run at 0.95 for continuous data; no re-run for categorical data. A value
    given here is used as it is, without a re-run.
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

With indicators and three processes (long layout, one column per indicator):

.. code-block:: toml

    [data]
    path = "diary.csv"
    unit = "person"
    wave = "week"
    outcomes = { sleep = ["rested", "fell_asleep", "woke_rarely"],
                 stress = ["tense", "worried", "rushed"], mood = ["mood"] }

    [[models]]
    model = "clpm"
    options = { processes = 3, same_wave = ["sleep<-stress"],
                cross_lags = { drop = ["stress<-mood"] },
                cross_loadings = { woke_rarely = "stress" }, invariance = "scalar" }

Resuming
--------
Each candidate's fit is identified by a content hash of the data settings, the bytes of the
data file, the sampling settings, the prior overrides, the model's full spec (catalog or
user file, after options) and the package version. Changing the title, the checks or
another candidate does not invalidate a saved fit; changing anything the fit depends on does.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import numbers
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bayeslong.data.validation import SOURCE
from bayeslong.errors import DataError, SpecError
from bayeslong.infer.pooling import POOLING_KEY, parse_tau
from bayeslong.workflow.study_data import DataSource, nearest_hint, read_data_table

__all__ = ["Study", "Candidate", "DataSource", "load_study"]

#: Default output folder (relative to the study file).
DEFAULT_OUTPUT = "bayeslong-output"

_TOP = ("title", "output", "data", "models", "priors", "sampling", "checks", "comparison",
        "sensitivity")
_MODEL = ("model", "label", "options")
#: ``target_accept`` None and, with categorical variables, ``draws`` left out are the fit's
#: own defaults (infer/categorical.py: CATEGORICAL_DRAWS, CATEGORICAL_TARGET_ACCEPT).
_SAMPLING = {"method": "bayes", "draws": 1000, "tune": 1000, "chains": 4, "seed": 1,
             "sampler": "auto", "workers": 1, "target_accept": None}
_CHECKS = {"ppc": True, "ppc_draws": 200, "ml": False}
_COMPARISON = {"future": False}
_SENSITIVITY = {"prior_grid": False, "initial": False, "specification": False,
                "power_scaling": False}
_METHODS = ("bayes", "ml")


# --------------------------------------------------------------------------------------------
# checking helpers (each raises a SpecError that names the key and the fix)
# --------------------------------------------------------------------------------------------


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
                self.fail(f"unknown key {place}{nearest_hint(key, valid)} "
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

    def acceptance(self, value: Any, where: str) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
            self.fail(f"`{where}` must be a number between 0 and 1, e.g. 0.9 (the NUTS "
                      f"target acceptance rate; leave it out for the fit's default); got "
                      f"{value!r}")
        return float(value)

    def choice(self, value: Any, choices, where: str) -> str:
        if value not in choices:
            self.fail(f"`{where}` must be one of {', '.join(repr(c) for c in choices)}; "
                      f"got {value!r}{nearest_hint(value, choices)}")
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
            if key == "target_accept":
                out[key] = self.acceptance(value, where)
            elif isinstance(default, bool):
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
        # messages name the file and its lines (the header is line 1), and give advice for
        # editing the file rather than pandas code (bayeslong.data.validation.SOURCE)
        first = 2 if path.suffix.lower() == ".csv" else 1
        df.index = pd.RangeIndex(first, first + len(df), name="line" if first == 2 else "row")
        df.attrs[SOURCE] = path.name
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
                    df, unit=d.unit, wave=d.wave, outcomes=d.outcome_argument(),
                    time_varying=list(d.time_varying), time_invariant=list(d.time_invariant),
                    drop_incomplete_covariates=d.drop_incomplete_covariates,
                    categorical=d.categorical)
            else:
                panel = Panel.from_wide(
                    df, unit=d.unit, outcomes=d.outcome_argument(),
                    time_varying={k: list(v) for k, v in d.time_varying.items()},
                    time_invariant=list(d.time_invariant),
                    waves=None if d.waves is None else list(d.waves),
                    drop_incomplete_covariates=d.drop_incomplete_covariates,
                    categorical=d.categorical)
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
            # a target acceptance left out is not written, so that keys made before the
            # setting existed still match
            "sampling": {k: v for k, v in self.sampling.items()
                         if not (k == "target_accept" and v is None)},
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
    try:
        check_folder(output, "output")
    except SpecError as err:
        r.fail(str(err))
    data = read_data_table(r, r.table(r.required(raw, "data", ""), "data"), base)
    models = _read_models(r, r.required(raw, "models", ""), base)
    priors = _read_priors(r, r.table(raw.get("priors", {}), "priors"))
    sampling = r.settings(raw, "sampling", _SAMPLING)
    r.choice(sampling["method"], _METHODS, "sampling.method")
    if data.categorical and "draws" not in raw.get("sampling", {}):
        from bayeslong.infer.categorical import CATEGORICAL_DRAWS

        sampling["draws"] = CATEGORICAL_DRAWS
    checks = r.settings(raw, "checks", _CHECKS)
    comparison = r.settings(raw, "comparison", _COMPARISON)
    sensitivity = r.settings(raw, "sensitivity", _SENSITIVITY)
    return Study(title=title, source=path.resolve(), output=output, data=data, models=models,
                 priors=priors, sampling=sampling, checks=checks, comparison=comparison,
                 sensitivity=sensitivity)


def _read_models(r: _Reader, raw: Any, base: Path) -> tuple[Candidate, ...]:
    from bayeslong.model.spec import MODEL_KEYWORDS, OPTION_VALUES, catalog, model

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
        r.keys(options, MODEL_KEYWORDS, f"{where}.options")
        for key, value in options.items():
            if key in OPTION_VALUES:
                r.text(value, f"{where}.options.{key}")
            elif key == "processes":
                r.whole(value, f"{where}.options.{key}", 2)
        if name.endswith(".toml"):
            file = (base / name).resolve()
            if not file.is_file():
                r.fail(f"`{where}.model` names the model file {name!r}, which does not exist "
                       f"(looked for {str(file)!r}; paths are relative to the study file)")
            target = str(file)
        else:
            if name not in catalog():
                r.fail(f"`{where}.model` is {name!r}, which is not in the catalog"
                       f"{nearest_hint(name, catalog())} (the catalog has: {', '.join(catalog())}; "
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
        if name == POOLING_KEY:  # a number (tau) or "off": every candidate it applies to
            try:
                tau = parse_tau(value)
            except SpecError as err:
                r.fail(f"`{where}`: {err}")
            priors[name] = (tau,) if tau is not None else ("off",)
            continue
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


def check_folder(folder: Path, key: str) -> None:
    """Refuse a folder path that is, or lies inside, an existing file (it could not be made)."""
    for place in (folder, *folder.parents):
        if place.exists():
            if not place.is_dir():
                inside = "" if place == folder else f" (inside {str(place)!r})"
                raise SpecError(f"`{key}` names {str(folder)!r}{inside}, but {str(place)!r} is "
                                "an existing file, not a folder; give a folder path (it is "
                                "created when missing)")
            return

