"""Processes measured by several indicators: reading, checking and naming them.

A process (an outcome of the model) is either observed directly, one score per wave, or a
latent variable measured at every wave by several indicators (docs/model-family.md,
"Several indicators per wave"). The intake reads the second form from a mapping
``{"sleep": ["rested", "fell_asleep", "woke_rarely"]}`` (long data) or
``{"sleep": {"rested": [...], ...}}`` (wide data, one column per indicator and wave). The
list form of today, ``outcomes=["y"]``, is the special case where each process is its own
single indicator. Every message names the indicator and its process.
"""

from __future__ import annotations

from collections.abc import Hashable, Mapping
from typing import Any

from bayeslong.data.validation import name_tuple
from bayeslong.errors import DataError
from bayeslong.wording import show


def _group(process: Any, columns: Any, role: str) -> tuple:
    """One process's indicator names as a tuple (a single name stands for itself)."""
    names = name_tuple(columns, f"{role}[{process!r}]")
    if not names:
        raise DataError(f"process {show(process)} lists no indicators in `{role}`; name at least "
                        f"one column, e.g. {role}={{{process!r}: ['item1', 'item2', 'item3']}}.")
    return names


def read_outcomes(outcomes: Any, role: str = "outcomes") -> tuple[tuple, dict | None]:
    """``(processes, indicators)`` from the ``outcomes`` argument of long intake.

    A sequence (or one name) keeps today's meaning, one observed column per process:
    indicators is then None. A mapping gives each process its indicator columns.
    """
    if not isinstance(outcomes, Mapping):
        return name_tuple(outcomes, role), None
    indicators = {process: _group(process, columns, role) for process, columns in outcomes.items()}
    return tuple(indicators), indicators


def read_wide_outcomes(outcomes: Mapping) -> tuple[dict, dict]:
    """``(per-wave columns by observed variable, indicators by process)`` for wide intake.

    ``{"y": ["y1", "y2", "y3"]}`` is one process observed directly; ``{"sleep": {"rested":
    ["r1", "r2", "r3"], ...}}`` a process measured by indicators, each with its columns in
    wave order.
    """
    columns: dict[Hashable, list] = {}
    indicators: dict[Hashable, tuple] = {}
    for process, value in outcomes.items():
        if isinstance(value, Mapping):
            if not value:
                raise DataError(f"process {show(process)} lists no indicators in `outcomes`; map "
                                "each indicator to its columns in wave order, e.g. "
                                f"{{{process!r}: {{'item1': ['a1', 'a2', 'a3']}}}}.")
            indicators[process] = tuple(value)
            for name, cols in value.items():
                if name in columns:
                    raise DataError(_twice(name, _owner(indicators, name, process), process))
                columns[name] = list(_wave_columns(cols, f"outcomes[{process!r}][{name!r}]"))
        else:
            indicators[process] = (process,)
            if process in columns:
                raise DataError(_twice(process, _owner(indicators, process, process), process))
            columns[process] = list(name_tuple(value, f"outcomes[{process!r}]"))
    return columns, indicators


def _wave_columns(cols: Any, role: str) -> tuple:
    """Per-wave columns of one indicator; ``None`` marks a wave where it was not measured."""
    if isinstance(cols, (str, Mapping)) or not hasattr(cols, "__iter__"):
        raise DataError(f"`{role}` must list one column per wave, e.g. ['r1', 'r2', 'r3']; "
                        f"got {cols!r}.")
    return tuple(cols)


def _owner(indicators: dict, name: Any, other: Any) -> Any:
    for process, group in indicators.items():
        if name in group and process != other:
            return process
    return other


def _twice(name: Any, first: Any, second: Any) -> str:
    where = (f"processes {show(first)} and {show(second)}" if first != second
             else f"process {show(first)} twice")
    hint = ("" if first == second else ", and to let it load on the other process too, give "
            "the model option cross_loadings={" + repr(name) + ": " + repr(second) + "}")
    return (f"indicator {show(name)} is listed for {where}; an indicator measures one process "
            f"(its own): list it under one process only{hint}.")


def settle_indicators(outcomes: tuple, indicators: Any, time_varying: tuple,
                      time_invariant: tuple) -> dict[str, tuple[str, ...]]:
    """Check the process -> indicators mapping of a panel and return it in process order.

    None means each process is its own single indicator (today's panels). An indicator
    may not measure two processes, be listed twice, share its name with another process
    (parameter names would collide), or be a covariate.
    """
    if indicators is None:
        return {name: (name,) for name in outcomes}
    if not isinstance(indicators, Mapping):
        raise DataError("`indicators` must map each outcome (process) to its indicator names, "
                        f"e.g. {{'sleep': ('rested', 'fell_asleep')}}; got {type(indicators).__name__}.")
    unknown = [p for p in indicators if p not in outcomes]
    missing = [p for p in outcomes if p not in indicators]
    if unknown or missing:
        raise DataError(f"`indicators` must name exactly the outcomes {list(outcomes)}; "
                        + (f"{show(unknown[0])} is not an outcome" if unknown
                           else f"outcome {show(missing[0])} has no entry") + ".")
    settled: dict[str, tuple[str, ...]] = {}
    owner: dict[Any, Any] = {}
    for process in outcomes:
        group = _group(process, indicators[process], "indicators")
        for name in group:
            if name in owner:
                raise DataError(_twice(name, owner[name], process))
            owner[name] = process
            if name in outcomes and name != process:
                raise DataError(
                    f"indicator {show(name)} of process {show(process)} has the name of the process "
                    f"{show(name)}; give it a name of its own (parameter names such as "
                    f"loading[{name}] would be ambiguous).")
            if len(group) > 1 and name == process:
                raise DataError(
                    f"process {show(process)} has an indicator of its own name; with several "
                    "indicators the process is a latent variable: give it a name that differs "
                    f"from its indicators (e.g. {{{process + '_latent'!r}: {list(group)}}}).")
            for role, names in (("time_varying", time_varying), ("time_invariant", time_invariant)):
                if name in names:
                    raise DataError(
                        f"indicator {show(name)} of process {show(process)} is also listed in "
                        f"{role}; an indicator cannot be a covariate: remove it from {role}.")
        settled[process] = group
    return settled


def indicator_labels(indicators: Mapping[str, tuple]) -> list[str]:
    """How messages name each observed variable: ``outcome 'y'``, or ``indicator 'rested' of
    outcome 'sleep'`` for a process measured by indicators."""
    return [f"outcome {show(process)}" if group == (process,)
            else f"indicator {show(name)} of outcome {show(process)}"
            for process, group in indicators.items() for name in group]
