"""A battery of bad inputs, as a new user makes them, through the API and the command line.

Every case must end in one bayeslong error (a DataError or SpecError, never a raw Python,
NumPy or pandas exception) whose message names the place (argument, column, line, file)
and the fix; on the command line, as one ``error:`` line and exit code 1. The wording is
asserted. Data are simulated here with a fixed seed.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import BayeslongError, DataError, SpecError
from bayeslong.workflow.cli import main

AR = {"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0, "initial_var": 1.0, "resid_var": 1.0}


def _frame(n: int = 30, t: int = 4, seed: int = 1) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    level = rng.normal(size=n)
    rows = [dict(id=i, t=w, y=level[i] + 0.3 * w + rng.normal(), x=rng.normal(),
                 one=1.0, z=float(i % 2)) for i in range(n) for w in range(t)]
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def frame():
    return _frame()


@pytest.fixture(scope="module")
def panel(frame):
    return bl.Panel.from_long(frame, unit="id", wave="t", outcomes=["y"], time_varying=["x"])


# --------------------------------------------------------------------------------------------
# the wrong kind of object where a Panel or a model is expected
# --------------------------------------------------------------------------------------------

DATAFRAME_FOR_PANEL = "`panel` must be a bayeslong Panel; got a pandas DataFrame. Build one with bl.Panel.from_long"
TEXT_FOR_SPEC = r"`spec` must be a model from bl.model\(...\); got the text 'alt'. Pass bl.model\('alt'\)"


@pytest.mark.parametrize("call", [
    pytest.param(lambda df, p: bl.fit_ml(bl.model("alt"), df), id="fit_ml"),
    pytest.param(lambda df, p: bl.fit(bl.model("alt"), df), id="fit"),
    pytest.param(lambda df, p: bl.identify(bl.model("alt"), df), id="identify"),
    pytest.param(lambda df, p: bl.prior_predictive(bl.model("alt"), df), id="prior_predictive"),
    pytest.param(lambda df, p: bl.forecast_score(bl.model("alt"), df), id="forecast_score"),
    pytest.param(lambda df, p: bl.lag_sensitivity(df), id="lag_sensitivity"),
])
def test_a_dataframe_where_a_panel_belongs_says_how_to_build_one(call, frame, panel):
    with pytest.raises(DataError, match=DATAFRAME_FOR_PANEL):
        call(frame, panel)


@pytest.mark.parametrize("call", [
    pytest.param(lambda p: bl.fit_ml("alt", p), id="fit_ml"),
    pytest.param(lambda p: bl.fit("alt", p), id="fit"),
    pytest.param(lambda p: bl.identify("alt", p), id="identify"),
    pytest.param(lambda p: bl.simulate("alt", {}, 10, 4, seed=1), id="simulate"),
    pytest.param(lambda p: bl.plan("alt", {}, kind="fit_ml"), id="plan"),
])
def test_a_model_name_where_a_spec_belongs_says_to_call_model(call, panel):
    with pytest.raises(SpecError, match=TEXT_FOR_SPEC):
        call(panel)


def test_a_panel_where_a_fit_belongs_names_the_function(panel):
    with pytest.raises(DataError, match=r"power_scaling needs a fit made by bl.fit .* got a Panel"):
        bl.power_scaling(panel)


# --------------------------------------------------------------------------------------------
# counts, seeds and grids
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs, message", [
    ({"starts": 0}, "`starts` of fit_ml must be at least 1; got 0."),
    ({"starts": -2}, "`starts` of fit_ml must be at least 1; got -2."),
    ({"starts": 1.5}, "`starts` of fit_ml must be a whole number of at least 1; got 1.5."),
    ({"seed": "x"}, "`seed` of fit_ml must be a whole number of at least 0; got 'x'."),
], ids=["starts-0", "starts-negative", "starts-fraction", "seed-text"])
def test_fit_ml_counts(kwargs, message, panel):
    with pytest.raises(SpecError, match="^" + message.replace("(", r"\(").replace(")", r"\)") + "$"):
        bl.fit_ml(bl.model("ar"), panel, **kwargs)


def test_fit_ml_refuses_categorical_variables(frame):
    # category codes read as scores would be a silent error: the message says what to use
    coded = frame.assign(y=np.digitize(frame["y"], [0.0, 1.0]) + 1)
    ordinal = bl.Panel.from_long(coded, unit="id", wave="t", outcomes=["y"],
                                 categorical={"y": "ordinal"})
    with pytest.raises(DataError, match=r"fit_ml: the panel declares categorical variables "
                                        r"\('y'\).*bl\.fit.*without categorical="):
        bl.fit_ml(bl.model("linear-growth"), ordinal)


def test_fit_seed_and_identify_points(panel):
    with pytest.raises(SpecError, match="`seed` of fit must be a whole number of at least 0; got 'a'"):
        bl.fit(bl.model("ar"), panel, seed="a")
    with pytest.raises(SpecError, match="`points` of identify must be at least 1; got 0"):
        bl.identify(bl.model("ar"), panel, points=0)


@pytest.mark.parametrize("kwargs, message", [
    ({"n_units": []}, r"`n_units` of plan is empty; give at least one value, e.g. \[30, 60, 120\]"),
    ({"n_waves": ()}, r"`n_waves` of plan is empty"),
    ({"n_units": "30,60"}, r"`n_units` of plan must be a list of whole numbers, e.g. \[30, 60, 120\]; got '30,60'"),
    ({"n_waves": [2]}, r"`n_waves` of plan must be at least 3; got 2"),
    ({"replications": 1}, r"`replications` of plan must be at least 2; got 1"),
], ids=["units-empty", "waves-empty", "units-text", "waves-too-few", "one-replication"])
def test_plan_grids_are_checked_before_any_fit(kwargs, message):
    with pytest.raises(SpecError, match=message):
        bl.plan(bl.model("ar"), AR, kind="fit_ml", **{"n_units": [20], "n_waves": [4], **kwargs})


# --------------------------------------------------------------------------------------------
# data that are accepted today only silently or with a NumPy warning
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("role, message", [
    ("time_varying", "time-varying covariate 'one' takes the single value 1 for every unit and wave; "
                     "a constant covariate cannot be told apart from the intercept"),
    ("time_invariant", "time-invariant covariate 'one' takes the single value 1 for every unit and "
                       "wave; .* remove it from `time_invariant`"),
], ids=["time-varying", "time-invariant"])
def test_a_constant_covariate_is_refused(role, message, frame):
    with pytest.raises(DataError, match=message):
        bl.Panel.from_long(frame, unit="id", wave="t", outcomes=["y"], **{role: ["one"]})


def test_values_that_overflow_the_cross_products_are_refused(frame):
    # 1e160 squared is 1e320, beyond double precision's largest number (about 1.8e308)
    huge = frame.assign(y=frame["y"] * 1e160)
    with pytest.raises(DataError, match=r"outcome 'y' has values as large as [0-9.]+e\+160; .* "
                                        r"Rescale it \(divide by a power of ten, e.g. 1e160\)"):
        bl.Panel.from_long(huge, unit="id", wave="t", outcomes=["y"])


def test_a_scale_far_from_one_warns(frame):
    with pytest.warns(UserWarning, match="outcome 'y' has standard deviation [0-9.]+e\\+08; "
                                         "estimates lose precision"):
        bl.Panel.from_long(frame.assign(y=frame["y"] * 1e8), unit="id", wave="t", outcomes=["y"])


def test_numbered_text_waves_are_ordered_by_their_numbers_and_say_so():
    rng = np.random.default_rng(2)
    df = pd.DataFrame([dict(id=i, t=f"t{w}", y=rng.normal() + 0.1 * w)
                       for i in range(8) for w in range(1, 12)])
    with pytest.warns(UserWarning, match=r"the wave labels in column 't' are text with numbers in "
                                         r"them; they are ordered by those numbers \('t1', 't2'"):
        panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"])
    assert panel.waves == tuple(f"t{w}" for w in range(1, 12))
    # the values follow their labels: wave t10 is the tenth column
    expected = df[df["t"] == "t10"].sort_values("id")["y"].to_numpy()
    np.testing.assert_array_equal(panel.y[:, 9, 0], expected)


def test_an_outcome_never_observed_is_named(frame):
    with pytest.raises(DataError, match="outcome 'y' is never observed; remove it from `outcomes`"):
        bl.Panel.from_long(frame.assign(y=np.nan), unit="id", wave="t", outcomes=["y"])


# --------------------------------------------------------------------------------------------
# the command line: one line, exit code 1, the file and its line named
# --------------------------------------------------------------------------------------------

def _study(folder, *, data: str = "d.csv", output: str = "out"):
    path = folder / "s.toml"
    path.write_text(f"""
