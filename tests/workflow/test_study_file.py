"""Tests of the study file: parsing, defaults, errors that name the key, and content hashes.

Reference values come from outside the module under test: the TOML text itself read by
``tomllib`` (the standard library's parser), ``hashlib`` on the data file's bytes, and
``pandas`` reshaping for the wide layout. No fitting happens here.
"""

import hashlib
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import DataError, SpecError
from bayeslong.workflow.study_file import load_study

EXAMPLE = Path(__file__).resolve().parents[2] / "examples" / "shift_sleep.toml"


def _long_frame(seed: int = 3) -> pd.DataFrame:
    """A small long panel (20 units x 4 waves) drawn with NumPy, not with the package."""
    rng = np.random.default_rng(seed)
    n, t = 20, 4
    return pd.DataFrame({
        "id": np.repeat(np.arange(1, n + 1), t),
        "time": np.tile(np.arange(1, t + 1), n),
        "score": rng.normal(size=n * t).round(4),
        "stress": rng.normal(size=n * t).round(4),
        "age": np.repeat(rng.integers(20, 60, size=n), t),
    })


STUDY = """
title = "tiny"
[data]
path = "panel.csv"
unit = "id"
wave = "time"
outcomes = ["score"]
time_varying = ["stress"]
time_invariant = ["age"]
[[models]]
model = "ar"
"""


def _write(folder: Path, text: str = STUDY, frame: pd.DataFrame | None = None) -> Path:
    (frame if frame is not None else _long_frame()).to_csv(folder / "panel.csv", index=False)
    path = folder / "study.toml"
    path.write_text(text)
    return path


def test_example_study_matches_its_toml():
    # reference: the standard library's TOML parser on the same file
    raw = tomllib.loads(EXAMPLE.read_text())
    study = load_study(EXAMPLE)
    assert study.title == raw["title"]
    assert study.data.outcomes == tuple(raw["data"]["outcomes"])
    assert study.data.path == (EXAMPLE.parent / raw["data"]["path"]).resolve()
    assert [c.spec.name for c in study.models] == [m["model"] for m in raw["models"]]
    assert [c.label for c in study.models] == [m.get("label", m["model"]) for m in raw["models"]]
    for cand, entry in zip(study.models, raw["models"]):
        for key, value in entry.get("options", {}).items():
            assert cand.spec.options[key] == value
    assert study.priors["lag"] == tuple(raw["priors"]["lag"])
    for key, value in raw["sampling"].items():
        assert study.sampling[key] == value
    assert study.output == EXAMPLE.parent / raw["output"]


def test_defaults_fill_what_the_file_leaves_out(tmp_path):
    study = load_study(_write(tmp_path))
    # defaults documented in the module docstring of bayeslong.study
    assert study.sampling == {"method": "bayes", "draws": 1000, "tune": 1000, "chains": 4,
                              "seed": 1, "sampler": "auto", "workers": 1,
                              "target_accept": None}
    assert study.data.layout == "long"
    assert study.output == tmp_path.resolve() / "bayeslong-output"
    assert not any(study.sensitivity.values())
    assert study.models[0].label == "ar"


def test_panel_of_study_equals_direct_intake(tmp_path):
    frame = _long_frame()
    study = load_study(_write(tmp_path, frame=frame))
    expected = bl.Panel.from_long(frame, unit="id", wave="time", outcomes=["score"],
                                  time_varying=["stress"], time_invariant=["age"])
    assert study.panel() == expected


def test_wide_layout_reads_the_same_panel(tmp_path):
    frame = _long_frame()
    # reference reshaping by pandas: one column per variable and wave
    wide = frame.pivot(index="id", columns="time", values=["score", "stress"])
    wide.columns = [f"{v}{t}" for v, t in wide.columns]
    wide = wide.reset_index().merge(frame.groupby("id")["age"].first().reset_index())
    text = """
title = "wide"
[data]
path = "panel.csv"
layout = "wide"
unit = "id"
outcomes = { score = ["score1", "score2", "score3", "score4"] }
time_varying = { stress = ["stress1", "stress2", "stress3", "stress4"] }
time_invariant = ["age"]
[[models]]
model = "ar"
"""
    study = load_study(_write(tmp_path, text, wide))
    long = bl.Panel.from_long(frame, unit="id", wave="time", outcomes=["score"],
                              time_varying=["stress"], time_invariant=["age"])
    panel = study.panel()
    np.testing.assert_array_equal(panel.y, long.y)
    np.testing.assert_array_equal(panel.x, long.x)
    np.testing.assert_array_equal(panel.z, long.z)


def test_repeated_model_gets_labels_from_its_options(tmp_path):
    text = STUDY + '[[models]]\nmodel = "ar"\noptions = { lag = "time-varying" }\n'
    study = load_study(_write(tmp_path, text))
    assert [c.label for c in study.models] == ["ar", "ar (lag=time-varying)"]


