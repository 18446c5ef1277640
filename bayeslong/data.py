"""Panel data: long and wide intake, validation, missing-data patterns, sufficient statistics.

A :class:`Panel` holds N units observed at T equally spaced waves on K outcomes (processes),
with time-varying covariates x and time-invariant covariates z. It is the only way data enter
the likelihood engine, so every check a person needs happens here, at intake, with a message
that names the column, row, unit or wave and says how to fix it.

The engine (DESIGN section 2) needs, per missing-data pattern, the augmented cross-product
matrix ``M = sum_i u_i u_i'`` with ``u_i = (1, w_i, y_i)``; :meth:`Panel.patterns` computes it.
"""

from __future__ import annotations

import difflib
import numbers
import warnings
from collections.abc import Hashable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from bayeslong._dims import UNIT, WAVE
from bayeslong.errors import DataError

__all__ = ["Panel", "Patterns"]

#: Fewest waves a panel may have: growth and lag terms are not identified with fewer.
MIN_WAVES = 3

_NUMBER_WORDS = {2: "two", 3: "three", 4: "four", 5: "five", 6: "six", 7: "seven", 8: "eight", 9: "nine"}
_MAX_LISTED = 10


# --------------------------------------------------------------------------------------------
# message helpers
# --------------------------------------------------------------------------------------------


def _py(value: Any) -> Any:
    """Return a plain Python scalar for a NumPy scalar (so messages read ``3``, not ``np.int64(3)``)."""
    return value.item() if isinstance(value, np.generic) else value


def _show(value: Any) -> str:
    """Format one label or value for a message: strings quoted, numbers bare."""
    value = _py(value)
    return repr(value) if isinstance(value, str) else str(value)


def _show_list(values: Iterable[Any], limit: int = _MAX_LISTED) -> str:
    """Format labels as ``a, b and c``, cut after ``limit`` entries with the total."""
    values = list(values)
    shown = [_show(v) for v in values[:limit]]
    if len(values) > limit:
        return ", ".join(shown) + f", ... ({len(values)} in all)"
    if len(shown) <= 1:
        return "".join(shown)
    return ", ".join(shown[:-1]) + " and " + shown[-1]


def _count_word(n: int) -> str:
    """Spell small counts as words (``two rows``), larger ones as digits."""
    return _NUMBER_WORDS.get(n, str(n))


def _plural(n: int, word: str, plural: str | None = None) -> str:
    """Return ``word`` or its plural for count ``n``."""
    return word if n == 1 else (plural or word + "s")


# --------------------------------------------------------------------------------------------
# argument and column checks
# --------------------------------------------------------------------------------------------


def _names(arg: Any, role: str) -> tuple:
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


