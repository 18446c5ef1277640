"""Study files whose processes are measured by several indicators, and the model options of
several processes and of the measurement part in ``[[models]] options``.

References: pandas on the CSV itself (the share of units observed per indicator and wave, the
wide table reshaped from the long one), and ``bl.model(...)`` called with the same options
as the study file's table. The data are simulated here with a fixed seed.
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import DataError, SpecError
from bayeslong.model.structure import build_structure
from bayeslong.workflow.cli import main
from bayeslong.workflow.study_file import load_study

INDICATORS = {"sleep": ["rested", "fell_asleep", "woke_rarely"], "stress": ["tense", "worried"],
              "mood": ["mood"]}


def _frame() -> pd.DataFrame:
    spec = bl.model("clpm", processes=3)
    structure = build_structure(spec, outcomes=tuple(INDICATORS), n_waves=4,
                                indicators={k: tuple(v) for k, v in INDICATORS.items()})
    params = {}
    for name, kind in zip(structure.names, structure.kinds):
        params[name] = {"var": 1.0, "cov": 0.1, "lag": 0.2, "loading": 0.9}.get(kind, 0.5)
    df = bl.simulate(spec, params, 80, 4, seed=5, outcomes=tuple(INDICATORS),
                     indicators=INDICATORS)
    rng = np.random.default_rng(9)
    for item in ("rested", "tense", "mood"):  # indicator-specific gaps after wave 1
        gap = (rng.uniform(size=len(df)) < 0.2) & (df["wave"] > 1)
        df.loc[gap, item] = np.nan
    return df.rename(columns={"unit": "person", "wave": "week"})


def _outcomes_toml() -> str:
    return "{ " + ", ".join(f"{k} = {json.dumps(v)}" for k, v in INDICATORS.items()) + " }"


def _study(folder: Path, outcomes: str | None = None, options: str = "", layout: str = "long",
           frame: pd.DataFrame | None = None) -> Path:
    df = _frame() if frame is None else frame
    df.to_csv(folder / "diary.csv", index=False)
    where = 'wave = "week"' if layout == "long" else ""
    path = folder / "study.toml"
    path.write_text(f"""