BAD = [
    # (id, change to the tiny study text, error class, wording that must appear)
    ("missing-title", lambda s: s.replace('title = "tiny"', ""), SpecError,
     "the required key `title` is missing"),
    ("missing-unit", lambda s: s.replace('unit = "id"\n', ""), SpecError,
     r"the required key `data.unit` is missing; add it in \[data\]"),
    ("missing-models", lambda s: s.replace('[[models]]\nmodel = "ar"\n', ""), SpecError,
     "the required key `models` is missing"),
    ("unknown-top-key", lambda s: s.replace('title = "tiny"', 'title = "tiny"\ntitel = "x"'),
     SpecError, "unknown key `titel`; did you mean 'title'?"),
    ("unknown-data-key", lambda s: s.replace('unit = "id"', 'unit = "id"\noutcome = "score"'),
     SpecError, "unknown key `data.outcome`; did you mean 'outcomes'?"),
    ("unknown-sampling-key", lambda s: s + "[sampling]\ndraw = 10\n", SpecError,
     "unknown key `sampling.draw`; did you mean 'draws'?"),
    ("unknown-model", lambda s: s.replace('model = "ar"', 'model = "alt2"'), SpecError,
     r"`models\[1\].model` is 'alt2', which is not in the catalog; did you mean 'alt'\? "
     r"\(the catalog has: alt, ar,"),
    ("wrong-type-draws", lambda s: s + '[sampling]\ndraws = "many"\n', SpecError,
     "`sampling.draws` must be a whole number; got 'many'"),
    ("bad-target-accept", lambda s: s + "[sampling]\ntarget_accept = 1.5\n", SpecError,
     r"`sampling.target_accept` must be a number between 0 and 1, e.g. 0.9 .*got 1.5"),
    ("wrong-type-flag", lambda s: s + '[comparison]\nfuture = "yes"\n', SpecError,
     "`comparison.future` must be true or false"),
    ("wrong-type-outcomes", lambda s: s.replace('outcomes = ["score"]', "outcomes = 3"),
     SpecError, "`data.outcomes` must be a list of column names"),
    ("bad-option", lambda s: s.replace('model = "ar"', 'model = "ar"\noptions = { lag = "big" }'),
     SpecError, "`lag` must be one of constant, time-varying for model 'ar'; got 'big'"),
    ("bad-prior", lambda s: s + '[priors]\nlag = "normal"\n', SpecError,
     r"`priors.lag` must be a list of a distribution name and its numbers"),
    ("data-path", lambda s: s.replace('path = "panel.csv"', 'path = "nowhere.csv"'), DataError,
     r"the data file 'nowhere.csv' \(`data.path`\) does not exist"),
    ("data-suffix", lambda s: s.replace('path = "panel.csv"', 'path = "panel.xlsx"'), DataError,
     "`data.path` must name a .csv or .parquet file"),
    ("bad-toml", lambda s: s + "[sampling\n", SpecError, "is not valid TOML"),
]