def _check_roles(
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
                raise DataError(f"{_show(name)} is listed twice in `{role}`; list it once.")
            seen.add(name)
    for name in time_varying:
        if name in time_invariant:
            raise DataError(
                f"covariate {_show(name)} is listed both in time_varying and time_invariant; "
                "keep it in one of them (time_varying if it can change from wave to wave)."
            )
    for name in outcomes:
        for role in ("time_varying", "time_invariant"):
            if name in roles[role]:
                raise DataError(
                    f"outcome {_show(name)} is also listed in {role}; an outcome cannot be its own "
                    f"covariate: remove it from {role} (dependence on its past is the model's lag)."
                )
    for name, what in reserved.items():
        for role, names in roles.items():
            if name in names:
                raise DataError(
                    f"{_show(name)} is the {what} column and is also listed in `{role}`; "
                    f"remove it from `{role}`."
                )


def _check_frame(df: Any) -> None:
    """Reject anything but a non-empty DataFrame."""
    if not isinstance(df, pd.DataFrame):
        raise DataError(
            f"the data must be a pandas DataFrame; got {type(df).__name__}. "
            "Wrap it with pd.DataFrame(...) first."
        )
    if len(df) == 0:
        raise DataError(
            f"the data frame is empty (0 rows, columns: {_show_list(df.columns)}); "
            "pass a data frame that holds the panel."
        )


def _check_columns(df: pd.DataFrame, wanted: Iterable[tuple[Hashable, str]]) -> None:
    """Make sure every wanted column exists once; suggest the nearest name when it does not."""
    columns = list(df.columns)
    counts = pd.Index(columns).value_counts()
    for name, role in wanted:
        if name not in df.columns:
            close = difflib.get_close_matches(str(name), [str(c) for c in columns], n=1)
            if close:
                match = next(c for c in columns if str(c) == close[0])
                hint = f"did you mean {_show(match)}?"
            else:
                hint = f"the columns are {_show_list(columns)}."
            raise DataError(
                f"column {_show(name)} is not in the data; {hint} (It is named in `{role}`.)"
            )
        if counts[name] > 1:
            raise DataError(
                f"column {_show(name)} appears {counts[name]} times in the data; "
                "rename or drop the copies so that each name is used once."
            )


def _check_no_missing_labels(df: pd.DataFrame, column: Hashable, what: str) -> None:
    """Reject missing unit ids or wave labels (they cannot be placed in the panel)."""
    missing = df[column].isna().to_numpy()
    if missing.any():
        rows = df.index[missing]
        raise DataError(
            f"column {_show(column)} row {_show(rows[0])} is missing; every row needs a {what} "
            f"({int(missing.sum())} {_plural(int(missing.sum()), 'row lacks', 'rows lack')} one). "
            f"Fill it in or drop those rows, e.g. df.dropna(subset=[{_show(column)}])."
        )


def _is_text_number(value: Any) -> bool:
    """Tell whether a string spells a number (``'3.5'``), which is still text, not a number."""
    try:
        float(value)
    except (TypeError, ValueError):
        return False
    return True


def _numeric_column(df: pd.DataFrame, column: Hashable, role: str) -> np.ndarray:
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
        is_text_number = np.array(
            [isinstance(v, str) and _is_text_number(v) for v in raw], dtype=bool
        )
        bad = ~(missing | is_real | is_text_number)
        if bad.any():
            first = int(np.argmax(bad))
            n_bad = int(bad.sum())
            raise DataError(
                f"column {_show(column)} row {_show(df.index[first])} holds {raw[first]!r}, not a number "
                f"({n_bad} {_plural(n_bad, 'entry', 'entries')} of this {role} column "
                f"{'is' if n_bad == 1 else 'are'} not numbers). "
                f"Fix those entries, or turn them into missing values with "
                f"df[{_show(column)}] = pd.to_numeric(df[{_show(column)}], errors='coerce')."
            )
        if is_text_number.any():
            first = int(np.argmax(is_text_number))
            raise DataError(
                f"column {_show(column)} stores numbers as text (dtype {dtype}); row "
                f"{_show(df.index[first])} holds {raw[first]!r}. Convert it with "
                f"df[{_show(column)}] = pd.to_numeric(df[{_show(column)}])."
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
            f"column {_show(column)} row {_show(df.index[first])} holds {values[first]}; infinite "
            f"values cannot be used ({n_inf} in this column): {fix}."
        )
    return values


def _sorted_labels(values: Sequence[Any], what: str, column: Hashable | None) -> list:
    """Sort unique labels ascending, or raise when they cannot be ordered."""
    where = f" in column {_show(column)}" if column is not None else ""
    try:
        return sorted(values)
    except TypeError as err:
        kinds = sorted({type(v).__name__ for v in values})
        raise DataError(
            f"the {what} labels{where} cannot be ordered (they mix {' and '.join(kinds)}: "
            f"{_show_list(values, 5)}); make them all numbers or all strings."
        ) from err


def _check_wave_count(waves: Sequence[Any]) -> None:
    """Reject panels with fewer than :data:`MIN_WAVES` waves."""
    if len(waves) < MIN_WAVES:
        found = f" ({', '.join(_show(w) for w in waves)})" if waves else ""
        raise DataError(
            f"a panel needs at least {MIN_WAVES} waves; found {len(waves)}{found}. "
            "Growth and lag models are not identified with fewer; add waves or use a "
            "cross-sectional tool."
        )


def _warn_wave_spacing(waves: Sequence[Any], where: str, stacklevel: int) -> None:
    """Warn when numeric or date wave labels are unequally spaced (positions 1..T assume equal steps)."""
    values = [_py(w) for w in waves]
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
            f"the wave labels{where} are unequally spaced ({_show_list(values)}); bayeslong treats "
            f"waves as equally spaced positions 1..{len(values)}. If the gaps matter, give the "
            "missing waves rows with missing outcomes so the spacing is equal.",
            UserWarning,
            stacklevel=stacklevel,
        )


def _warn_text_waves(waves: Sequence[Any], column: Hashable, stacklevel: int) -> None:
    """Warn when text wave labels that spell numbers sort differently as text and as numbers."""
    if not all(isinstance(w, str) and _is_text_number(w) for w in waves):
        return
    if sorted(waves, key=float) != list(waves):
        warnings.warn(
            f"the wave labels in column {_show(column)} are text and are sorted as text "
            f"({_show_list(waves)}); convert them with df[{_show(column)}] = "
            f"pd.to_numeric(df[{_show(column)}]) to order them as numbers.",
            UserWarning,
            stacklevel=stacklevel,
        )


def _settle_covariates(
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
                f"time-varying covariate {_show(time_varying[p])} is missing for unit "
                f"{_show(units[first])} at wave {_show(waves[t])}{why}"
            )
        else:
            q = int(np.argmax(np.isnan(z[first])))
            what = (
                f"time-invariant covariate {_show(time_invariant[q])} is missing for unit "
                f"{_show(units[first])}"
            )
        raise DataError(
            f"{what}; covariates are conditioned on and cannot be missing "
            f"({n_bad} {_plural(n_bad, 'unit')} with missing covariate values: "
            f"{_show_list(bad_ids)}). Fill in the missing values, or pass drop_incomplete_covariates=True "
            f"to drop {'that unit' if n_bad == 1 else 'those units'}."
        )
    keep = ~incomplete
    if not keep.any():
        raise DataError(
            "every unit has a missing covariate value, so drop_incomplete_covariates=True would "
            "leave no data; fill in the covariates or leave out the incomplete ones."
        )
    warnings.warn(
        f"dropped {n_bad} {_plural(n_bad, 'unit')} with missing covariate values "
        f"(drop_incomplete_covariates=True): {_show_list(bad_ids, limit=50)}.",
        UserWarning,
        stacklevel=stacklevel + 1,
    )
    return [u for u, k in zip(units, keep, strict=True) if k], y[keep], x[keep], z[keep]


