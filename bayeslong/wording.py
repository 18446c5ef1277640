"""Wording of messages for people: values, lists and counts as a sentence shows them.

Every layer's errors name the column, row, unit, wave or parameter that is wrong; these
helpers format those names the same way everywhere (strings quoted, numbers bare, long
lists cut with their total).
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np

_NUMBER_WORDS = {2: "two", 3: "three", 4: "four", 5: "five", 6: "six", 7: "seven", 8: "eight", 9: "nine"}
_MAX_LISTED = 10


def as_python(value: Any) -> Any:
    """Return a plain Python scalar for a NumPy scalar (so messages read ``3``, not ``np.int64(3)``)."""
    return value.item() if isinstance(value, np.generic) else value


def show(value: Any) -> str:
    """Format one label or value for a message: strings quoted, numbers bare."""
    value = as_python(value)
    return repr(value) if isinstance(value, str) else str(value)


def show_list(values: Iterable[Any], limit: int = _MAX_LISTED) -> str:
    """Format labels as ``a, b and c``, cut after ``limit`` entries with the total."""
    values = list(values)
    shown = [show(v) for v in values[:limit]]
    if len(values) > limit:
        return ", ".join(shown) + f", ... ({len(values)} in all)"
    if len(shown) <= 1:
        return "".join(shown)
    return ", ".join(shown[:-1]) + " and " + shown[-1]


def count_word(n: int) -> str:
    """Spell small counts as words (``two rows``), larger ones as digits."""
    return _NUMBER_WORDS.get(n, str(n))


def plural(n: int, word: str, plural: str | None = None) -> str:
    """Return ``word`` or its plural for count ``n``."""
    return word if n == 1 else (plural or word + "s")