title = "diary"
[data]
path = "diary.csv"
layout = "{layout}"
unit = "person"
{where}
outcomes = {outcomes or _outcomes_toml()}
[[models]]
model = "clpm"
options = {{ processes = 3 {options} }}
[sampling]
method = "ml"
""")
    return path


def test_long_layout_with_indicators_loads(tmp_path):
    study = load_study(_study(tmp_path))
    panel = study.panel()
    assert {k: list(v) for k, v in panel.indicators.items()} == INDICATORS
    assert panel.observed_names == ("rested", "fell_asleep", "woke_rarely", "tense", "worried",
                                    "mood")
    assert study.data.has_indicators


def test_check_data_names_indicators_and_their_shares(tmp_path, capsys):
    path = _study(tmp_path)
    df = pd.read_csv(tmp_path / "diary.csv")
    # reference: pandas on the file, share of rows observed per week and indicator
    shares = df.groupby("week")[[c for v in INDICATORS.values() for c in v]].agg(
        lambda s: s.notna().mean())
    assert main(["check-data", str(path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["indicators"] == INDICATORS
    for item in shares.columns:
        got = [out["observed"][str(w)][item] for w in shares.index]
        np.testing.assert_allclose(got, shares[item].to_numpy())
    assert main(["check-data", str(path)]) == 0
    text = capsys.readouterr().out
    assert "sleep: measured by rested, fell_asleep, woke_rarely" in text
    assert "mood: observed directly" in text
    assert "share observed by wave and indicator:" in text
    for item in shares.columns:
        assert item in text


def test_identify_command_with_indicators(tmp_path, capsys):
    path = _study(tmp_path, options=', same_wave = ["sleep<-stress"], '
                                    'cross_loadings = { woke_rarely = "stress" }')
    assert main(["identify", str(path), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows[0]["identified"], rows


def test_wide_layout_with_indicators_equals_long(tmp_path):
    long = _frame()
    # reference: pandas reshapes the long table to one column per indicator and week
    items = [c for v in INDICATORS.values() for c in v]
    wide = long.pivot(index="person", columns="week", values=items)
    wide.columns = [f"{item}_{week}" for item, week in wide.columns]
    wide = wide.reset_index()
    nested = {p: (f'["{g[0]}_1", "{g[0]}_2", "{g[0]}_3", "{g[0]}_4"]' if g == [p] else
                  "{ " + ", ".join(f'{i} = ["{i}_1", "{i}_2", "{i}_3", "{i}_4"]' for i in g) + " }")
              for p, g in INDICATORS.items()}
    outcomes = "{ " + ", ".join(f"{p} = {v}" for p, v in nested.items()) + " }"
    (tmp_path / "w").mkdir()
    wide_study = load_study(_study(tmp_path / "w", outcomes=outcomes, layout="wide", frame=wide))
    long_study = load_study(_study(tmp_path))
    a, b = wide_study.panel(), long_study.panel()
    assert a.indicators == b.indicators
    np.testing.assert_array_equal(a.outcome_matrix(), b.outcome_matrix())


def test_unknown_indicator_column_names_it_and_the_nearest(tmp_path, capsys):
    outcomes = _outcomes_toml().replace('"fell_asleep"', '"fell_aslep"')
    path = _study(tmp_path, outcomes=outcomes)
    with pytest.raises(DataError, match=r"`data.outcomes.sleep` names the column 'fell_aslep', "
                                        r"which is not in diary.csv; did you mean 'fell_asleep'\?"):
        load_study(path).panel()
    assert main(["check-data", str(path)]) == 1
    assert "'fell_aslep'" in capsys.readouterr().err


def test_model_options_of_processes_and_measurement_pass_through(tmp_path):
    options = (', cross_lags = { drop = ["stress<-sleep"] }, same_wave = ["stress->sleep"], '
               'cross_loadings = { woke_rarely = "stress" }, invariance = "strict", '
               'release = { intercept = ["fell_asleep"] }, unique_covariance = "none", '
               'scale = "effects", marker = ["woke_rarely", "tense"]')
    study = load_study(_study(tmp_path, options=options))
    # reference: the same options given to bl.model directly
    expected = bl.model("clpm", processes=3, cross_lags={"drop": ["stress<-sleep"]},
                        same_wave=["stress->sleep"], cross_loadings={"woke_rarely": "stress"},
                        invariance="strict", release={"intercept": ["fell_asleep"]},
                        unique_covariance="none", scale="effects",
                        marker=["woke_rarely", "tense"])
    assert study.models[0].spec == expected
    names = build_structure(expected, outcomes=tuple(INDICATORS), n_waves=4,
                            indicators={k: tuple(v) for k, v in INDICATORS.items()}).names
    assert "loading[woke_rarely<-stress]" in names and "lag[stress<-sleep]" not in names


@pytest.mark.parametrize(
    "options, message",
    [
        (', same_wav = ["sleep<-stress"]', r"unknown key `models\[1\].options.same_wav`; did you "
                                           r"mean 'same_wave'\?"),
        (', cross_lags = "some"', r"`models\[1\]`: `cross_lags` in model 'clpm' must be 'all', "
                                  r"'none' or a table"),
    ],
    ids=["misspelt", "bad-cross-lags"],
)
def test_model_option_errors_name_the_key(tmp_path, options, message):
    with pytest.raises(SpecError, match=message):
        load_study(_study(tmp_path, options=options))


def test_wide_indicator_not_asked_at_a_wave(tmp_path):
    long = _frame()
    wide = long.pivot(index="person", columns="week", values=["rested", "fell_asleep", "mood"])
    wide.columns = [f"{item}_{week}" for item, week in wide.columns]
    wide = wide.reset_index().drop(columns=["rested_2"])
    outcomes = ('{ sleep = { rested = ["rested_1", "", "rested_3", "rested_4"], '
                'fell_asleep = ["fell_asleep_1", "fell_asleep_2", "fell_asleep_3", "fell_asleep_4"] }, '
                'mood = ["mood_1", "mood_2", "mood_3", "mood_4"] }')
    panel = load_study(_study(tmp_path, outcomes=outcomes, layout="wide", frame=wide)).panel()
    # reference: the long table itself, rested missing at week 2 only
    y = panel.y[:, :, panel.observed_names.index("rested")]
    assert np.isnan(y[:, 1]).all()
    expected = long.pivot(index="person", columns="week", values="rested").to_numpy()
    np.testing.assert_array_equal(y[:, [0, 2, 3]], expected[:, [0, 2, 3]])


def test_approximate_invariance_uses_scalar_in_the_maximum_likelihood_steps(tmp_path, capsys,
                                                                          monkeypatch):
    # approximate invariance has no ML estimate (docs/model-family.md, "Approximate
    # invariance"): the run's identification check and ML fit use scalar invariance, the
    # nearest exact level, and the model's notes say so. Reference: bl.fit_ml of the same
    # model at invariance="scalar" on the same data.
    from bayeslong.workflow import measurement_section

    def not_compared(*args, **kwargs):  # the report's invariance tests: 30 s, covered elsewhere
        raise SpecError("left out in this test")

    monkeypatch.setattr(measurement_section, "compare_invariance", not_compared)
    path = _study(tmp_path, options=', invariance = "approximate", deviation_sd = 0.1')
    assert main(["run", str(path), "--json", "--quiet"]) == 0
    row = json.loads(capsys.readouterr().out)["models"][0]
    assert row["identified"] and row["ml"]["converged"], row
    assert any("use scalar invariance, the nearest exact level" in n for n in row["notes"]), row
    panel = load_study(path).panel()
    ml = bl.fit_ml(bl.model("clpm", processes=3, invariance="scalar"), panel)
    # the same fit from the same start: equal up to the optimiser's tolerance
    assert row["ml"]["loglik"] == pytest.approx(ml.loglik, abs=1e-6)
    assert row["ml"]["n_params"] == ml.n_params
    (report,) = tmp_path.rglob("report.md")
    page = report.read_text()
    assert "nearest exact level" in page  # the model's notes
    # the measurement table of the ML fit names the level it was fitted at
    assert "invariance 'scalar' (the nearest exact level to 'approximate')" in page
    # the identify command checks the same level and says so
    assert main(["identify", str(path)]) == 0
    out = capsys.readouterr().out
    assert ": identified (rank" in out and "nearest exact level" in out
