"""Categorical indicators: declaring them, reading their categories, coding them 0..C-1.

An observed variable may be binary or ordinal (docs/model-family.md, "Categorical
indicators"). It is declared at intake, ``categorical={"rested": "ordinal", "woke":
"binary"}`` (categories read from integer codes in the data) or ``categorical={"rested":
["never", "sometimes", "often"]}`` (labels, in their order). The panel stores the positions
0..C-1 of the categories as its values and records each variable's categories (the codes or
labels, in order) in :attr:`Panel.categories`; the model reads the positions, messages and
reports the labels. Every category must be observed somewhere: a category without
observations has no threshold the data could place.
"""

from __future__ import annotations

import numbers
from collections.abc import Hashable, Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from bayeslong.errors import DataError
from bayeslong.wording import as_python, show, show_list

#: The declarations a variable may get besides a list of labels.
KINDS = ("ordinal", "binary")


def read_categorical(categorical: Any, observed: Sequence[Hashable]) -> dict:
    """Check the ``categorical`` argument of intake; return ``{name: "ordinal" | "binary" |
    tuple of labels}`` in the order of ``observed``."""
    if categorical is None:
        return {}
    if not isinstance(categorical, Mapping):
        raise DataError("`categorical` maps each categorical outcome or indicator to 'ordinal', "
                        "'binary' or its labels in order, e.g. categorical={'rested': 'ordinal'} "
                        f"or {{'rested': ['never', 'sometimes', 'often']}}; got "
                        f"{type(categorical).__name__}.")
    unknown = [name for name in categorical if name not in observed]
    if unknown:
        raise DataError(f"`categorical` names {show(unknown[0])}, which is not an outcome or "
                        f"indicator of this panel (they are {show_list(observed)}); name the "
                        "observed columns that hold categories.")
    out = {}
    for name in observed:
        if name not in categorical:
            continue
        kind = categorical[name]
        if isinstance(kind, str):
            if kind not in KINDS:
                raise DataError(f"`categorical[{name!r}]` is {kind!r}; give 'ordinal', 'binary' or "
                                "the category labels in order, e.g. ['never', 'sometimes', 'often'].")
            out[name] = kind
            continue
        if not isinstance(kind, Sequence) or isinstance(kind, (bytes, Mapping)):
            raise DataError(f"`categorical[{name!r}]` must be 'ordinal', 'binary' or a list of "
                            f"labels in order; got {kind!r}.")
        labels = tuple(as_python(v) for v in kind)
        if len(labels) < 2:
            raise DataError(f"`categorical[{name!r}]` lists {len(labels)} label(s); a categorical "
                            "variable needs at least two categories.")
        if len(set(labels)) != len(labels):
            twice = pd.Index(labels)[pd.Index(labels).duplicated()][0]
            raise DataError(f"`categorical[{name!r}]` lists {show(twice)} twice; each category "
                            "appears once, in order from lowest to highest.")
        out[name] = labels
    return out