def _readonly(values: Any, ndim: int, name: str) -> np.ndarray:
    """Copy to a read-only float64 array of the given rank."""
    try:
        array = np.array(values, dtype=float, copy=True)
    except (TypeError, ValueError) as err:
        raise DataError(f"`{name}` must be a numeric array; {err}.") from err
    if array.ndim != ndim:
        raise DataError(f"`{name}` must be a {ndim}-dimensional array; got shape {array.shape}.")
    array.setflags(write=False)
    return array


def _arrays_equal(a: np.ndarray, b: np.ndarray) -> bool:
    """Compare two arrays, shapes included, treating NaN as equal to NaN."""
    return a.shape == b.shape and bool(np.array_equal(a, b, equal_nan=a.dtype.kind == "f"))


# --------------------------------------------------------------------------------------------
# Patterns
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True, eq=False)
class Patterns:
    """Missing-data patterns of a panel's outcomes and their sufficient statistics.

    Units with the same set of observed outcome entries form one pattern; the likelihood
    engine evaluates each pattern once, from its cross-product matrix (DESIGN section 2).

    Parameters
    ----------
    masks : numpy.ndarray of bool, shape (P, K*T)
        Observed entries of :meth:`Panel.outcome_matrix` for each pattern. The complete
        pattern (every entry observed) comes first when some unit has it; the rest follow by
        number of observed entries, most first, then by which entries are observed (earlier
        entries observed first).
    counts : numpy.ndarray of int, shape (P,)
        Number of units in each pattern.
    unit_pattern : numpy.ndarray of int, shape (N,)
        Pattern index of each unit (in :attr:`Panel.units` order).
    cross : numpy.ndarray of float, shape (P, U, U)
        ``cross[p] = sum_{i in p} u_i u_i'`` with ``U = 1 + W + K*T`` and
        ``u_i = (1, w_i, y_i)``: a leading 1, the unit's covariate row (:meth:`Panel.covariate_matrix`)
        and its outcome row (:meth:`Panel.outcome_matrix`) **with missing outcome entries set
        to 0**, so the rows and columns of missing entries hold zeros and the engine picks the
        observed block with ``masks[p]``.

    Notes
    -----
    For units i in pattern p with observed outcomes ``y_i,o`` the Gaussian log-likelihood is

        -n_p/2 (p_o log 2pi + log det Sigma_oo) - 1/2 tr(Sigma_oo^-1 A_o M_p A_o')

    with ``A_o = [-c_o, -D_o, I_o]`` (DESIGN section 2), which is why ``M_p = cross[p]`` and
    ``n_p = counts[p]`` are all the data a pattern contributes (Little & Rubin 2019, ch. 7).

    References
    ----------
    Little, R. J. A., & Rubin, D. B. (2019). *Statistical Analysis with Missing Data* (3rd ed.).
    Wiley. https://doi.org/10.1002/9781119482260
    """

    masks: np.ndarray
    counts: np.ndarray
    unit_pattern: np.ndarray
    cross: np.ndarray

    def __post_init__(self) -> None:
        for name, dtype, ndim in (
            ("masks", bool, 2),
            ("counts", np.int64, 1),
            ("unit_pattern", np.int64, 1),
            ("cross", float, 3),
        ):
            array = np.array(getattr(self, name), dtype=dtype, copy=True)
            if array.ndim != ndim:
                raise DataError(f"Patterns.{name} must be {ndim}-dimensional; got shape {array.shape}.")
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        n_patterns = len(self.counts)
        if self.masks.shape[0] != n_patterns or self.cross.shape[0] != n_patterns:
            raise DataError(
                f"Patterns holds {n_patterns} counts but {self.masks.shape[0]} masks and "
                f"{self.cross.shape[0]} cross-product matrices; give one of each per pattern."
            )

    @property
    def n_patterns(self) -> int:
        """Number of distinct missing-data patterns P."""
        return len(self.counts)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Patterns):
            return NotImplemented
        return all(
            _arrays_equal(getattr(self, name), getattr(other, name))
            for name in ("masks", "counts", "unit_pattern", "cross")
        )

    __hash__ = None  # type: ignore[assignment]  # holds mutable-typed arrays

    def __repr__(self) -> str:
        return (
            f"Patterns(n_patterns={self.n_patterns}, counts={self.counts.tolist()}, "
            f"cross_shape={self.cross.shape})"
        )


