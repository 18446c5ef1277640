"""Checks shared by every way data enter a panel: names, roles, columns, values, waves.

Each check raises a :class:`~bayeslong.errors.DataError` that names the column, row, unit
or wave and says how to fix it (or warns, for what is allowed but worth knowing). The
intake core (:mod:`bayeslong.data.intake`) and the :class:`~bayeslong.data.panel.Panel`
constructor call them.
"""

from __future__ import annotations

import difflib
import numbers
import re
import warnings
from collections.abc import Hashable, Iterable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from bayeslong.errors import DataError
from bayeslong.wording import as_python, plural, show, show_list

#: Fewest waves a panel may have: growth and lag terms are not identified with fewer.
MIN_WAVES = 3


def name_tuple(arg: Any, role: str) -> tuple:
    """Normalise a column-name argument (a name or a sequence of names) to a tuple."""
    if arg is None:
        return ()
    if isinstance(arg, str):
        return (arg,)
    if isinstance(arg, Mapping):
        raise DataError(
            f"`{role}` must be a list of column names; got a mapping. "
            "Mappings of names to per-wave columns belong to Panel.from_wide."
        )
    try:
        names = tuple(arg)
    except TypeError:
        return (arg,)
    for name in names:
        if not isinstance(name, Hashable):
            raise DataError(f"`{role}` must hold column names; got {name!r}.")
    return names


def check_roles(
    outcomes: tuple, time_varying: tuple, time_invariant: tuple, reserved: Mapping[Hashable, str]
) -> None:
    """Reject empty outcomes, repeated names and a name used in two roles."""
    if not outcomes:
        raise DataError("`outcomes` is empty; name at least one outcome column, e.g. outcomes=['y'].")
    roles = {"outcomes": outcomes, "time_varying": time_varying, "time_invariant": time_invariant}
    for role, names in roles.items():
        seen = set()
        for name in names:
            if name in seen:
                raise DataError(f"{show(name)} is listed twice in `{role}`; list it once.")
            seen.add(name)
    for name in time_varying:
        if name in time_invariant:
            raise DataError(
                f"covariate {show(name)} is listed both in time_varying and time_invariant; "
                "keep it in one of them (time_varying if it can change from wave to wave)."
            )
    for name in outcomes:
        for role in ("time_varying", "time_invariant"):
            if name in roles[role]:
                raise DataError(
                    f"outcome {show(name)} is also listed in {role}; an outcome cannot be its own "
                    f"covariate: remove it from {role} (dependence on its past is the model's lag)."
                )
    for name, what in reserved.items():
        for role, names in roles.items():
            if name in names:
                raise DataError(
                    f"{show(name)} is the {what} column and is also listed in `{role}`; "
                    f"remove it from `{role}`."
                )


#: ``df.attrs`` key naming the file a frame was read from (set by the study file's reader):
#: messages then name the file and its lines, and give advice for editing a file rather
#: than pandas code.
SOURCE = "bayeslong_source"


def source_of(df: pd.DataFrame) -> str | None:
    """The name of the file ``df`` was read from, if a bayeslong reader read it."""
    return df.attrs.get(SOURCE)


def row_name(df: pd.DataFrame, label: Any) -> str:
    """How a message names a row: ``line 7 of data.csv`` for a file, ``row 5`` for a frame."""
    if source_of(df) and df.index.name == "line":
        return f"line {show(label)} of {source_of(df)}"
    return f"row {show(label)}"


def advice(df: pd.DataFrame, pandas_code: str, in_file: str) -> str:
    """The fix, as pandas code for a frame or as an edit for a file the study file named."""
    return in_file if source_of(df) else pandas_code


def check_frame(df: Any) -> None:
    """Reject anything but a non-empty DataFrame."""
    if not isinstance(df, pd.DataFrame):
        raise DataError(
            f"the data must be a pandas DataFrame; got {type(df).__name__}. "
            "Wrap it with pd.DataFrame(...) first."
        )
    if len(df) == 0:
        if source_of(df):
            raise DataError(
                f"the data file {source_of(df)} has a header ({show_list(df.columns)}) but no "
                "rows; put the panel's rows in it, one per unit and wave (long) or per unit "
                "(wide), or point `data.path` at the right file."
            )
        raise DataError(
            f"the data frame is empty (0 rows, columns: {show_list(df.columns)}); "
            "pass a data frame that holds the panel."
        )


