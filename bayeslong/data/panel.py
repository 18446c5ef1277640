"""Panel data: long and wide intake, validation, missing-data patterns, sufficient statistics.

A :class:`Panel` holds N units observed at T equally spaced waves on K outcomes (processes),
with time-varying covariates x and time-invariant covariates z. It is the only way data enter
the likelihood engine, so every check a person needs happens here, at intake, with a message
that names the column, row, unit or wave and says how to fix it.

The engine (docs/engine.md) needs, per missing-data pattern, the augmented cross-product
matrix ``M = sum_i u_i u_i'`` with ``u_i = (1, w_i, y_i)``; :meth:`Panel.patterns` computes it.
"""

from __future__ import annotations

import numbers
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np
import pandas as pd

from bayeslong.data.categories import settle_categories
from bayeslong.data.intake import read_long, read_wide
from bayeslong.data.patterns import Patterns
from bayeslong.data.indicators import indicator_labels, settle_indicators
from bayeslong.data.validation import (
    MIN_WAVES,
    arrays_equal,
    check_magnitudes,
    check_roles,
    check_wave_count,
    name_tuple,
    readonly,
)
from bayeslong.dims import UNIT, WAVE
from bayeslong.errors import DataError
from bayeslong.wording import as_python, show, show_list

__all__ = ["Panel", "Patterns"]


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
    indicators : mapping of str to tuple of str, optional
        For each process, the names of its indicators (the observed variables that measure
        it at every wave); default: each process is its own single indicator, ``{"y": ("y",)}``.
        An indicator measures one process only.
    time_varying : tuple of str
        Names of the time-varying covariates x.
    time_invariant : tuple of str
        Names of the time-invariant covariates z.
    y : numpy.ndarray of float, shape (N, T, J)
        The observed variables; NaN where one is missing (kept as missing, never imputed).
        J = K with one indicator per process (then ``y[..., k]`` is outcome k); otherwise
        the indicators of every process in order (:attr:`observed_names`).
    x : numpy.ndarray of float, shape (N, T, len(time_varying))
        Time-varying covariates; never NaN.
    z : numpy.ndarray of float, shape (N, len(time_invariant))
        Time-invariant covariates; never NaN.
    categories : mapping of str to tuple, optional
        For each categorical (binary or ordinal) observed variable, its categories in order
        (integer codes or labels); its values in ``y`` are then the positions 0..C-1
        (data/categories.py). Built by ``categorical=`` at intake.

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
    indicators: Mapping[str, tuple[str, ...]] | None = None
    time_varying: tuple[str, ...] = ()
    time_invariant: tuple[str, ...] = ()
    y: np.ndarray
    x: np.ndarray = field(default=None)  # type: ignore[assignment]  # filled in __post_init__
    z: np.ndarray = field(default=None)  # type: ignore[assignment]
    categories: Mapping[str, tuple] | None = None

    # ---------------------------------------------------------------- validation

    def __post_init__(self) -> None:
        units = tuple(as_python(u) for u in self.units)
        waves = tuple(as_python(w) for w in self.waves)
        outcomes = name_tuple(self.outcomes, "outcomes")
        time_varying = name_tuple(self.time_varying, "time_varying")
        time_invariant = name_tuple(self.time_invariant, "time_invariant")
        check_roles(outcomes, time_varying, time_invariant, reserved={})
        indicators = settle_indicators(outcomes, self.indicators, time_varying, time_invariant)
        observed_names = tuple(name for group in indicators.values() for name in group)
        described = indicator_labels(indicators)
        for what, labels in (("unit", units), ("wave", waves)):
            if len(set(labels)) != len(labels):
                repeated = pd.Index(labels)[pd.Index(labels).duplicated()].unique()
                raise DataError(
                    f"{what} {show(repeated[0])} appears more than once in `{what}s`; "
                    f"{what} labels must be unique."
                )
        check_wave_count(waves)
        n, t = len(units), len(waves)
        if n == 0:
            raise DataError("the panel has no units; pass data with at least one unit.")
        y = readonly(self.y, 3, "y")
        x = readonly(np.empty((n, t, 0)) if self.x is None else self.x, 3, "x")
        z = readonly(np.empty((n, 0)) if self.z is None else self.z, 2, "z")
        for name, array, expected in (
            ("y", y, (n, t, len(observed_names))),
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
                at = f" at wave {show(waves[idx[1]])}" if name == "x" else ""
                kind = "time-varying" if name == "x" else "time-invariant"
                raise DataError(
                    f"{kind} covariate {show(names[idx[-1]])} is {array[idx]} for unit "
                    f"{show(units[idx[0]])}{at}; covariates must be finite numbers "
                    "(use drop_incomplete_covariates=True at intake to drop such units)."
                )
        if np.isinf(y).any():
            i, w, k = (int(a[0]) for a in np.nonzero(np.isinf(y)))
            raise DataError(
                f"{described[k]} is {y[i, w, k]} for unit {show(units[i])} at wave "
                f"{show(waves[w])}; replace infinite values with NaN to treat them as missing."
            )
        observed = ~np.isnan(y)
        for k, label in enumerate(described):
            values = y[:, :, k][observed[:, :, k]]
            if values.size == 0:
                raise DataError(
                    f"{label} is never observed; remove it from `outcomes`."
                )
            if np.all(values == values[0]):
                raise DataError(
                    f"{label} takes the single value {values[0]:g} at every observed "
                    f"entry ({values.size}); a constant outcome has no variance to model: remove "
                    "it from `outcomes` or check the column."
                )
        empty = ~observed.any(axis=(1, 2))
        if empty.any():
            ids = [units[i] for i in np.flatnonzero(empty)]
            subject = (
                f"unit {show(ids[0])} has" if len(ids) == 1 else f"units {show_list(ids)} have"
            )
            raise DataError(
                f"{subject} no observed outcome at any wave; drop "
                f"{'its' if len(ids) == 1 else 'their'} rows from the data (a unit without "
                "outcomes carries no information about them)."
            )
        for name, array, names in (("x", x, time_varying), ("z", z, time_invariant)):
            for q, column in enumerate(names):
                values = array[..., q].ravel()
                if values.size and np.all(values == values[0]):
                    kind = "time-varying" if name == "x" else "time-invariant"
                    raise DataError(
                        f"{kind} covariate {show(column)} takes the single value {values[0]:g} "
                        "for every unit and wave; a constant covariate cannot be told apart "
                        "from the intercept (its effect is not identified): remove it from "
                        f"`{'time_varying' if name == 'x' else 'time_invariant'}`."
                    )
        check_magnitudes(y, x, z, observed_names, time_varying, time_invariant, labels=described)
        categories = settle_categories(self.categories, observed_names, y, described)
        for name, value in (
            ("units", units),
            ("waves", waves),
            ("outcomes", outcomes),
            ("indicators", indicators),
            ("time_varying", time_varying),
            ("time_invariant", time_invariant),
            ("y", y),
            ("x", x),
            ("z", z),
            ("categories", categories),
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
        outcomes: Sequence[str] | str | Mapping[str, Sequence[str] | str],
        time_varying: Sequence[str] | str = (),
        time_invariant: Sequence[str] | str = (),
        drop_incomplete_covariates: bool = False,
        categorical: Mapping[str, Any] | None = None,
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
        outcomes : sequence of str, str, or mapping of str to sequence of str
            Outcome columns (the K processes), one observed score per process and wave.
            Or a mapping from each process to its indicator columns, e.g.
            ``{"sleep": ["rested", "fell_asleep", "woke_rarely"]}``: the process is then a
            latent variable measured at every wave by those columns (docs/model-family.md,
            "Several indicators per wave"). Missing values are kept as missing, indicator by
            indicator.
        time_varying : sequence of str or str, optional
            Time-varying covariate columns x.
        time_invariant : sequence of str or str, optional
            Time-invariant covariate columns z; each must be constant within a unit (missing
            entries are allowed as long as the unit's other rows give the value).
        drop_incomplete_covariates : bool, default False
            Drop units with a missing covariate value (with a warning naming them) instead of
            raising.
        categorical : mapping, optional
            Binary and ordinal outcomes or indicators: ``{"woke": "binary", "rested":
            "ordinal"}`` reads the categories from integer codes in the data;
            ``{"rested": ["never", "sometimes", "often"]}`` gives labels in order. The panel
            then holds category positions 0..C-1 and records the categories in
            :attr:`categories`. A category that is never observed, a label not in the
            declared list and a non-integer code are errors (docs/model-family.md,
            "Categorical indicators").

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
            With indicators, every value check runs per indicator and names it; an indicator
            listed for two processes (or twice), a process without indicators, and an
            indicator that is also a covariate are refused.

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
        return cls(**read_long(
            df, unit=unit, wave=wave, outcomes=outcomes, time_varying=time_varying,
            time_invariant=time_invariant, drop_incomplete_covariates=drop_incomplete_covariates,
            categorical=categorical))

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
        categorical: Mapping[str, Any] | None = None,
    ) -> Panel:
        """Build a panel from wide data: one row per unit, one column per variable and wave.

        Parameters
        ----------
        df : pandas.DataFrame
            Wide data. Rows are named in messages by their index label.
        unit : hashable
            Column holding the unit id.
        outcomes : mapping of str to sequence of column names, or to a mapping
            For each outcome, its columns in wave order, e.g. ``{"y": ["y1", "y2", "y3"]}``.
            A process measured by several indicators maps to a mapping from each indicator
            to its columns in wave order: ``{"sleep": {"rested": ["r1", "r2", "r3"],
            "fell_asleep": ["f1", "f2", "f3"]}}`` (one column per indicator and wave; a
            column may be ``None`` where an indicator was not asked at that wave, which makes
            it missing there). Every indicator, outcome and time-varying covariate lists the
            same number T of columns.
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
        categorical : mapping, optional
            Categorical outcomes or indicators, as in :meth:`from_long` (all waves of a
            variable share its categories).

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
        return cls(**read_wide(
            df, unit=unit, outcomes=outcomes, time_varying=time_varying,
            time_invariant=time_invariant, waves=waves,
            drop_incomplete_covariates=drop_incomplete_covariates, categorical=categorical))

    # ---------------------------------------------------------------- sizes and equality

    @property
    def n_units(self) -> int:
        """Number of units N."""
        return len(self.units)

    @property
    def n_waves(self) -> int:
        """Number of waves T."""
        return len(self.waves)

    @property
    def observed_names(self) -> tuple[str, ...]:
        """Names of the observed variables, the last axis of :attr:`y` (indicators in order)."""
        return tuple(name for group in self.indicators.values() for name in group)

    @property
    def has_indicators(self) -> bool:
        """True when some process is measured by an indicator other than itself."""
        return any(group != (name,) for name, group in self.indicators.items())

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Panel):
            return NotImplemented
        return (
            self.units == other.units
            and self.waves == other.waves
            and self.outcomes == other.outcomes
            and self.indicators == other.indicators
            and self.time_varying == other.time_varying
            and self.time_invariant == other.time_invariant
            and self.categories == other.categories
            and arrays_equal(self.y, other.y)
            and arrays_equal(self.x, other.x)
            and arrays_equal(self.z, other.z)
        )

    __hash__ = None  # type: ignore[assignment]  # equality compares arrays

    def __repr__(self) -> str:
        waves = (
            f"{show(self.waves[0])}..{show(self.waves[-1])}" if self.waves else ""
        )
        return (
            f"Panel(n_units={self.n_units}, n_waves={self.n_waves} ({waves}), "
            f"outcomes={self.outcomes}, "
            + (f"indicators={dict(self.indicators)}, " if self.has_indicators else "")
            + f"time_varying={self.time_varying}, "
            f"time_invariant={self.time_invariant})"
        )

    # ---------------------------------------------------------------- engine views

    def outcome_matrix(self) -> np.ndarray:
        """Return the outcomes as one row per unit, process-major.

        Returns
        -------
        numpy.ndarray of float, shape (N, J*T)
            Columns ``[y_1 at waves 1..T, y_2 at waves 1..T, ...]`` over the observed
            variables (:attr:`observed_names`; J = K with one indicator per process); NaN
            where missing.
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

        # u_i = (1, w_i, y_i) with missing outcome entries set to 0 (docs/engine.md).
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
        and the engine's cost per gradient is independent of N (docs/engine.md).
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
            indicators=self.indicators,
            time_varying=self.time_varying,
            time_invariant=self.time_invariant,
            y=y[keep],
            x=self.x[keep, :n_waves],
            z=self.z[keep],
            categories=self.categories,
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
        names = self.observed_names + self.time_varying + self.time_invariant
        for name in names:
            if name in (UNIT, WAVE):
                raise DataError(
                    f"a variable is named {show(name)}, which to_long uses for its index column; "
                    "rename it before building the panel."
                )
        n, t = self.n_units, self.n_waves
        data: dict[Hashable, Any] = {
            UNIT: pd.Index(list(self.units)).repeat(t),
            WAVE: pd.Index(list(self.waves))[np.tile(np.arange(t), n)],
        }
        for k, name in enumerate(self.observed_names):
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
            (missing), and ``count``. With several indicators per process the columns of
            both tables are the indicators (the share observed per indicator and wave), and
            ``indicators`` maps each process to its indicators.
        """
        observed = pd.DataFrame(
            (~np.isnan(self.y)).mean(axis=0),
            index=pd.Index(list(self.waves), name=WAVE),
            columns=list(self.observed_names),
        )
        patterns = self.patterns()
        t = self.n_waves
        table = pd.DataFrame(
            {
                name: [
                    "".join("o" if seen else "." for seen in mask[k * t : (k + 1) * t])
                    for mask in patterns.masks
                ]
                for k, name in enumerate(self.observed_names)
            }
        )
        table["count"] = patterns.counts
        table.index.name = "pattern"
        extra = {"indicators": dict(self.indicators)} if self.has_indicators else {}
        return {
            "n_units": self.n_units,
            "n_waves": self.n_waves,
            "waves": self.waves,
            "outcomes": self.outcomes,
            **extra,
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
        A process measured by several indicators takes the scale of its first listed
        indicator (the default marker, whose unit the latent borrows); every indicator's own
        scale is in :meth:`indicator_scale`.
        """
        ind = self.indicator_scale()
        return {name: ind[group[0]] for name, group in self.indicators.items()}

    def indicator_scale(self) -> dict[str, dict[str, float]]:
        """Each observed variable's location and scale, as :meth:`summary_scale` defines them."""
        scales: dict[str, dict[str, float]] = {}
        for k, name in enumerate(self.observed_names):
            values = self.y[:, :, k]
            seen = ~np.isnan(values)
            first = int(np.argmax(seen.any(axis=0)))
            pooled = values[seen]
            sd = float(np.std(pooled, ddof=1)) if pooled.size > 1 else float("nan")
            scales[name] = {"mean": float(values[seen[:, first], first].mean()), "sd": sd}
        return scales


def check_panel(panel: Any) -> Panel:
    """Return ``panel`` if it is a :class:`Panel`; otherwise raise saying how to make one."""
    if isinstance(panel, Panel):
        return panel
    if isinstance(panel, pd.DataFrame):
        raise DataError(
            "`panel` must be a bayeslong Panel; got a pandas DataFrame. Build one with "
            "bl.Panel.from_long(df, unit=..., wave=..., outcomes=[...]) (one row per unit and "
            "wave) or bl.Panel.from_wide(df, unit=..., outcomes={...}) (one row per unit).")
    raise DataError(f"`panel` must be a bayeslong Panel (bl.Panel.from_long or "
                    f"bl.Panel.from_wide); got a {type(panel).__name__}.")