# --------------------------------------------------------------------------------------------
# Panel
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True, eq=False, repr=False)
class Panel:
    """A balanced-grid panel: N units, T equally spaced waves, K outcomes and covariates.

    Build one with :meth:`from_long` or :meth:`from_wide`; both validate the data and say
    what to fix. Direct construction validates the arrays as well.

    Parameters
    ----------
    units : tuple
        Original unit ids, in sorted order (index i of the arrays).
    waves : tuple
        Original wave labels, sorted ascending; wave ``waves[t]`` is position ``t + 1`` in
        ``1..T``. Waves are assumed equally spaced.
    outcomes : tuple of str
        Names of the K outcomes (processes).
    time_varying : tuple of str
        Names of the time-varying covariates x.
    time_invariant : tuple of str
        Names of the time-invariant covariates z.
    y : numpy.ndarray of float, shape (N, T, K)
        Outcomes; NaN where an outcome is missing (kept as missing, never imputed).
    x : numpy.ndarray of float, shape (N, T, len(time_varying))
        Time-varying covariates; never NaN.
    z : numpy.ndarray of float, shape (N, len(time_invariant))
        Time-invariant covariates; never NaN.

    Raises
    ------
    DataError
        If the shapes disagree with the labels, there are fewer than 3 waves, a covariate is
        missing or infinite, an outcome is infinite or constant, or a unit has no observed
        outcome.

    Notes
    -----
    The arrays are copied and made read-only, so a panel never changes after construction.
    Equality compares labels and arrays (NaN equals NaN).

    Examples
    --------
    >>> df = pd.DataFrame({"id": [1, 1, 1, 2, 2, 2], "t": [0, 1, 2] * 2,
    ...                    "y": [1.0, 2.0, 2.5, 0.5, None, 1.5]})
    >>> panel = Panel.from_long(df, unit="id", wave="t", outcomes=["y"])
    >>> panel.n_units, panel.n_waves, panel.patterns().counts.tolist()
    (2, 3, [1, 1])
    """

    units: tuple
    waves: tuple
    outcomes: tuple[str, ...]
    time_varying: tuple[str, ...] = ()
    time_invariant: tuple[str, ...] = ()
    y: np.ndarray
    x: np.ndarray = field(default=None)  # type: ignore[assignment]  # filled in __post_init__
    z: np.ndarray = field(default=None)  # type: ignore[assignment]

    # ---------------------------------------------------------------- validation

    def __post_init__(self) -> None:
        units = tuple(_py(u) for u in self.units)
        waves = tuple(_py(w) for w in self.waves)
        outcomes = _names(self.outcomes, "outcomes")
        time_varying = _names(self.time_varying, "time_varying")
        time_invariant = _names(self.time_invariant, "time_invariant")
        _check_roles(outcomes, time_varying, time_invariant, reserved={})
        for what, labels in (("unit", units), ("wave", waves)):
            if len(set(labels)) != len(labels):
                repeated = pd.Index(labels)[pd.Index(labels).duplicated()].unique()
                raise DataError(
                    f"{what} {_show(repeated[0])} appears more than once in `{what}s`; "
                    f"{what} labels must be unique."
                )
        _check_wave_count(waves)
        n, t = len(units), len(waves)
        if n == 0:
            raise DataError("the panel has no units; pass data with at least one unit.")
        y = _readonly(self.y, 3, "y")
        x = _readonly(np.empty((n, t, 0)) if self.x is None else self.x, 3, "x")
        z = _readonly(np.empty((n, 0)) if self.z is None else self.z, 2, "z")
        for name, array, expected in (
            ("y", y, (n, t, len(outcomes))),
            ("x", x, (n, t, len(time_varying))),
            ("z", z, (n, len(time_invariant))),
        ):
            if array.shape != expected:
                raise DataError(
                    f"`{name}` has shape {array.shape}, but {n} units, {t} waves and the names "
                    f"given call for {expected}; make the labels and the array agree."
                )
        for name, array, names in (("x", x, time_varying), ("z", z, time_invariant)):
            bad = ~np.isfinite(array)
            if bad.any():
                idx = tuple(int(a[0]) for a in np.nonzero(bad))
                at = f" at wave {_show(waves[idx[1]])}" if name == "x" else ""
                kind = "time-varying" if name == "x" else "time-invariant"
                raise DataError(
                    f"{kind} covariate {_show(names[idx[-1]])} is {array[idx]} for unit "
                    f"{_show(units[idx[0]])}{at}; covariates must be finite numbers "
                    "(use drop_incomplete_covariates=True at intake to drop such units)."
                )
        if np.isinf(y).any():
            i, w, k = (int(a[0]) for a in np.nonzero(np.isinf(y)))
            raise DataError(
                f"outcome {_show(outcomes[k])} is {y[i, w, k]} for unit {_show(units[i])} at wave "
                f"{_show(waves[w])}; replace infinite values with NaN to treat them as missing."
            )
        observed = ~np.isnan(y)
        empty = ~observed.any(axis=(1, 2))
        if empty.any():
            ids = [units[i] for i in np.flatnonzero(empty)]
            subject = (
                f"unit {_show(ids[0])} has" if len(ids) == 1 else f"units {_show_list(ids)} have"
            )
            raise DataError(
                f"{subject} no observed outcome at any wave; drop "
                f"{'its' if len(ids) == 1 else 'their'} rows from the data (a unit without "
                "outcomes carries no information about them)."
            )
        for k, name in enumerate(outcomes):
            values = y[:, :, k][observed[:, :, k]]
            if values.size == 0:
                raise DataError(
                    f"outcome {_show(name)} is never observed; remove it from `outcomes`."
                )
            if np.all(values == values[0]):
                raise DataError(
                    f"outcome {_show(name)} takes the single value {values[0]:g} at every observed "
                    f"entry ({values.size}); a constant outcome has no variance to model: remove "
                    "it from `outcomes` or check the column."
                )
        for name, value in (
            ("units", units),
            ("waves", waves),
            ("outcomes", outcomes),
            ("time_varying", time_varying),
            ("time_invariant", time_invariant),
            ("y", y),
            ("x", x),
            ("z", z),
        ):
            object.__setattr__(self, name, value)

    # ---------------------------------------------------------------- constructors

    @classmethod
    def from_long(
        cls,
        df: pd.DataFrame,
        *,
        unit: Hashable,
        wave: Hashable,
        outcomes: Sequence[str] | str,
        time_varying: Sequence[str] | str = (),
        time_invariant: Sequence[str] | str = (),
        drop_incomplete_covariates: bool = False,
    ) -> Panel:
        """Build a panel from long data: one row per unit and wave.

        Parameters
        ----------
        df : pandas.DataFrame
            Long data. Rows are named in messages by their index label.
        unit : hashable
            Column holding the unit id.
        wave : hashable
            Column holding the wave label (numbers, dates or strings; they must be orderable).
            Labels are sorted ascending and mapped to positions 1..T, assuming equal spacing.
        outcomes : sequence of str or str
            Outcome columns (the K processes). Missing values are kept as missing.
        time_varying : sequence of str or str, optional
            Time-varying covariate columns x.
        time_invariant : sequence of str or str, optional
            Time-invariant covariate columns z; each must be constant within a unit (missing
            entries are allowed as long as the unit's other rows give the value).
        drop_incomplete_covariates : bool, default False
            Drop units with a missing covariate value (with a warning naming them) instead of
            raising.

        Returns
        -------
        Panel

        Raises
        ------
        DataError
            On an empty frame; an unknown column (with the nearest name suggested); a name in
            two roles; a missing unit id or wave label; a non-numeric or infinite outcome or
            covariate value; two rows for one unit and wave; fewer than 3 waves; unorderable
            wave labels; a time-invariant covariate that varies within a unit; a missing
            covariate (unless dropping); a unit with no observed outcome; a constant outcome.

        Warns
        -----
        UserWarning
            When numeric wave labels are unequally spaced, when text wave labels spelling
            numbers sort differently as text, and when ``drop_incomplete_covariates`` drops units.

        Notes
        -----
        The panel is the full grid units x waves. A unit without a row for some wave gets
        missing outcomes there (kept as missing), but then its time-varying covariates at that
        wave are missing too: that is an error unless ``drop_incomplete_covariates=True``,
        which drops the unit. Without time-varying covariates such gaps are simply missing data.

        Examples
        --------
        >>> df = pd.DataFrame({"id": [1, 1, 1, 2, 2, 2], "t": [1, 2, 3] * 2,
        ...                    "y": [1.0, 2.0, 2.5, 0.5, 1.0, 1.5], "x": [0, 1, 0, 1, 1, 0]})
        >>> Panel.from_long(df, unit="id", wave="t", outcomes="y", time_varying="x").x.shape
        (2, 3, 1)
        """
        _check_frame(df)
        outcomes_ = _names(outcomes, "outcomes")
        varying = _names(time_varying, "time_varying")
        invariant = _names(time_invariant, "time_invariant")
        if unit == wave:
            raise DataError(
                f"`unit` and `wave` both name column {_show(unit)}; give each its own column."
            )
        _check_roles(outcomes_, varying, invariant, reserved={unit: "unit", wave: "wave"})
        _check_columns(
            df,
            [(unit, "unit"), (wave, "wave")]
            + [(c, "outcomes") for c in outcomes_]
            + [(c, "time_varying") for c in varying]
            + [(c, "time_invariant") for c in invariant],
        )
        _check_no_missing_labels(df, unit, "unit id")
        _check_no_missing_labels(df, wave, "wave label")
        y_long = np.column_stack([_numeric_column(df, c, "outcome") for c in outcomes_])
        x_long = np.column_stack(
            [_numeric_column(df, c, "covariate") for c in varying] or [np.empty((len(df), 0))]
        )
        z_long = np.column_stack(
            [_numeric_column(df, c, "covariate") for c in invariant] or [np.empty((len(df), 0))]
        )

        repeated = df.duplicated([unit, wave], keep=False).to_numpy()
        if repeated.any():
            first = int(np.argmax(repeated))
            u0, w0 = df[unit].iloc[first], df[wave].iloc[first]
            same = repeated & (df[unit] == u0).to_numpy() & (df[wave] == w0).to_numpy()
            rows = list(df.index[same])
            n_pairs = len(df.loc[repeated, [unit, wave]].drop_duplicates())
            rest = (
                f" {n_pairs} (unit, wave) pairs have more than one row in all; "
                f"df.drop_duplicates([{_show(unit)}, {_show(wave)}]) keeps the first of each."
                if n_pairs > 1
                else ""
            )
            raise DataError(
                f"unit {_show(u0)} has {_count_word(len(rows))} rows for wave {_show(w0)} "
                f"(rows {_show_list(rows)}); keep one.{rest}"
            )

        waves = _sorted_labels(df[wave].drop_duplicates().tolist(), "wave", wave)
        _check_wave_count(waves)
        _warn_text_waves(waves, wave, stacklevel=3)
        _warn_wave_spacing(waves, f" in column {_show(wave)}", stacklevel=3)
        units = _sorted_labels(df[unit].drop_duplicates().tolist(), "unit", unit)

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
                        f"time-invariant covariate {_show(name)} varies within unit {_show(units[i])} "
                        f"(values {_show_list([float(v) for v in values], 5)}; {n_vary} "
                        f"{_plural(n_vary, 'unit')} in all); move it to time_varying or fix the data."
                    )
            firsts = grouped.first()  # first non-missing value of each unit
            z[firsts.index.to_numpy()] = firsts.to_numpy()

        units, y, x, z = _settle_covariates(
            units, waves, y, x, z, varying, invariant, present, drop_incomplete_covariates, stacklevel=2
        )
        return cls(
            units=tuple(units),
            waves=tuple(waves),
            outcomes=outcomes_,
            time_varying=varying,
            time_invariant=invariant,
            y=y,
            x=x,
            z=z,
        )

    @classmethod
    def from_wide(
        cls,
        df: pd.DataFrame,
        *,
        unit: Hashable,
        outcomes: Mapping[str, Sequence[Hashable]],
        time_varying: Mapping[str, Sequence[Hashable]] | None = None,
        time_invariant: Sequence[str] | str = (),
        waves: Sequence[Any] | None = None,
        drop_incomplete_covariates: bool = False,
    ) -> Panel:
        """Build a panel from wide data: one row per unit, one column per variable and wave.

        Parameters
        ----------
        df : pandas.DataFrame
            Wide data. Rows are named in messages by their index label.
        unit : hashable
            Column holding the unit id.
        outcomes : mapping of str to sequence of column names
            For each outcome, its columns in wave order, e.g. ``{"y": ["y1", "y2", "y3"]}``.
            Every outcome and time-varying covariate lists the same number T of columns.
        time_varying : mapping of str to sequence of column names, optional
            For each time-varying covariate, its columns in wave order.
        time_invariant : sequence of str or str, optional
            Time-invariant covariate columns z.
        waves : sequence, optional
            Wave labels for the T positions of the lists; default ``1..T``. If they are not
            ascending, the columns are reordered with them.
        drop_incomplete_covariates : bool, default False
            Drop units with a missing covariate value (with a warning naming them) instead of
            raising.

        Returns
        -------
        Panel

        Raises
        ------
        DataError
            As :meth:`from_long`, plus: per-wave lists of different lengths, ``waves`` of the
            wrong length or with repeated labels, a column listed twice, and a unit on two rows.

        Warns
        -----
        UserWarning
            When numeric ``waves`` are unequally spaced, and when units are dropped.

        Examples
        --------
        >>> df = pd.DataFrame({"id": ["a", "b"], "y1": [1.0, 0.5], "y2": [2.0, None],
        ...                    "y3": [2.5, 1.5]})
        >>> Panel.from_wide(df, unit="id", outcomes={"y": ["y1", "y2", "y3"]}).waves
        (1, 2, 3)
        """
        _check_frame(df)
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
        outcome_map = {name: list(_names(cols, f"outcomes[{name!r}]")) for name, cols in outcomes.items()}
        varying_map = {name: list(_names(cols, f"time_varying[{name!r}]")) for name, cols in varying_map.items()}
        outcomes_ = tuple(outcome_map)
        varying = tuple(varying_map)
        invariant = _names(time_invariant, "time_invariant")
        _check_roles(outcomes_, varying, invariant, reserved={unit: "unit"})

        per_wave = {**outcome_map, **varying_map}
        lengths = {name: len(cols) for name, cols in per_wave.items()}
        first_name = outcomes_[0]
        n_waves = lengths[first_name]
        for name, length in lengths.items():
            if length != n_waves:
                raise DataError(
                    f"{_show(name)} lists {length} {_plural(length, 'column')} but "
                    f"{_show(first_name)} lists {n_waves}; give every outcome and time-varying "
                    "covariate one column per wave, in the same wave order."
                )
        owner: dict[Hashable, str] = {unit: "the unit id"}
        for name in invariant:
            owner.setdefault(name, "time_invariant")
        for name, cols in per_wave.items():
            for col in cols:
                if col in owner:
                    raise DataError(
                        f"column {_show(col)} is listed for {_show(name)} and also for "
                        f"{owner[col]}; each column holds one variable at one wave."
                    )
                owner[col] = _show(name)
        _check_columns(
            df,
            [(unit, "unit")]
            + [(c, "outcomes") for cols in outcome_map.values() for c in cols]
            + [(c, "time_varying") for cols in varying_map.values() for c in cols]
            + [(c, "time_invariant") for c in invariant],
        )
        _check_no_missing_labels(df, unit, "unit id")
        repeated = df.duplicated([unit], keep=False).to_numpy()
        if repeated.any():
            first = int(np.argmax(repeated))
            u0 = df[unit].iloc[first]
            rows = list(df.index[repeated & (df[unit] == u0).to_numpy()])
            raise DataError(
                f"unit {_show(u0)} appears in {_count_word(len(rows))} rows (rows "
                f"{_show_list(rows)}); wide data hold one row per unit: keep one."
            )

        if waves is None:
            labels = list(range(1, n_waves + 1))
        else:
            labels = [_py(w) for w in _names(waves, "waves")]
            if len(labels) != n_waves:
                raise DataError(
                    f"`waves` gives {len(labels)} labels but each variable lists {n_waves} "
                    "columns; give one label per column."
                )
            if len(set(labels)) != len(labels):
                raise DataError(f"`waves` repeats a label ({_show_list(labels)}); labels must be unique.")
        _sorted_labels(labels, "wave", None)  # raises a DataError when unorderable
        order = sorted(range(n_waves), key=lambda t: labels[t])
        labels = [labels[t] for t in order]
        _check_wave_count(labels)
        _warn_wave_spacing(labels, " given in `waves`", stacklevel=3)

        def block(mapping: dict[str, list], role: str) -> np.ndarray:
            """Stack per-wave columns to (rows, T, variables) in wave order."""
            if not mapping:
                return np.empty((len(df), n_waves, 0))
            return np.stack(
                [
                    np.column_stack([_numeric_column(df, cols[t], role) for t in order])
                    for cols in mapping.values()
                ],
                axis=2,
            )

        y = block(outcome_map, "outcome")
        x = block(varying_map, "covariate")
        z = np.column_stack(
            [_numeric_column(df, c, "covariate") for c in invariant] or [np.empty((len(df), 0))]
        )
        ids = df[unit].tolist()
        units = _sorted_labels(ids, "unit", unit)
        rows = pd.Index(ids).get_indexer(units)
        units, y, x, z = _settle_covariates(
            units, labels, y[rows], x[rows], z[rows], varying, invariant, None,
            drop_incomplete_covariates, stacklevel=2,
        )
        return cls(
            units=tuple(units),
            waves=tuple(labels),
            outcomes=outcomes_,
            time_varying=varying,
            time_invariant=invariant,
            y=y,
            x=x,
            z=z,
        )

    # ---------------------------------------------------------------- sizes and equality

    @property
    def n_units(self) -> int:
        """Number of units N."""
        return len(self.units)

    @property
    def n_waves(self) -> int:
        """Number of waves T."""
        return len(self.waves)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Panel):
            return NotImplemented
        return (
            self.units == other.units
            and self.waves == other.waves
            and self.outcomes == other.outcomes
            and self.time_varying == other.time_varying
            and self.time_invariant == other.time_invariant
            and _arrays_equal(self.y, other.y)
            and _arrays_equal(self.x, other.x)
            and _arrays_equal(self.z, other.z)
        )

    __hash__ = None  # type: ignore[assignment]  # equality compares arrays

    def __repr__(self) -> str:
        waves = (
            f"{_show(self.waves[0])}..{_show(self.waves[-1])}" if self.waves else ""
        )
        return (
            f"Panel(n_units={self.n_units}, n_waves={self.n_waves} ({waves}), "
            f"outcomes={self.outcomes}, time_varying={self.time_varying}, "
            f"time_invariant={self.time_invariant})"
        )

    # ---------------------------------------------------------------- engine views

    def outcome_matrix(self) -> np.ndarray:
        """Return the outcomes as one row per unit, process-major.

        Returns
        -------
        numpy.ndarray of float, shape (N, K*T)
            Columns ``[y_1 at waves 1..T, y_2 at waves 1..T, ...]``; NaN where missing.
        """
        n, t, k = self.y.shape
        return np.ascontiguousarray(self.y.transpose(0, 2, 1).reshape(n, k * t))

    def covariate_matrix(self) -> np.ndarray:
        """Return the covariates w_i as one row per unit.

        Returns
        -------
        numpy.ndarray of float, shape (N, W)
            ``W = len(time_varying) * T + len(time_invariant)``; columns
            ``[x_1 at waves 1..T, x_2 at waves 1..T, ..., z_1, z_2, ...]``, labelled by
            :meth:`covariate_labels`.
        """
        n, t, p = self.x.shape
        return np.concatenate([self.x.transpose(0, 2, 1).reshape(n, p * t), self.z], axis=1)

    def covariate_labels(self) -> tuple[str, ...]:
        """Name the columns of :meth:`covariate_matrix`.

        Returns
        -------
        tuple of str
            ``"x[1]", ..., "x[T]"`` for each time-varying covariate (wave *position* 1..T in
            brackets, not the original label), then the time-invariant names.
        """
        varying = tuple(
            f"{name}[{t}]" for name in self.time_varying for t in range(1, self.n_waves + 1)
        )
        return varying + tuple(str(name) for name in self.time_invariant)

    @cached_property
    def _patterns(self) -> Patterns:
        """Compute :class:`Patterns` once per panel (the panel is immutable)."""
        ys = self.outcome_matrix()
        observed = ~np.isnan(ys)
        unique, inverse, counts = np.unique(
            observed, axis=0, return_inverse=True, return_counts=True
        )
        inverse = inverse.reshape(-1)
        # Complete pattern first, then most observed entries, then earlier entries observed.
        order = sorted(
            range(len(unique)),
            key=lambda p: (not unique[p].all(), -int(unique[p].sum()), tuple(~unique[p])),
        )
        rank = np.empty(len(order), dtype=np.int64)
        rank[order] = np.arange(len(order))
        unit_pattern = rank[inverse]
        masks = unique[order]
        counts = counts[order]

        # u_i = (1, w_i, y_i) with missing outcome entries set to 0 (DESIGN section 2).
        u = np.concatenate(
            [np.ones((self.n_units, 1)), self.covariate_matrix(), np.where(observed, ys, 0.0)],
            axis=1,
        )
        by_pattern = np.argsort(unit_pattern, kind="stable")
        bounds = np.concatenate([[0], np.cumsum(counts)])
        cross = np.empty((len(order), u.shape[1], u.shape[1]))
        for p in range(len(order)):
            block = u[by_pattern[bounds[p] : bounds[p + 1]]]
            cross[p] = np.einsum("ni,nj->ij", block, block, optimize=True)
        return Patterns(masks=masks, counts=counts, unit_pattern=unit_pattern, cross=cross)

    def patterns(self) -> Patterns:
        """Group units by their missing-data pattern and sum their cross-products.

        Returns
        -------
        Patterns
            Masks, counts, each unit's pattern and the per-pattern matrix
            ``sum_i u_i u_i'`` with ``u_i = (1, w_i, y_i)``, missing outcome entries set to 0.

        Notes
        -----
        One contraction per pattern (P is small), none per unit, so the cost is O(N U^2)
        and the engine's cost per gradient is independent of N (DESIGN section 2).
        The result is cached: a panel never changes.
        """
        return self._patterns

    # ---------------------------------------------------------------- derived panels and tables

    def head(self, n_waves: int) -> Panel:
        """Return the same panel restricted to its first ``n_waves`` waves.

        Used for leave-future-out: fit on waves 1..T-1, score wave T.

        Parameters
        ----------
        n_waves : int
            Number of leading waves to keep, between 3 and T.

        Returns
        -------
        Panel
            The first ``n_waves`` waves. Units with no observed outcome left in those waves
            are dropped (silently: compare ``units`` to see which).

        Raises
        ------
        DataError
            If ``n_waves`` is not an integer between 3 and T.
        """
        if isinstance(n_waves, bool) or not isinstance(n_waves, numbers.Integral):
            raise DataError(f"head needs an integer number of waves; got {n_waves!r}.")
        n_waves = int(n_waves)
        if not MIN_WAVES <= n_waves <= self.n_waves:
            raise DataError(
                f"head({n_waves}) must keep between {MIN_WAVES} and {self.n_waves} waves "
                f"(this panel has {self.n_waves}); a panel needs at least {MIN_WAVES} waves."
            )
        y = self.y[:, :n_waves]
        keep = ~np.isnan(y).all(axis=(1, 2))
        return Panel(
            units=tuple(u for u, k in zip(self.units, keep, strict=True) if k),
            waves=self.waves[:n_waves],
            outcomes=self.outcomes,
            time_varying=self.time_varying,
            time_invariant=self.time_invariant,
            y=y[keep],
            x=self.x[keep, :n_waves],
            z=self.z[keep],
        )

    def to_long(self) -> pd.DataFrame:
        """Return the panel as long data, one row per unit and wave of the full grid.

        Returns
        -------
        pandas.DataFrame
            Columns ``unit``, ``wave`` (original labels), the outcomes (NaN where missing),
            the time-varying and the time-invariant covariates; N*T rows sorted by unit, then
            wave. ``Panel.from_long(panel.to_long(), unit="unit", wave="wave", ...)`` gives
            back an equal panel.

        Raises
        ------
        DataError
            If an outcome or covariate is itself named ``unit`` or ``wave``.
        """
        names = self.outcomes + self.time_varying + self.time_invariant
        for name in names:
            if name in (UNIT, WAVE):
                raise DataError(
                    f"a variable is named {_show(name)}, which to_long uses for its index column; "
                    "rename it before building the panel."
                )
        n, t = self.n_units, self.n_waves
        data: dict[Hashable, Any] = {
            UNIT: pd.Index(list(self.units)).repeat(t),
            WAVE: pd.Index(list(self.waves))[np.tile(np.arange(t), n)],
        }
        for k, name in enumerate(self.outcomes):
            data[name] = self.y[:, :, k].reshape(-1)
        for p, name in enumerate(self.time_varying):
            data[name] = self.x[:, :, p].reshape(-1)
        for q, name in enumerate(self.time_invariant):
            data[name] = np.repeat(self.z[:, q], t)
        return pd.DataFrame(data)

    def describe(self) -> dict[str, Any]:
        """Summarise the panel's size and missing data.

        Returns
        -------
        dict
            ``n_units``, ``n_waves``, ``waves`` (labels), ``outcomes``, ``time_varying``,
            ``time_invariant``; ``observed``: DataFrame (wave x outcome) of the share of units
            observed; ``patterns``: DataFrame with one row per pattern (in :meth:`patterns`
            order), a column per outcome showing its waves as ``o`` (observed) or ``.``
            (missing), and ``count``.
        """
        observed = pd.DataFrame(
            (~np.isnan(self.y)).mean(axis=0),
            index=pd.Index(list(self.waves), name=WAVE),
            columns=list(self.outcomes),
        )
        patterns = self.patterns()
        t = self.n_waves
        table = pd.DataFrame(
            {
                name: [
                    "".join("o" if seen else "." for seen in mask[k * t : (k + 1) * t])
                    for mask in patterns.masks
                ]
                for k, name in enumerate(self.outcomes)
            }
        )
        table["count"] = patterns.counts
        table.index.name = "pattern"
        return {
            "n_units": self.n_units,
            "n_waves": self.n_waves,
            "waves": self.waves,
            "outcomes": self.outcomes,
            "time_varying": self.time_varying,
            "time_invariant": self.time_invariant,
            "observed": observed,
            "patterns": table,
        }

    def summary_scale(self) -> dict[str, dict[str, float]]:
        """Return each outcome's location and scale, the basis of default priors.

        Returns
        -------
        dict of str to dict
            For each outcome, ``{"mean": m, "sd": s}``: ``m`` is the mean of its observed
            values at the first wave (at the earliest wave where it is observed, if nobody is
            observed at wave 1); ``s`` is the standard deviation (ddof=1) of all its observed
            values pooled over units and waves.

        Notes
        -----
        The pooled SD includes change in the mean over waves, so it is at least as large as
        a typical within-wave SD: a deliberately wide scale for weakly informative priors.
        """
        scales: dict[str, dict[str, float]] = {}
        for k, name in enumerate(self.outcomes):
            values = self.y[:, :, k]
            seen = ~np.isnan(values)
            first = int(np.argmax(seen.any(axis=0)))
            pooled = values[seen]
            sd = float(np.std(pooled, ddof=1)) if pooled.size > 1 else float("nan")
            scales[name] = {"mean": float(values[seen[:, first], first].mean()), "sd": sd}
        return scales
