"""The ``[data]`` table of a study file: where the panel is and how to read it.

The schema is documented in :mod:`bayeslong.workflow.study_file` (the study file's one
description); this module holds :class:`DataSource` and the reader of that table.
``outcomes`` takes the forms :meth:`bayeslong.Panel.from_long` and
:meth:`bayeslong.Panel.from_wide` accept: a list of outcome columns, or, for processes
measured by several indicators, a table from each process to its indicator columns (long)
or to a table from each indicator to its columns in wave order (wide). ``""`` in a wide
indicator's list marks a wave at which the indicator was not asked (missing there).
``categorical`` declares binary and ordinal outcomes or indicators as
:meth:`bayeslong.Panel.from_long` takes them (data/categories.py): a table from each
observed variable to ``"ordinal"``, ``"binary"`` or its category labels in order.
"""

from __future__ import annotations

import dataclasses
import difflib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from bayeslong.data.categories import KINDS
from bayeslong.errors import DataError

#: Keys of the ``[data]`` table.
DATA_KEYS = ("path", "layout", "unit", "wave", "outcomes", "time_varying", "time_invariant",
             "waves", "drop_incomplete_covariates", "categorical")
LAYOUTS = ("long", "wide")
DATA_SUFFIXES = (".csv", ".parquet")


def nearest_hint(word: str, choices) -> str:
    """``; did you mean 'x'?`` for the closest of ``choices``, or nothing."""
    close = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=0.5)
    return f"; did you mean '{close[0]}'?" if close else ""


def _plain(value: Any) -> Any:
    """Tuples and mappings of them as lists and dicts (JSON and TOML safe)."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (tuple, list)):
        return [_plain(v) for v in value]
    return value


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
    categorical: dict | None = None

    @property
    def has_indicators(self) -> bool:
        """True when some process is measured by several indicators (a nested ``outcomes``)."""
        if not isinstance(self.outcomes, dict):
            return False
        return any(isinstance(v, dict) for v in self.outcomes.values()) or self.layout == "long"

    def settings(self) -> dict:
        """Plain-data form without the absolute path (used in the content hash and report)."""
        d = dataclasses.asdict(self)
        d["path"] = self.path.name
        d["outcomes"] = _plain(self.outcomes)
        d["time_varying"] = _plain(self.time_varying)
        d["time_invariant"] = list(self.time_invariant)
        d["waves"] = None if self.waves is None else list(self.waves)
        if self.categorical:
            d["categorical"] = _plain(self.categorical)
        else:  # absent, so the content hashes of continuous studies stay as they were
            del d["categorical"]
        return d

    def observed_names(self) -> list[str]:
        """The observed variables (outcomes, or indicators) by the names the panel gives them."""
        if isinstance(self.outcomes, dict):
            if self.layout == "long":
                return [c for v in self.outcomes.values() for c in v]
            return [item for k, v in self.outcomes.items()
                    for item in (v if isinstance(v, dict) else (k,))]
        return list(self.outcomes)

    def columns(self) -> list[tuple[str, str]]:
        """Every column the study names, with the key that names it."""
        cols = [(self.unit, "data.unit")]
        if self.layout == "long":
            cols.append((self.wave, "data.wave"))
            if isinstance(self.outcomes, dict):
                cols += [(c, f"data.outcomes.{k}") for k, v in self.outcomes.items() for c in v]
            else:
                cols += [(c, "data.outcomes") for c in self.outcomes]
            cols += [(c, "data.time_varying") for c in self.time_varying]
        else:
            for k, v in self.outcomes.items():
                if isinstance(v, dict):
                    cols += [(c, f"data.outcomes.{k}.{j}") for j, w in v.items() for c in w if c]
                else:
                    cols += [(c, f"data.outcomes.{k}") for c in v]
            cols += [(c, f"data.time_varying.{k}") for k, v in self.time_varying.items() for c in v]
        cols += [(c, "data.time_invariant") for c in self.time_invariant]
        return cols

    def outcome_argument(self) -> Any:
        """``outcomes`` as :meth:`Panel.from_long` or :meth:`Panel.from_wide` takes it."""
        if self.layout == "long":
            if isinstance(self.outcomes, dict):
                return {k: list(v) for k, v in self.outcomes.items()}
            return list(self.outcomes)
        return {k: ({j: [c or None for c in w] for j, w in v.items()} if isinstance(v, dict)
                    else list(v)) for k, v in self.outcomes.items()}


def read_data_table(r, raw: dict, base: Path) -> DataSource:
    """Check the ``[data]`` table with the study file's reader ``r`` (messages name the key)."""
    r.keys(raw, DATA_KEYS, "data")
    rel = r.text(r.required(raw, "path", "data"), "data.path")
    path = (base / rel).resolve()
    if path.suffix.lower() not in DATA_SUFFIXES:
        r.fail(f"`data.path` must name a .csv or .parquet file; got {rel!r}", DataError)
    if not path.is_file():
        r.fail(f"the data file {rel!r} (`data.path`) does not exist; looked for {str(path)!r}. "
               "Paths are relative to the study file's folder.", DataError)
    layout = r.choice(raw.get("layout", "long"), LAYOUTS, "data.layout")
    unit = r.text(r.required(raw, "unit", "data"), "data.unit")
    invariant = r.texts(raw.get("time_invariant", []), "data.time_invariant")
    drop = r.flag(raw.get("drop_incomplete_covariates", False), "data.drop_incomplete_covariates")
    if layout == "long":
        if "waves" in raw:
            r.fail("`data.waves` is for the wide layout only; in the long layout the wave "
                   "labels come from the `data.wave` column: remove `data.waves`")
        wave = r.text(r.required(raw, "wave", "data"), "data.wave")
        given = r.required(raw, "outcomes", "data")
        if isinstance(given, dict):  # process -> its indicator columns
            outcomes = {name: r.texts(cols, f"data.outcomes.{name}")
                        for name, cols in given.items()}
            for name, cols in outcomes.items():
                if not cols:
                    r.fail(f"`data.outcomes.{name}` lists no indicator columns; name at least "
                           f'one, e.g. outcomes = {{ {name} = ["item1", "item2", "item3"] }}')
        else:
            outcomes = r.texts(given, "data.outcomes")
        varying = r.texts(raw.get("time_varying", []), "data.time_varying")
        waves = None
    else:
        if "wave" in raw:
            r.fail("`data.wave` is for the long layout only; in the wide layout give the "
                   "columns per wave in `data.outcomes` (and optional labels in `data.waves`)")
        wave = None

        def per_wave(value, where, nested=False):
            value = r.table(value, where)
            out = {}
            for name, cols in value.items():
                if nested and isinstance(cols, dict):  # a process measured by indicators
                    if not cols:
                        r.fail(f"`{where}.{name}` lists no indicators; map each to its columns "
                               f'in wave order, e.g. {name} = {{ item1 = ["a1", "a2", "a3"] }}')
                    out[name] = {item: _wave_texts(r, c, f"{where}.{name}.{item}")
                                 for item, c in cols.items()}
                else:
                    out[name] = r.texts(cols, f"{where}.{name}")
            return out

        outcomes = per_wave(r.required(raw, "outcomes", "data"), "data.outcomes", nested=True)
        varying = per_wave(raw.get("time_varying", {}), "data.time_varying")
        waves = raw.get("waves")
        if waves is not None:
            if not isinstance(waves, list):
                r.fail(f"`data.waves` must be a list of wave labels; got {waves!r}")
            waves = tuple(waves)
    if not outcomes:
        r.fail("`data.outcomes` is empty; name at least one outcome column")
    source = DataSource(path=path, layout=layout, unit=unit, wave=wave, outcomes=outcomes,
                        time_varying=varying, time_invariant=invariant, waves=waves,
                        drop_incomplete_covariates=drop)
    if "categorical" in raw:
        source = dataclasses.replace(source, categorical=_read_categorical(
            r, raw["categorical"], source.observed_names()))
    return source


