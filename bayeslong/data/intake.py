"""The intake core: long and wide data frames to the arrays of a panel.

Both layouts go through the same steps (:class:`_Intake`): the frame and the role names are
checked, the columns looked up, the unit ids checked; each layout then reshapes its columns
to the unit x wave grid in its own way (:func:`read_long`, :func:`read_wide`); and the same
finish orders the waves, warns about their spacing and labels, settles missing covariates
and returns the constructor arguments of :class:`~bayeslong.data.panel.Panel`. Every message
names the column, row (as a line of the data file when the frame was read from one), unit or
wave, and says how to fix it.
"""

from __future__ import annotations

import warnings
from collections.abc import Hashable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from bayeslong.data.categories import code_categories, read_categorical
from bayeslong.data.indicators import read_outcomes, read_wide_outcomes, settle_indicators
from bayeslong.data.validation import (
    check_columns,
    check_frame,
    check_no_missing_labels,
    check_roles,
    check_wave_count,
    name_tuple,
    numbered_text_order,
    numeric_column,
    settle_covariates,
    sorted_labels,
    warn_text_waves,
    warn_wave_spacing,
)
from bayeslong.errors import DataError
from bayeslong.wording import as_python, count_word, plural, show, show_list

# Warnings point at the user's call of Panel.from_long / from_wide: counted from a
# function of this module called by _Intake.finish, called by read_*, called by the
# constructor (see the stacklevel argument of warnings.warn).
_USER = 5


@dataclass(frozen=True)
class _Intake:
    """What both layouts share: the frame, the unit column and the variables by role."""

    df: pd.DataFrame
    unit: Hashable
    outcomes: tuple  # the observed variables' names (the indicators, when a process has several)
    varying: tuple
    invariant: tuple
    processes: tuple = ()
    indicators: dict | None = None  # process -> indicator names; None: each outcome is its own

    @classmethod
    def start(cls, df, unit, outcomes, varying, invariant, reserved: dict,
              indicators: dict | None = None) -> _Intake:
        """Check the frame and the role names (before any column is looked up)."""
        check_frame(df)
        processes = outcomes
        if indicators is not None:
            # an indicator named for two processes, or as a covariate, is named as such first
            settle_indicators(tuple(indicators), indicators, varying, invariant)
            processes = tuple(indicators)
            outcomes = tuple(n for group in indicators.values() for n in group)
        check_roles(outcomes, varying, invariant, reserved={unit: "unit", **reserved})
        return cls(df=df, unit=unit, outcomes=outcomes, varying=varying, invariant=invariant,
                   processes=processes, indicators=indicators)

    def outcome_role(self, column) -> str:
        """Where a message says an outcome column was named: ``outcomes['sleep']`` for an
        indicator of process sleep."""
        for process, group in (self.indicators or {}).items():
            if column in group:
                return f"outcomes[{process!r}]"
        return "outcomes"

    def columns(self, extra: list, outcome_cols, varying_cols) -> None:
        """Look every named column up (nearest name suggested), then check the unit ids."""
        check_columns(
            self.df,
            [(self.unit, "unit")] + extra
            + [(c, self.outcome_role(c)) for c in outcome_cols]
            + [(c, "time_varying") for c in varying_cols]
            + [(c, "time_invariant") for c in self.invariant],
        )
        check_no_missing_labels(self.df, self.unit, "unit id")

    def invariant_values(self) -> np.ndarray:
        """The time-invariant covariates as numbers, one row per data row."""
        return np.column_stack([numeric_column(self.df, c, "covariate") for c in self.invariant]
                               or [np.empty((len(self.df), 0))])

    def finish(self, units, waves, y, x, z, present, drop: bool, where: str,
               categories: dict | None = None) -> dict[str, Any]:
        """Check and warn about the waves, settle missing covariates, return Panel's arguments."""
        check_wave_count(waves)
        warn_wave_spacing(waves, where, stacklevel=_USER)
        units, y, x, z = settle_covariates(units, waves, y, x, z, self.varying, self.invariant,
                                           present, drop, stacklevel=_USER - 1)
        extra = {"categories": categories} if categories else {}
        return dict(units=tuple(units), waves=tuple(waves), outcomes=self.processes,
                    indicators=self.indicators, time_varying=self.varying,
                    time_invariant=self.invariant, y=y, x=x, z=z, **extra)