@pytest.mark.parametrize("change, error, wording", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_malformed_study_names_key_and_fix(tmp_path, change, error, wording):
    path = _write(tmp_path, change(STUDY))
    with pytest.raises(error, match=wording) as info:
        load_study(path)
    assert str(info.value).startswith("study file study.toml: ")
    assert "\n" not in str(info.value)


def test_column_not_in_data_suggests_nearest(tmp_path):
    study = load_study(_write(tmp_path, STUDY.replace('outcomes = ["score"]', 'outcomes = ["scor"]')))
    with pytest.raises(DataError, match="`data.outcomes` names the column 'scor', which is not in "
                                        r"panel.csv; did you mean 'score'\?"):
        study.panel()


def test_prior_for_no_candidate_parameter_is_an_error(tmp_path):
    from bayeslong.workflow.runner import check_priors

    study = load_study(_write(tmp_path, STUDY + '[priors]\nlags = ["normal", 0, 1]\n'))
    with pytest.raises(SpecError, match=r"`priors.lags` names no parameter of any candidate; "
                                        r"did you mean 'lag'\?"):
        check_priors(study, study.panel())


def test_fit_key_follows_content_not_cosmetics(tmp_path):
    path = _write(tmp_path)
    base = load_study(path)
    key = base.fit_key(base.models[0])
    # reference: hashlib on the file's bytes
    assert base.data_digest() == hashlib.sha256((tmp_path / "panel.csv").read_bytes()).hexdigest()
    # a new title, or new check settings, keep the key
    path.write_text(STUDY.replace('"tiny"', '"another title"') + "[checks]\nppc_draws = 5\n")
    same = load_study(path)
    assert same.fit_key(same.models[0]) == key
    # priors, sampling, model options and data bytes each change it
    for extra in ('[priors]\nlag = ["normal", 0, 1]\n', "[sampling]\ndraws = 7\n",
                  "[sampling]\ntarget_accept = 0.9\n"):
        path.write_text(STUDY + extra)
        s = load_study(path)
        assert s.fit_key(s.models[0]) != key, extra
    path.write_text(STUDY.replace('model = "ar"', 'model = "ar"\noptions = { residuals = "free" }'))
    s = load_study(path)
    assert s.fit_key(s.models[0]) != key
    path.write_text(STUDY)
    _long_frame(seed=4).to_csv(tmp_path / "panel.csv", index=False)
    s = load_study(path)
    assert s.fit_key(s.models[0]) != key


def test_user_model_file_relative_to_study(tmp_path):
    # a user model file in the catalog's format, copied from the shipped 'ar' (same content)
    from importlib import resources

    text = resources.files("bayeslong.models").joinpath("ar.toml").read_text()
    (tmp_path / "mine.toml").write_text(text)
    study = load_study(_write(tmp_path, STUDY.replace('model = "ar"', 'model = "mine.toml"')))
    assert study.models[0].spec.name == "mine"
    assert study.models[0].spec.options == bl.model("ar").options


def test_parquet_reads_like_csv(tmp_path):
    pytest.importorskip("pyarrow")
    frame = _long_frame()
    frame.to_parquet(tmp_path / "panel.parquet")
    study = load_study(_write(tmp_path, STUDY.replace("panel.csv", "panel.parquet"), frame))
    expected = bl.Panel.from_long(frame, unit="id", wave="time", outcomes=["score"],
                                  time_varying=["stress"], time_invariant=["age"])
    assert study.panel() == expected


# --------------------------------------------------------------------------------------------
# categorical outcomes and indicators (`data.categorical`)
# --------------------------------------------------------------------------------------------


def _ordinal_frame(seed: int = 5) -> pd.DataFrame:
    """20 units x 4 waves: an ordinal rating 1..3, a yes/no item as labels, drawn by NumPy."""
    rng = np.random.default_rng(seed)
    n, t = 20, 4
    rating = rng.integers(1, 4, size=n * t)
    rating[:3] = [1, 2, 3]  # every category is observed
    woke = np.where(rng.uniform(size=n * t) < 0.5, "no", "yes")
    woke[:2] = ["no", "yes"]
    return pd.DataFrame({"id": np.repeat(np.arange(1, n + 1), t),
                         "time": np.tile(np.arange(1, t + 1), n),
                         "rating": rating, "woke": woke})


CATEGORICAL_STUDY = """
title = "ordinal"
[data]
path = "panel.csv"
unit = "id"
wave = "time"
outcomes = { sleep = ["rating", "woke"] }
categorical = { rating = "ordinal", woke = ["no", "yes"] }
[[models]]
model = "random-effects"
options = { unique_covariance = "none" }
"""


def test_categorical_study_reads_the_panel_of_direct_intake(tmp_path):
    frame = _ordinal_frame()
    study = load_study(_write(tmp_path, CATEGORICAL_STUDY, frame))
    assert study.data.categorical == {"rating": "ordinal", "woke": ("no", "yes")}
    # reference: the Python API on the same frame (data/categories.py reads the categories)
    expected = bl.Panel.from_long(frame, unit="id", wave="time",
                                  outcomes={"sleep": ["rating", "woke"]},
                                  categorical={"rating": "ordinal", "woke": ["no", "yes"]})
    panel = study.panel()
    assert panel == expected
    assert panel.categories == {"rating": (1, 2, 3), "woke": ("no", "yes")}
    # category positions 0..C-1, counted by pandas from the raw column
    codes = frame.sort_values(["id", "time"])["rating"].to_numpy() - 1
    np.testing.assert_array_equal(panel.y[:, :, 0].ravel(), codes)


def test_categorical_changes_the_fit_key_and_its_absence_does_not(tmp_path):
    plain = load_study(_write(tmp_path, STUDY))
    assert "categorical" not in plain.data.settings()  # continuous studies keep their hashes
    other = tmp_path / "other"
    other.mkdir()
    study = load_study(_write(other, CATEGORICAL_STUDY, _ordinal_frame()))
    changed = load_study(_write(other, CATEGORICAL_STUDY.replace(
        'woke = ["no", "yes"]', 'woke = "binary"'), _ordinal_frame().assign(
            woke=lambda d: (d["woke"] == "yes").astype(int))))
    assert study.fit_key(study.models[0]) != changed.fit_key(changed.models[0])


def test_sampling_defaults_follow_the_data_and_target_accept_reaches_the_fit(tmp_path):
    from bayeslong.infer.categorical import CATEGORICAL_DRAWS
    from bayeslong.workflow.runner import _fit_settings

    plain = load_study(_write(tmp_path, STUDY))
    assert plain.sampling["draws"] == 1000 and "target_accept" not in _fit_settings(plain)
    other = tmp_path / "other"
    other.mkdir()
    study = load_study(_write(other, CATEGORICAL_STUDY, _ordinal_frame()))
    assert study.sampling["draws"] == CATEGORICAL_DRAWS == 1000  # bl.fit's own for them
    given = load_study(_write(other, CATEGORICAL_STUDY + "[sampling]\ndraws = 300\n"
                              "target_accept = 0.95\n", _ordinal_frame()))
    assert given.sampling["draws"] == 300
    assert _fit_settings(given)["target_accept"] == 0.95


def test_wide_categorical_names_the_indicator(tmp_path):
    frame = _ordinal_frame()
    wide = frame.pivot(index="id", columns="time", values=["rating", "woke"])
    wide.columns = [f"{v}{t}" for v, t in wide.columns]
    text = """
title = "wide ordinal"
[data]
path = "panel.csv"
layout = "wide"
unit = "id"
outcomes = { rating = ["rating1", "rating2", "rating3", "rating4"] }
categorical = { rating = "ordinal" }
[[models]]
model = "random-effects"
"""
    study = load_study(_write(tmp_path, text, wide.reset_index()))
    panel = study.panel()
    assert panel.categories == {"rating": (1, 2, 3)}


BAD_CATEGORICAL = [
    ("not-a-table", lambda s: s.replace('categorical = { rating = "ordinal", woke = ["no", "yes"] }',
                                        'categorical = ["rating"]'), SpecError,
     r"`data.categorical` must be a table from each categorical outcome or indicator"),
    ("unknown-variable", lambda s: s.replace("rating = \"ordinal\"", "ratin = \"ordinal\""),
     DataError, r"`data.categorical.ratin` names 'ratin', which is not an outcome or indicator "
                r"of `data.outcomes`; did you mean 'rating'\? \(they are rating, woke\)"),
    ("unknown-kind", lambda s: s.replace("rating = \"ordinal\"", "rating = \"ordinl\""),
     SpecError, r"`data.categorical.rating` is 'ordinl'; give \"ordinal\", \"binary\" or the "
                r"category labels in order.*did you mean 'ordinal'\?"),
    ("one-label", lambda s: s.replace('woke = ["no", "yes"]', 'woke = ["no"]'), SpecError,
     r"`data.categorical.woke` must list at least two different categories"),
    ("repeated-label", lambda s: s.replace('woke = ["no", "yes"]', 'woke = ["no", "no"]'),
     SpecError, r"`data.categorical.woke` must list at least two different categories"),
    ("number", lambda s: s.replace('woke = ["no", "yes"]', "woke = 2"), SpecError,
     r"`data.categorical.woke` must be \"ordinal\", \"binary\" or a list of category labels"),
]


@pytest.mark.parametrize("change, error, wording", [b[1:] for b in BAD_CATEGORICAL],
                         ids=[b[0] for b in BAD_CATEGORICAL])
def test_malformed_categorical_names_key_and_fix(tmp_path, change, error, wording):
    path = _write(tmp_path, change(CATEGORICAL_STUDY), _ordinal_frame())
    with pytest.raises(error, match=wording) as info:
        load_study(path)
    assert str(info.value).startswith("study file study.toml: ")


def test_category_not_in_the_declared_labels_names_the_column_and_line(tmp_path):
    frame = _ordinal_frame()
    frame.loc[5, "woke"] = "maybe"
    study = load_study(_write(tmp_path, CATEGORICAL_STUDY, frame))
    # data/categories.py words it; the file's line is the frame's row + 2 (header is line 1)
    with pytest.raises(DataError, match=r"column 'woke' row 7 holds 'maybe', which is not among the categories "
                                        r"declared for 'woke'"):
        study.panel()


def test_ordinal_example_regenerates_and_reads_its_categories(tmp_path):
    import importlib.util

    folder = EXAMPLE.parent
    spec = importlib.util.spec_from_file_location("make_pain_data", folder / "make_pain_data.py")
    maker = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(maker)
    maker.make(tmp_path / "again.csv")  # the generator with its fixed seed: the same bytes
    assert (tmp_path / "again.csv").read_bytes() == (folder / "pain_interference.csv").read_bytes()
    study = load_study(folder / "pain_interference.toml")
    raw = tomllib.loads((folder / "pain_interference.toml").read_text())
    labels = raw["data"]["categorical"]["interference"]
    assert labels == maker.CATEGORIES
    panel = study.panel()
    assert panel.categories == {"interference": tuple(labels)}
    # reference: pandas counts of the labels in the CSV
    counts = pd.read_csv(folder / "pain_interference.csv")["interference"].value_counts()
    y = panel.y[:, :, 0]
    for k, label in enumerate(labels):
        assert int((y == k).sum()) == counts[label]