def _read_categorical(r, value: Any, observed: list[str]) -> dict:
    """``data.categorical``: observed variable -> "ordinal", "binary" or its labels in order."""
    example = 'categorical = { rested = "ordinal", woke = "binary" }'
    if not isinstance(value, dict):
        r.fail(f"`data.categorical` must be a table from each categorical outcome or indicator "
               f"to \"ordinal\", \"binary\" or its labels in order, e.g. {example}; got {value!r}")
    out = {}
    for name, kind in value.items():
        where = f"data.categorical.{name}"
        if name not in observed:
            r.fail(f"`{where}` names {name!r}, which is not an outcome or indicator of "
                   f"`data.outcomes`{nearest_hint(name, observed)} (they are "
                   f"{', '.join(observed)}); name the observed variables that hold categories",
                   DataError)
        if isinstance(kind, str):
            if kind not in KINDS:
                r.fail(f"`{where}` is {kind!r}; give \"ordinal\", \"binary\" or the category "
                       f"labels in order, e.g. [\"never\", \"sometimes\", \"often\"]"
                       f"{nearest_hint(kind, KINDS)}")
            out[name] = kind
        elif isinstance(kind, list) and all(isinstance(v, (str, int)) and not isinstance(v, bool)
                                            for v in kind):
            if len(kind) < 2 or len(set(kind)) != len(kind):
                r.fail(f"`{where}` must list at least two different categories, lowest first; "
                       f"got {kind!r}")
            out[name] = tuple(kind)
        else:
            r.fail(f"`{where}` must be \"ordinal\", \"binary\" or a list of category labels "
                   f"(text or whole numbers) in order; got {kind!r}")
    return out


def _wave_texts(r, value: Any, where: str) -> tuple[str, ...]:
    """One indicator's columns in wave order; ``""`` where it was not asked."""
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value) \
            or not any(value):
        r.fail(f"`{where}` must list the indicator's column at each wave, e.g. "
               f'["r1", "r2", "r3"] ("" where it was not asked); got {value!r}')
    return tuple(value)