def code_categories(values: Any, where: Sequence[str], name: Hashable,
                    kind: Any) -> tuple[np.ndarray, tuple]:
    """Turn one variable's raw entries into category positions 0..C-1 (NaN where missing).

    ``values`` are the raw entries (any dtype), ``where[i]`` says where entry i stands
    (``"column 'rested' row 3"``), ``kind`` as :func:`read_categorical` returns it. Returns
    the positions and the categories in order (integer codes, or the declared labels).
    """
    raw = pd.Series(list(values), dtype=object)
    missing = raw.isna().to_numpy()
    if isinstance(kind, tuple):
        lookup = {label: k for k, label in enumerate(kind)}
        codes = np.full(len(raw), np.nan)
        for i, v in enumerate(raw):
            if missing[i]:
                continue
            v = as_python(v)
            if isinstance(v, float) and v.is_integer() and int(v) in lookup:
                v = int(v)
            if v not in lookup:
                raise DataError(
                    f"{where[i]} holds {show(v)}, which is not among the "
                    f"categories declared for {show(name)} ({show_list(kind)}); add it to the "
                    "list in its place in the order, or fix the entry.")
            codes[i] = lookup[v]
        categories = kind
    else:
        numeric = np.full(len(raw), np.nan)
        for i, v in enumerate(raw):
            if missing[i]:
                continue
            v = as_python(v)
            if isinstance(v, (bool, np.bool_)):
                v = int(v)
            if not isinstance(v, numbers.Real):
                raise DataError(
                    f"{where[i]} holds the text {show(v)}; {kind} variable "
                    f"{show(name)} is read from integer codes. Declare its labels in order "
                    f"instead, categorical={{{name!r}: ['low', 'middle', 'high']}}, or recode it.")
            if not float(v).is_integer():
                raise DataError(
                    f"{where[i]} holds {show(v)}, not an integer category "
                    f"code; {kind} variable {show(name)} takes integer codes (e.g. 1, 2, 3). "
                    "Fix the entry, or declare the variable as continuous by leaving it out of "
                    "`categorical`.")
            numeric[i] = float(v)
        seen = numeric[~np.isnan(numeric)]
        if seen.size == 0:
            return numeric, ()
        low, high = int(seen.min()), int(seen.max())
        if kind == "binary" and len(np.unique(seen)) > 2:
            raise DataError(
                f"binary variable {show(name)} takes {len(np.unique(seen))} values "
                f"({show_list([int(v) for v in np.unique(seen)])}); a binary variable has two. "
                f"Declare it categorical={{{name!r}: 'ordinal'}}, or recode it.")
        categories = (tuple(int(v) for v in np.unique(seen)) if kind == "binary"
                      else tuple(range(low, high + 1)))
        codes = np.where(np.isnan(numeric), np.nan,
                         np.searchsorted(np.array(categories), np.nan_to_num(numeric)))
    counts = np.bincount(codes[~np.isnan(codes)].astype(np.int64), minlength=len(categories))
    empty = [categories[k] for k in np.flatnonzero(counts == 0)]
    if empty and len(categories) > 1 and counts.sum() > 0:
        ranged = "" if isinstance(kind, tuple) else \
            f" (its codes run from {show(categories[0])} to {show(categories[-1])})"
        raise DataError(
            f"category {show(empty[0])} of {show(name)} is never observed{ranged}; a category "
            "without observations has no threshold the data could place. Merge it with a "
            "neighbouring category (recode the data and leave it out of the list), or "
            "check the column.")
    return codes.astype(float), tuple(categories)


def settle_categories(categories: Any, observed: Sequence[Hashable], y: np.ndarray,
                      labels: Sequence[str]) -> dict:
    """Check a panel's ``categories`` against its values: positions 0..C-1, every one used.

    Returns ``{name: categories}`` in the order of ``observed`` (empty without any).
    """
    if not categories:
        return {}
    if not isinstance(categories, Mapping):
        raise DataError("`categories` maps each categorical variable to its categories in "
                        f"order; got {type(categories).__name__}.")
    out = {}
    for k, name in enumerate(observed):
        if name not in categories:
            continue
        cats = tuple(as_python(c) for c in categories[name])
        values = y[..., k][~np.isnan(y[..., k])]
        if len(cats) < 2:
            raise DataError(f"{labels[k]} is declared categorical with {len(cats)} category; "
                            "a categorical variable needs at least two.")
        bad = values[(values != np.round(values)) | (values < 0) | (values >= len(cats))]
        if bad.size:
            raise DataError(f"{labels[k]} holds {bad[0]:g}, which is not a category position "
                            f"0..{len(cats) - 1} of its categories {show_list(cats)}; build "
                            "categorical panels with from_long or from_wide and `categorical`.")
        used = np.bincount(values.astype(np.int64), minlength=len(cats))
        if (used == 0).any():
            raise DataError(f"category {show(cats[int(np.argmax(used == 0))])} of {labels[k]} is "
                            "never observed; a category without observations has no threshold "
                            "the data could place: merge it with a neighbouring category.")
        out[name] = cats
    unknown = [name for name in categories if name not in observed]
    if unknown:
        raise DataError(f"`categories` names {show(unknown[0])}, which is not an observed "
                        f"variable of the panel ({show_list(observed)}).")
    return out