title = "bad input"
output = "{output}"
[data]
path = "{data}"
unit = "id"
wave = "t"
outcomes = ["y"]
[[models]]
model = "ar"
[sampling]
method = "ml"
""")
    return path


def _error_line(capsys) -> str:
    err = capsys.readouterr().err
    lines = [x for x in err.splitlines() if x.strip()]
    assert "Traceback" not in err
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    return lines[0]


def test_cli_output_that_is_a_file(tmp_path, capsys):
    _frame().to_csv(tmp_path / "d.csv", index=False)
    (tmp_path / "taken.txt").write_text("x")
    assert main(["run", str(_study(tmp_path, output="taken.txt"))]) == 1
    line = _error_line(capsys)
    assert line.startswith("error: study file s.toml: `output` names ")
    assert "taken.txt' is an existing file, not a folder; give a folder path" in line


def test_cli_data_file_with_a_header_and_no_rows(tmp_path, capsys):
    (tmp_path / "d.csv").write_text("id,t,y\n")
    assert main(["check-data", str(_study(tmp_path))]) == 1
    line = _error_line(capsys)
    assert line == ("error: the data file d.csv has a header ('id', 't' and 'y') but no rows; put "
                    "the panel's rows in it, one per unit and wave (long) or per unit (wide), or "
                    "point `data.path` at the right file.")


def test_cli_names_the_line_of_the_file_not_pandas_row(tmp_path, capsys):
    df = _frame().astype({"y": object})
    df.loc[6, "y"] = "n/a?"  # the 7th data row: line 8 of the file (line 1 is the header)
    df.to_csv(tmp_path / "d.csv", index=False)
    assert main(["check-data", str(_study(tmp_path))]) == 1
    line = _error_line(capsys)
    assert line.startswith("error: column 'y' line 8 of d.csv holds 'n/a?', not a number")
    assert "Fix those entries in the file" in line and "pd.to_numeric" not in line


@pytest.mark.parametrize("grid", ["", "a,b", "30,,60"], ids=["empty", "words", "gap"])
def test_cli_plan_grid_that_is_not_numbers(grid, capsys):
    assert main(["plan", "ar", "--units-grid", grid, "--waves-grid", "4", "--ml"]) == 1
    assert _error_line(capsys) == ("error: `--units-grid` takes whole numbers separated by commas, "
                                   f"e.g. 30,60,120; got {grid!r}")


def test_cli_simulate_into_a_folder_or_through_a_file(tmp_path, capsys):
    (tmp_path / "f.txt").write_text("x")
    assert main(["simulate", "ar", "-o", str(tmp_path)]) == 1
    assert "is a folder; give a file name" in _error_line(capsys)
    assert main(["simulate", "ar", "-o", str(tmp_path / "f.txt" / "sim.csv")]) == 1
    assert "f.txt' is an existing file, not a folder" in _error_line(capsys)


def test_no_bad_input_here_ends_in_a_raw_exception(frame, panel):
    """Sweep: each of these must raise a BayeslongError (the class tells the user it is theirs)."""
    calls = [
        lambda: bl.fit_ml(bl.model("alt"), frame),
        lambda: bl.fit_ml(bl.model("ar"), panel, starts=0),
        lambda: bl.plan(bl.model("ar"), AR, n_units=[], kind="fit_ml"),
        lambda: bl.Panel.from_long(frame, unit="id", wave="t", outcomes=["y"], time_varying=["one"]),
        lambda: bl.simulate(bl.model("ar"), {"lag": "a"}, 10, 4, seed=1),
        lambda: bl.power_scaling(panel),
    ]
    for call in calls:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with pytest.raises(BayeslongError):
                call()
