"""Declaring categorical variables at intake: categories read from the data, clear errors.

Expected values are the data written in each test (categories in the order declared or
the integer codes' order); error tests assert the wording.
"""

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl


def _long(**columns):
    n = len(next(iter(columns.values())))
    return pd.DataFrame({"id": np.repeat(np.arange(n // 3), 3), "t": np.tile([1, 2, 3], n // 3),
                         **columns})


def test_labels_in_declared_order_become_positions():
    df = _long(rested=["never", "often", "sometimes", "sometimes", "never", "often"])
    panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                               categorical={"rested": ["never", "sometimes", "often"]})
    assert panel.categories == {"rested": ("never", "sometimes", "often")}
    np.testing.assert_array_equal(panel.y[:, :, 0], [[0, 2, 1], [1, 0, 2]])


def test_integer_codes_and_binary_with_a_continuous_outcome():
    df = _long(rested=[1, 3, 2, 2, 1, 3], woke=[0, 1, 1, 0, 0, 1], y=[0.1, 0.5, 0.3, 1.2, 0.4, 0.2])
    panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested", "woke", "y"],
                               categorical={"rested": "ordinal", "woke": "binary"})
    assert panel.categories == {"rested": (1, 2, 3), "woke": (0, 1)}
    np.testing.assert_array_equal(panel.y[0, :, 0], [0, 2, 1])
    np.testing.assert_array_equal(panel.y[1, :, 1], [0, 0, 1])
    assert panel.y[0, 0, 2] == pytest.approx(0.1)  # continuous values untouched


def test_wide_intake_codes_all_waves_together():
    df = pd.DataFrame({"id": [1, 2, 3], "r1": ["never", "often", "sometimes"],
                       "r2": ["often", "often", "never"], "r3": ["never", None, "sometimes"]})
    panel = bl.Panel.from_wide(df, unit="id", outcomes={"rested": ["r1", "r2", "r3"]},
                               categorical={"rested": ["never", "sometimes", "often"]})
    np.testing.assert_array_equal(panel.y[:, :, 0], [[0, 2, 0], [2, 2, np.nan], [1, 0, 1]])


def test_empty_category_is_refused():
    df = _long(rested=["never", "often", "never", "often", "never", "often"])
    with pytest.raises(bl.DataError, match=r"category 'sometimes' of 'rested' is never observed; "
                       r"a category without observations has no threshold"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                           categorical={"rested": ["never", "sometimes", "often"]})


def test_empty_integer_code_is_refused():
    df = _long(rested=[1, 2, 4, 4, 2, 1])
    with pytest.raises(bl.DataError, match=r"category 3 of 'rested' is never observed \(its codes "
                       r"run from 1 to 4\)"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                           categorical={"rested": "ordinal"})


def test_label_not_in_declared_order_is_refused():
    df = _long(rested=["never", "often", "rarely", "often", "never", "often"])
    with pytest.raises(bl.DataError, match=r"column 'rested' row 2 holds 'rarely', which is not "
                       r"among the categories declared for 'rested' \('never' and 'often'\); add "
                       r"it to the list"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                           categorical={"rested": ["never", "often"]})


def test_non_integer_code_is_refused():
    df = _long(rested=[1, 2, 2.5, 1, 2, 3])
    with pytest.raises(bl.DataError, match=r"column 'rested' row 2 holds 2.5, not an integer "
                       r"category code; ordinal variable 'rested' takes integer codes"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                           categorical={"rested": "ordinal"})


def test_text_without_declared_labels_and_unknown_names_are_refused():
    df = _long(rested=["never", "often", "never", "often", "never", "often"])
    with pytest.raises(bl.DataError, match=r"holds the text 'never'; ordinal variable 'rested' "
                       r"is read from integer codes. Declare its labels in order"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                           categorical={"rested": "ordinal"})
    with pytest.raises(bl.DataError, match=r"`categorical` names 'sleep', which is not an outcome"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["rested"],
                           categorical={"sleep": "ordinal"})


def test_binary_with_three_values_is_refused():
    df = _long(woke=[0, 1, 2, 0, 1, 2])
    with pytest.raises(bl.DataError, match=r"binary variable 'woke' takes 3 values \(0, 1 and 2\); "
                       r"a binary variable has two"):
        bl.Panel.from_long(df, unit="id", wave="t", outcomes=["woke"],
                           categorical={"woke": "binary"})
