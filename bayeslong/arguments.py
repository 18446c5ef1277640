"""Checks of plain arguments (counts, seeds, grids) at the public entry points.

Each raises a :class:`~bayeslong.errors.SpecError` that names the argument, shows the value
and says what is expected, so a wrong call never ends in a NumPy or SciPy traceback.
"""

from __future__ import annotations

import numbers
from collections.abc import Iterable
from typing import Any

import numpy as np

from bayeslong.errors import SpecError


def whole_number(value: Any, name: str, *, least: int = 1, where: str = "") -> int:
    """``value`` as an int when it is a whole number of at least ``least``; else raise."""
    at = f" of {where}" if where else ""
    if isinstance(value, bool) or not isinstance(value, (numbers.Integral, np.integer)):
        raise SpecError(f"`{name}`{at} must be a whole number of at least {least}; "
                        f"got {value!r}.")
    if value < least:
        raise SpecError(f"`{name}`{at} must be at least {least}; got {value}.")
    return int(value)


def seed_value(seed: Any, name: str = "seed", *, where: str = "") -> int | None:
    """A seed is None or a non-negative whole number (NumPy's SeedSequence takes no other)."""
    if seed is None:
        return None
    return whole_number(seed, name, least=0, where=where)


def acceptance_rate(value: Any, *, where: str, left_out: str) -> float | None:
    """A NUTS target acceptance rate: None (the caller's default) or a number in (0, 1).

    ``left_out`` says in the message what leaving the argument out gives.
    """
    if value is None:
        return None
    if not (isinstance(value, (int, float)) and 0.0 < float(value) < 1.0):
        raise SpecError(f"{where}: target_accept={value!r}; give a number between 0 and 1 "
                        f"(e.g. 0.9), or leave it out for {left_out}")
    return float(value)


def number_grid(values: Any, name: str, *, least: int = 1, where: str = "") -> tuple[int, ...]:
    """A non-empty sequence of whole numbers of at least ``least`` (a design grid)."""
    at = f" of {where}" if where else ""
    if isinstance(values, (numbers.Integral, np.integer)) and not isinstance(values, bool):
        values = (values,)
    if isinstance(values, (str, bytes)) or not isinstance(values, Iterable):
        raise SpecError(f"`{name}`{at} must be a list of whole numbers, e.g. [30, 60, 120]; "
                        f"got {values!r}.")
    values = tuple(values)
    if not values:
        raise SpecError(f"`{name}`{at} is empty; give at least one value, e.g. [30, 60, 120].")
    return tuple(whole_number(v, name, least=least, where=where) for v in values)