def read_long(df, *, unit, wave, outcomes, time_varying=(), time_invariant=(),
              drop_incomplete_covariates=False, categorical=None) -> dict[str, Any]:
    """Panel arguments from long data (one row per unit and wave); see Panel.from_long."""
    if unit == wave:
        raise DataError(
            f"`unit` and `wave` both name column {show(unit)}; give each its own column."
        )
    processes, indicators = read_outcomes(outcomes)
    it = _Intake.start(df, unit, processes,
                       name_tuple(time_varying, "time_varying"),
                       name_tuple(time_invariant, "time_invariant"), reserved={wave: "wave"},
                       indicators=indicators)
    outcomes_, varying, invariant = it.outcomes, it.varying, it.invariant
    it.columns([(wave, "wave")], outcomes_, varying)
    check_no_missing_labels(df, wave, "wave label")
    declared, categories = read_categorical(categorical, outcomes_), {}

    def outcome(c):  # a categorical column becomes category positions 0..C-1
        if c not in declared:
            return numeric_column(df, c, "outcome")
        where = [f"column {show(c)} row {show(r)}" for r in df.index]
        codes, categories[c] = code_categories(df[c].to_numpy(object), where, c, declared[c])
        return codes

    y_long = np.column_stack([outcome(c) for c in outcomes_])
    x_long = np.column_stack(
        [numeric_column(df, c, "covariate") for c in varying] or [np.empty((len(df), 0))]
    )
    z_long = it.invariant_values()

    repeated = df.duplicated([unit, wave], keep=False).to_numpy()
    if repeated.any():
        first = int(np.argmax(repeated))
        u0, w0 = df[unit].iloc[first], df[wave].iloc[first]
        same = repeated & (df[unit] == u0).to_numpy() & (df[wave] == w0).to_numpy()
        rows = list(df.index[same])
        n_pairs = len(df.loc[repeated, [unit, wave]].drop_duplicates())
        rest = (
            f" {n_pairs} (unit, wave) pairs have more than one row in all; "
            f"df.drop_duplicates([{show(unit)}, {show(wave)}]) keeps the first of each."
            if n_pairs > 1
            else ""
        )
        raise DataError(
            f"unit {show(u0)} has {count_word(len(rows))} rows for wave {show(w0)} "
            f"(rows {show_list(rows)}); keep one.{rest}"
        )

    waves = sorted_labels(df[wave].drop_duplicates().tolist(), "wave", wave)
    warn_text_waves(waves, wave, stacklevel=_USER - 1)
    numbered = numbered_text_order(waves)
    if numbered is not None:
        # 't10' before 't2' as text would put the waves out of time order, silently
        # reversing lags; the numbers in the labels are what a person means
        warnings.warn(
            f"the wave labels in column {show(wave)} are text with numbers in them; they are "
            f"ordered by those numbers ({show_list(numbered)}), not as text (where "
            f"{show(sorted(waves)[1])} would come second). Give the waves as numbers to make "
            "the order explicit.", UserWarning, stacklevel=_USER - 1)
        waves = numbered
    units = sorted_labels(df[unit].drop_duplicates().tolist(), "unit", unit)

    unit_pos = pd.Index(units).get_indexer(df[unit])
    wave_pos = pd.Index(waves).get_indexer(df[wave])
    n, t = len(units), len(waves)
    y = np.full((n, t, len(outcomes_)), np.nan)
    y[unit_pos, wave_pos] = y_long
    x = np.full((n, t, len(varying)), np.nan)
    x[unit_pos, wave_pos] = x_long
    present = np.zeros((n, t), dtype=bool)
    present[unit_pos, wave_pos] = True

    z = np.full((n, len(invariant)), np.nan)
    if invariant:
        frame = pd.DataFrame(z_long, columns=range(len(invariant)))
        frame["_unit_pos"] = unit_pos
        grouped = frame.groupby("_unit_pos", sort=True)
        n_distinct = grouped.nunique(dropna=True)
        for q, name in enumerate(invariant):
            varies = n_distinct[q].to_numpy() > 1
            if varies.any():
                i = int(n_distinct.index[np.argmax(varies)])
                values = np.unique(z_long[(unit_pos == i) & ~np.isnan(z_long[:, q]), q])
                n_vary = int(varies.sum())
                raise DataError(
                    f"time-invariant covariate {show(name)} varies within unit {show(units[i])} "
                    f"(values {show_list([float(v) for v in values], 5)}; {n_vary} "
                    f"{plural(n_vary, 'unit')} in all); move it to time_varying or fix the data."
                )
        firsts = grouped.first()  # first non-missing value of each unit
        z[firsts.index.to_numpy()] = firsts.to_numpy()

    return it.finish(units, waves, y, x, z, present, drop_incomplete_covariates,
                     f" in column {show(wave)}", categories)


