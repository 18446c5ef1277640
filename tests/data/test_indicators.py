"""Intake of processes measured by several indicators per wave (long and wide layouts).

Data are invented here, with fixed seeds; expected values are worked by hand from them.
"""

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import DataError

ITEMS = ["rested", "fell_asleep", "woke_rarely"]


@pytest.fixture(scope="module")
def long_frame():
    rng = np.random.default_rng(11)
    df = pd.DataFrame({"id": np.repeat(np.arange(6), 4), "t": np.tile([1, 2, 3, 4], 6)})
    for item in ITEMS:
        df[item] = rng.normal(size=len(df))
    df.loc[5, "woke_rarely"] = np.nan  # unit 1, wave 2: one indicator missing
    df.loc[9, ["rested", "fell_asleep", "woke_rarely"]] = np.nan  # unit 2, wave 2: all missing
    return df


def test_long_mapping_builds_indicator_panel(long_frame):
    panel = bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes={"sleep": ITEMS})
    assert panel.outcomes == ("sleep",)
    assert panel.indicators == {"sleep": tuple(ITEMS)}
    assert panel.observed_names == tuple(ITEMS)
    assert panel.y.shape == (6, 4, 3)
    # the array holds each indicator column as it is, unit x wave
    np.testing.assert_array_equal(panel.y[:, :, 1], long_frame["fell_asleep"].to_numpy().reshape(6, 4))
    # patterns run over indicator x wave: complete units, the one-item gap, the all-item gap
    assert panel.patterns().masks.shape[1] == 3 * 4
    assert sorted(panel.patterns().counts.tolist()) == [1, 1, 4]


def test_describe_shows_share_observed_per_indicator(long_frame):
    panel = bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes={"sleep": ITEMS})
    d = panel.describe()
    # by hand: at wave 2, 'woke_rarely' is missing for units 1 and 2 (4 of 6 observed),
    # the other two items for unit 2 only (5 of 6)
    assert list(d["observed"].columns) == ITEMS
    assert d["observed"].loc[2, "woke_rarely"] == pytest.approx(4 / 6)
    assert d["observed"].loc[2, "rested"] == pytest.approx(5 / 6)
    assert d["observed"].loc[1].tolist() == [1.0, 1.0, 1.0]
    assert d["indicators"] == {"sleep": tuple(ITEMS)}


def test_wide_mapping_matches_long(long_frame):
    long_panel = bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes={"sleep": ITEMS})
    wide = long_frame.pivot(index="id", columns="t", values=ITEMS)
    wide.columns = [f"{item}{t}" for item, t in wide.columns]
    wide = wide.reset_index()
    outcomes = {"sleep": {item: [f"{item}{t}" for t in range(1, 5)] for item in ITEMS}}
    wide_panel = bl.Panel.from_wide(wide, unit="id", outcomes=outcomes)
    assert wide_panel == long_panel
    # round trip through the long layout
    back = bl.Panel.from_long(long_panel.to_long(), unit="unit", wave="wave", outcomes={"sleep": ITEMS})
    assert back == long_panel


def test_wide_indicator_not_asked_at_a_wave(long_frame):
    wide = pd.DataFrame({"id": [1, 2, 3], "r1": [1.0, 2, 4], "r2": [2.0, 1, 3], "r3": [0.0, 1, 3],
                         "f1": [1.0, 0, 2], "f3": [2.0, 2, 1]})
    panel = bl.Panel.from_wide(wide, unit="id", outcomes={
        "sleep": {"rested": ["r1", "r2", "r3"], "fell_asleep": ["f1", None, "f3"]}})
    assert np.isnan(panel.y[:, 1, 1]).all()
    assert panel.describe()["observed"].loc[2, "fell_asleep"] == 0.0


def test_single_columns_keep_todays_panel(long_frame):
    plain = bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes=["rested"])
    mapped = bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes={"rested": ["rested"]})
    assert plain == mapped and not plain.has_indicators
    assert plain.indicators == {"rested": ("rested",)}
    assert set(plain.describe()) == {"n_units", "n_waves", "waves", "outcomes", "time_varying",
                                     "time_invariant", "observed", "patterns"}


@pytest.mark.parametrize(
    "outcomes, message",
    [
        ({"sleep": ["rested", "fell_aslep"]},
         r"column 'fell_aslep' is not in the data; did you mean 'fell_asleep'\? "
         r"\(It is named in `outcomes\['sleep'\]`.\)"),
        ({"sleep": ["rested", "woke_rarely"], "mood": ["woke_rarely", "fell_asleep"]},
         r"indicator 'woke_rarely' is listed for processes 'sleep' and 'mood'; an indicator "
         r"measures one process \(its own\).*cross_loadings="),
        ({"sleep": ["rested", "rested"]}, r"indicator 'rested' is listed for process 'sleep' twice"),
        ({"sleep": []}, r"process 'sleep' lists no indicators"),
    ],
    ids=["missing-column", "two-processes", "listed-twice", "empty"],
)
def test_indicator_errors_name_the_indicator(long_frame, outcomes, message):
    with pytest.raises(DataError, match=message):
        bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes=outcomes)


def test_value_checks_name_the_indicator(long_frame):
    constant = long_frame.assign(fell_asleep=2.0)
    with pytest.raises(DataError, match=r"indicator 'fell_asleep' of outcome 'sleep' takes the "
                                        r"single value 2 at every observed entry"):
        bl.Panel.from_long(constant, unit="id", wave="t", outcomes={"sleep": ITEMS})
    text = long_frame.astype({"rested": object})
    text.loc[3, "rested"] = "tired"
    with pytest.raises(DataError, match=r"column 'rested' row 3 holds 'tired', not a number"):
        bl.Panel.from_long(text, unit="id", wave="t", outcomes={"sleep": ITEMS})
    with pytest.raises(DataError, match=r"indicator 'rested' of process 'sleep' is also listed "
                                        r"in time_varying"):
        bl.Panel.from_long(long_frame, unit="id", wave="t", outcomes={"sleep": ITEMS},
                           time_varying=["rested"])


def test_magnitude_check_names_the_indicator(long_frame):
    huge = long_frame.assign(woke_rarely=long_frame["woke_rarely"] * 1e170)
    with pytest.raises(DataError, match=r"indicator 'woke_rarely' of outcome 'sleep' has values as "
                                        r"large as [0-9.]+e\+1[67][0-9]; .* Rescale it"):
        bl.Panel.from_long(huge, unit="id", wave="t", outcomes={"sleep": ITEMS})