def check_columns(df: pd.DataFrame, wanted: Iterable[tuple[Hashable, str]]) -> None:
    """Make sure every wanted column exists once; suggest the nearest name when it does not."""
    columns = list(df.columns)
    counts = pd.Index(columns).value_counts()
    for name, role in wanted:
        if name not in df.columns:
            close = difflib.get_close_matches(str(name), [str(c) for c in columns], n=1)
            if close:
                match = next(c for c in columns if str(c) == close[0])
                hint = f"did you mean {show(match)}?"
            else:
                hint = f"the columns are {show_list(columns)}."
            raise DataError(
                f"column {show(name)} is not in the data; {hint} (It is named in `{role}`.)"
            )
        if counts[name] > 1:
            raise DataError(
                f"column {show(name)} appears {counts[name]} times in the data; "
                "rename or drop the copies so that each name is used once."
            )


def check_no_missing_labels(df: pd.DataFrame, column: Hashable, what: str) -> None:
    """Reject missing unit ids or wave labels (they cannot be placed in the panel)."""
    missing = df[column].isna().to_numpy()
    if missing.any():
        rows = df.index[missing]
        raise DataError(
            f"column {show(column)} {row_name(df, rows[0])} is missing; every row needs a {what} "
            f"({int(missing.sum())} {plural(int(missing.sum()), 'row lacks', 'rows lack')} one). "
            + advice(df, f"Fill it in or drop those rows, e.g. df.dropna(subset=[{show(column)}]).",
                     "Fill it in or delete those rows from the file.")
        )


def is_text_number(value: Any) -> bool:
    """Tell whether a string spells a number (``'3.5'``), which is still text, not a number."""
    try:
        float(value)
    except (TypeError, ValueError):
        return False
    return True


def numeric_column(df: pd.DataFrame, column: Hashable, role: str) -> np.ndarray:
    """Return a column as float64 with NaN for missing, or raise naming the first bad entry."""
    series = df[column]
    dtype = series.dtype
    if pd.api.types.is_bool_dtype(dtype) or (
        pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype)
    ):
        values = series.to_numpy(dtype=float, na_value=np.nan)
    else:
        raw = series.to_numpy(dtype=object)
        missing = series.isna().to_numpy()
        is_real = np.array([isinstance(v, (numbers.Real, np.bool_)) for v in raw], dtype=bool)
        as_text = np.array([isinstance(v, str) and is_text_number(v) for v in raw], dtype=bool)
        bad = ~(missing | is_real | as_text)
        if bad.any():
            first = int(np.argmax(bad))
            n_bad = int(bad.sum())
            raise DataError(
                f"column {show(column)} {row_name(df, df.index[first])} holds {raw[first]!r}, not a number "
                f"({n_bad} {plural(n_bad, 'entry', 'entries')} of this {role} column "
                f"{'is' if n_bad == 1 else 'are'} not numbers). "
                + advice(df, "Fix those entries, or turn them into missing values with "
                         f"df[{show(column)}] = pd.to_numeric(df[{show(column)}], errors='coerce').",
                         "Fix those entries in the file, or leave them empty to mark them missing.")
            )
        if as_text.any():
            first = int(np.argmax(as_text))
            raise DataError(
                f"column {show(column)} stores numbers as text (dtype {dtype}); "
                f"{row_name(df, df.index[first])} holds {raw[first]!r}. "
                + advice(df, f"Convert it with df[{show(column)}] = pd.to_numeric(df[{show(column)}]).",
                         "Remove the quotes or other characters around the numbers in the file.")
            )
        values = np.array(
            [np.nan if m else float(v) for v, m in zip(raw, missing, strict=True)], dtype=float
        )
    infinite = np.isinf(values)
    if infinite.any():
        first = int(np.argmax(infinite))
        n_inf = int(infinite.sum())
        fix = (
            "replace it with NaN to treat it as a missing outcome, or fix the entry"
            if role == "outcome"
            else "fix the entry (covariates cannot be missing or infinite)"
        )
        raise DataError(
            f"column {show(column)} {row_name(df, df.index[first])} holds {values[first]}; infinite "
            f"values cannot be used ({n_inf} in this column): {fix}."
        )
    return values


def sorted_labels(values: Sequence[Any], what: str, column: Hashable | None) -> list:
    """Sort unique labels ascending, or raise when they cannot be ordered."""
    where = f" in column {show(column)}" if column is not None else ""
    try:
        return sorted(values)
    except TypeError as err:
        kinds = sorted({type(v).__name__ for v in values})
        raise DataError(
            f"the {what} labels{where} cannot be ordered (they mix {' and '.join(kinds)}: "
            f"{show_list(values, 5)}); make them all numbers or all strings."
        ) from err