def read_wide(df, *, unit, outcomes, time_varying=None, time_invariant=(), waves=None,
              drop_incomplete_covariates=False, categorical=None) -> dict[str, Any]:
    """Panel arguments from wide data (one row per unit); see Panel.from_wide."""
    if not isinstance(outcomes, Mapping):
        raise DataError(
            "`outcomes` of from_wide maps each outcome to its columns in wave order, e.g. "
            "outcomes={'y': ['y1', 'y2', 'y3']}; got " + type(outcomes).__name__ + "."
        )
    if time_varying is not None and not isinstance(time_varying, Mapping):
        raise DataError(
            "`time_varying` of from_wide maps each covariate to its columns in wave order, "
            "e.g. time_varying={'x': ['x1', 'x2', 'x3']}; got " + type(time_varying).__name__ + "."
        )
    varying_map = dict(time_varying or {})
    outcome_map, indicators = read_wide_outcomes(outcomes)
    if all(group == (name,) for name, group in indicators.items()):
        indicators = None  # every process observed directly: today's panel
    varying_map = {name: list(name_tuple(cols, f"time_varying[{name!r}]")) for name, cols in varying_map.items()}
    outcomes_ = tuple(outcome_map)
    varying = tuple(varying_map)
    it = _Intake.start(df, unit, outcomes_ if indicators is None else tuple(indicators), varying,
                       name_tuple(time_invariant, "time_invariant"), reserved={},
                       indicators=indicators)
    invariant = it.invariant

    per_wave = {**outcome_map, **varying_map}
    lengths = {name: len(cols) for name, cols in per_wave.items()}
    first_name = outcomes_[0]
    n_waves = lengths[first_name]
    for name, length in lengths.items():
        if length != n_waves:
            raise DataError(
                f"{show(name)} lists {length} {plural(length, 'column')} but "
                f"{show(first_name)} lists {n_waves}; give every outcome and time-varying "
                "covariate one column per wave, in the same wave order."
            )
    owner: dict[Hashable, str] = {unit: "the unit id"}
    for name in invariant:
        owner.setdefault(name, "time_invariant")
    for name, cols in per_wave.items():
        for col in cols:
            if col is None and name in outcome_map and indicators is not None:
                continue  # an indicator not measured at this wave
            if col in owner:
                raise DataError(
                    f"column {show(col)} is listed for {show(name)} and also for "
                    f"{owner[col]}; each column holds one variable at one wave."
                )
            owner[col] = show(name)
    it.columns([], [c for cols in outcome_map.values() for c in cols if c is not None],
               [c for cols in varying_map.values() for c in cols])
    repeated = df.duplicated([unit], keep=False).to_numpy()
    if repeated.any():
        first = int(np.argmax(repeated))
        u0 = df[unit].iloc[first]
        rows = list(df.index[repeated & (df[unit] == u0).to_numpy()])
        raise DataError(
            f"unit {show(u0)} appears in {count_word(len(rows))} rows (rows "
            f"{show_list(rows)}); wide data hold one row per unit: keep one."
        )

    if waves is None:
        labels = list(range(1, n_waves + 1))
    else:
        labels = [as_python(w) for w in name_tuple(waves, "waves")]
        if len(labels) != n_waves:
            raise DataError(
                f"`waves` gives {len(labels)} labels but each variable lists {n_waves} "
                "columns; give one label per column."
            )
        if len(set(labels)) != len(labels):
            raise DataError(f"`waves` repeats a label ({show_list(labels)}); labels must be unique.")
    sorted_labels(labels, "wave", None)  # raises a DataError when unorderable
    order = sorted(range(n_waves), key=lambda t: labels[t])
    labels = [labels[t] for t in order]

    def block(mapping: dict[str, list], role: str) -> np.ndarray:
        """Stack per-wave columns to (rows, T, variables) in wave order."""
        if not mapping:
            return np.empty((len(df), n_waves, 0))
        def column(col):
            if col is None:  # an indicator not measured at this wave: missing for everyone
                return np.full(len(df), np.nan)
            return numeric_column(df, col, role)

        return np.stack(
            [np.column_stack([column(cols[t]) for t in order]) for cols in mapping.values()],
            axis=2,
        )

    declared, categories = read_categorical(categorical, outcomes_), {}
    y = block({n: c for n, c in outcome_map.items() if n not in declared}, "outcome")
    for k, name in enumerate(outcome_map):  # a categorical variable: its waves coded together
        if name in declared:
            cols = [outcome_map[name][t] for t in order]
            raw = np.concatenate([np.full(len(df), None, object) if c is None
                                  else df[c].to_numpy(object) for c in cols])
            where = [f"column {show(c)} row {show(r)}" for c in cols for r in df.index]
            codes, categories[name] = code_categories(raw, where, name, declared[name])
            y = np.insert(y, k, codes.reshape(len(cols), len(df)).T, axis=2)
    x = block(varying_map, "covariate")
    z = it.invariant_values()
    ids = df[unit].tolist()
    units = sorted_labels(ids, "unit", unit)
    rows = pd.Index(ids).get_indexer(units)
    return it.finish(units, labels, y[rows], x[rows], z[rows], None, drop_incomplete_covariates,
                     " given in `waves`", categories)