def check_wave_count(waves: Sequence[Any]) -> None:
    """Reject panels with fewer than :data:`MIN_WAVES` waves."""
    if len(waves) < MIN_WAVES:
        found = f" ({', '.join(show(w) for w in waves)})" if waves else ""
        raise DataError(
            f"a panel needs at least {MIN_WAVES} waves; found {len(waves)}{found}. "
            "Growth and lag models are not identified with fewer; add waves or use a "
            "cross-sectional tool."
        )


def warn_wave_spacing(waves: Sequence[Any], where: str, stacklevel: int) -> None:
    """Warn when numeric or date wave labels are unequally spaced (positions 1..T assume equal steps)."""
    values = [as_python(w) for w in waves]
    if all(isinstance(v, numbers.Real) and not isinstance(v, bool) for v in values):
        steps = np.diff(np.asarray(values, dtype=float))
        unequal = not np.allclose(steps, steps[0], rtol=1e-9, atol=0.0)
    elif all(isinstance(v, pd.Timestamp) for v in values):
        steps = np.diff(np.asarray([v.value for v in values], dtype=np.int64))
        unequal = bool(np.any(steps != steps[0]))
    else:
        return
    if unequal:
        warnings.warn(
            f"the wave labels{where} are unequally spaced ({show_list(values)}); bayeslong treats "
            f"waves as equally spaced positions 1..{len(values)}. If the gaps matter, give the "
            "missing waves rows with missing outcomes so the spacing is equal.",
            UserWarning,
            stacklevel=stacklevel,
        )


_NUMBER_IN_TEXT = re.compile(r"(\d+(?:\.\d+)?)")


def _number_key(label: str):
    """``'t10'`` -> ``('t', 10.0, '')``: text parts and numbers, for ordering numbered labels."""
    parts = _NUMBER_IN_TEXT.split(label)
    return tuple(float(p) if i % 2 else p for i, p in enumerate(parts))


def numbered_text_order(labels: Sequence[Any]) -> list | None:
    """Labels like ``t1 .. t10`` (text with a number, same text around it) in number order.

    None when the labels are not all such text, or when the text order is already the
    number order. Pure numbers stored as text are left to :func:`warn_text_waves`.
    """
    if not labels or not all(isinstance(w, str) and not is_text_number(w)
                             and _NUMBER_IN_TEXT.search(w) for w in labels):
        return None
    keys = [_number_key(w) for w in labels]
    shapes = {tuple(p for i, p in enumerate(k) if i % 2 == 0) for k in keys}
    if len(shapes) != 1:
        return None
    ordered = [w for _, w in sorted(zip(keys, labels, strict=True))]
    return None if ordered == sorted(labels) else ordered


def warn_text_waves(waves: Sequence[Any], column: Hashable, stacklevel: int) -> None:
    """Warn when text wave labels that spell numbers sort differently as text and as numbers."""
    if not all(isinstance(w, str) and is_text_number(w) for w in waves):
        return
    if sorted(waves, key=float) != list(waves):
        warnings.warn(
            f"the wave labels in column {show(column)} are text and are sorted as text "
            f"({show_list(waves)}); convert them with df[{show(column)}] = "
            f"pd.to_numeric(df[{show(column)}]) to order them as numbers.",
            UserWarning,
            stacklevel=stacklevel,
        )


def settle_covariates(
    units: list,
    waves: list,
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    time_varying: tuple,
    time_invariant: tuple,
    present: np.ndarray | None,
    drop: bool,
    stacklevel: int,
) -> tuple[list, np.ndarray, np.ndarray, np.ndarray]:
    """Raise on missing covariates, or drop the units that have them and warn naming them.

    ``present`` (N, T) marks which unit-waves had a row in long data, so a gap can be
    explained as "no row for that wave". ``stacklevel`` is counted from this function.
    """
    x_missing = np.isnan(x).any(axis=(1, 2)) if x.size else np.zeros(len(units), dtype=bool)
    z_missing = np.isnan(z).any(axis=1) if z.size else np.zeros(len(units), dtype=bool)
    incomplete = x_missing | z_missing
    if not incomplete.any():
        return units, y, x, z
    n_bad = int(incomplete.sum())
    bad_ids = [units[i] for i in np.flatnonzero(incomplete)]
    if not drop:
        first = int(np.argmax(incomplete))
        if x_missing[first]:
            t, p = (int(a[0]) for a in np.nonzero(np.isnan(x[first])))
            why = " (no row for that wave)" if present is not None and not present[first, t] else ""
            what = (
                f"time-varying covariate {show(time_varying[p])} is missing for unit "
                f"{show(units[first])} at wave {show(waves[t])}{why}"
            )
        else:
            q = int(np.argmax(np.isnan(z[first])))
            what = (
                f"time-invariant covariate {show(time_invariant[q])} is missing for unit "
                f"{show(units[first])}"
            )
        raise DataError(
            f"{what}; covariates are conditioned on and cannot be missing "
            f"({n_bad} {plural(n_bad, 'unit')} with missing covariate values: "
            f"{show_list(bad_ids)}). Fill in the missing values, or pass drop_incomplete_covariates=True "
            f"to drop {'that unit' if n_bad == 1 else 'those units'}."
        )
    keep = ~incomplete
    if not keep.any():
        raise DataError(
            "every unit has a missing covariate value, so drop_incomplete_covariates=True would "
            "leave no data; fill in the covariates or leave out the incomplete ones."
        )
    warnings.warn(
        f"dropped {n_bad} {plural(n_bad, 'unit')} with missing covariate values "
        f"(drop_incomplete_covariates=True): {show_list(bad_ids, limit=50)}.",
        UserWarning,
        stacklevel=stacklevel + 1,
    )
    return [u for u, k in zip(units, keep, strict=True) if k], y[keep], x[keep], z[keep]


def readonly(values: Any, ndim: int, name: str) -> np.ndarray:
    """Copy to a read-only float64 array of the given rank."""
    try:
        array = np.array(values, dtype=float, copy=True)
    except (TypeError, ValueError) as err:
        raise DataError(f"`{name}` must be a numeric array; {err}.") from err
    if array.ndim != ndim:
        raise DataError(f"`{name}` must be a {ndim}-dimensional array; got shape {array.shape}.")
    array.setflags(write=False)
    return array


def arrays_equal(a: np.ndarray, b: np.ndarray) -> bool:
    """Compare two arrays, shapes included, treating NaN as equal to NaN."""
    return a.shape == b.shape and bool(np.array_equal(a, b, equal_nan=a.dtype.kind == "f"))


#: Largest magnitude a value may have: the engine works on cross-products of the data
#: (sums of squares over units), which overflow double precision (about 1.8e308) well
#: before the values themselves do.
MAX_MAGNITUDE = 1e100

#: Outside this range of SDs the estimates lose precision in double arithmetic
#: (common practice: put variables on a scale near 1 before optimising).
SCALE_RANGE = (1e-6, 1e6)


def check_magnitudes(y, x, z, outcomes, time_varying, time_invariant, labels=None) -> None:
    """Refuse values whose squares overflow; warn about scales far from 1.

    The likelihood uses sums of squares and cross-products of the data, so a value of
    1e160 overflows to infinity and the fit ends in NaN; such data must be rescaled first.
    ``labels`` names y's variables in messages (``indicator 'rested' of outcome 'sleep'``);
    by default ``outcome 'y'``.
    """
    labels = labels or [f"outcome {show(name)}" for name in outcomes]
    columns = [(y[..., k], label, None) for k, label in enumerate(labels)]
    columns += [(x[..., q], name, "time-varying covariate") for q, name in enumerate(time_varying)]
    columns += [(z[..., q], name, "time-invariant covariate") for q, name in enumerate(time_invariant)]
    for values, name, kind in columns:
        what = name if kind is None else f"{kind} {show(name)}"
        seen = values[np.isfinite(values)]
        if not seen.size:
            continue
        top = float(np.max(np.abs(seen)))
        if top > MAX_MAGNITUDE:
            raise DataError(
                f"{what} has values as large as {top:.3g}; the fit works with "
                "squares and cross-products of the data, which overflow at this size. Rescale "
                f"it (divide by a power of ten, e.g. 1e{int(np.log10(top))}) before fitting."
            )
        sd = float(np.std(seen))
        if sd > 0 and not SCALE_RANGE[0] <= sd <= SCALE_RANGE[1]:
            warnings.warn(
                f"{what} has standard deviation {sd:.3g}; estimates lose precision "
                "far from a scale near 1. Consider rescaling it (e.g. to thousands or "
                "millionths) before fitting.", UserWarning, stacklevel=5)

