"""A study with an ordinal outcome, end to end: fits, LOO, leave-future-out, checks, report.

References: the data are drawn with NumPy inside the test (a random-intercept ordered probit,
Butler & Moffitt 1982), and the category counts the report shows are recounted with pandas
on the CSV. The computations themselves are checked against scipy in
tests/evaluate/test_category_checks.py and test_category_forecast.py; this test holds the
study run to them: what it routes where, what it skips and why, and what a second run reuses.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

from bayeslong.workflow.category_run import NO_ML
from bayeslong.workflow.report import write_report
from bayeslong.workflow.runner import run_study
from bayeslong.workflow.study_file import load_study

STUDY = """
title = "Ordinal ratings (invented data)"
output = "out"
[data]
path = "ratings.csv"
unit = "id"
wave = "week"
outcomes = ["rating"]
categorical = { rating = ["low", "mid", "high"] }
[[models]]
model = "random-effects"
[[models]]
model = "waves-apart"
[sampling]
draws = 100
tune = 100
chains = 2
sampler = "pymc"
[checks]
ppc_draws = 40
ml = true
[comparison]
future = true
[sensitivity]
prior_grid = true
"""


def _ratings(seed: int = 2) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n, t = 60, 4
    level = rng.normal(0.3, 0.9, size=n)
    ystar = level[:, None] + rng.standard_normal((n, t))
    codes = (ystar[:, :, None] > np.array([0.0, 1.0])).sum(axis=2)
    frame = pd.DataFrame({"id": np.repeat(np.arange(1, n + 1), t),
                          "week": np.tile(np.arange(1, t + 1), n),
                          "rating": np.array(["low", "mid", "high"])[codes.ravel()]})
    frame.loc[(frame["id"] == 5) & (frame["week"] == 4), "rating"] = None  # not seen at wave T
    return frame


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("ordinal")
    _ratings().to_csv(folder / "ratings.csv", index=False)
    (folder / "study.toml").write_text(STUDY)
    study = load_study(folder / "study.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tiny runs: convergence warnings are recorded per model
        results = run_study(study, progress=None, quiet_sampler=True, strict=True)
    paths = write_report(results, folder / "out")
    return study, results, paths


def test_candidates_are_fitted_with_thresholds_and_steps_without_a_categorical_form_say_why(run):
    study, results, _ = run
    for m in results.models:
        assert type(m.fit).__name__ == "CategoricalFit"
        assert m.fit.categorical.thresholds == ("threshold[rating,2]",)
        assert NO_ML in m.notes and m.ml is None
        # the identification check of categorical data (model/identification.py)
        assert m.identification is not None and m.identification.identified
    # lag sensitivity is routed for categorical panels (evaluate/sensitivity.py); here no
    # candidate has a lag, which is the reason it did not run
    assert not results.sensitivity.ran
    assert results.sensitivity.reason == "no fitted candidate has a constant lag"


def test_comparison_by_marginal_loo_and_leave_future_out(run):
    _, results, _ = run
    assert results.comparison.ran, results.comparison.reason
    table = results.comparison.value
    assert set(table.index) == {"random-effects", "waves-apart"}
    assert results.future.ran, results.future.reason
    lfo = results.future.value
    assert np.isfinite(lfo["elpd_lfo"]).all() and (lfo["elpd_lfo"] < 0).all()
    # 59 units observed at week 4, each scored by log P(category) < 0 of at most 3 categories:
    # the elpd lies between 59 log(small) and 0, and above the uniform guess only if useful
    assert (lfo["elpd_lfo"] > 59 * np.log(1e-3)).all()


def test_checks_are_category_shares_and_transitions(run):
    _, results, _ = run
    frame = _ratings()
    for m in results.models:
        assert m.check.ran, m.check.reason
        shares = m.check.value["shares"]
        # reference: pandas counts on the data file
        observed = frame.dropna().groupby("week")["rating"].value_counts(normalize=True)
        for _, row in shares.iterrows():
            assert row["observed"] == pytest.approx(observed.get((row["wave"], row["category"]), 0.0))
        assert len(m.check.value["transitions"]) == 3 * 3 * 3


def test_report_has_the_threshold_table_and_share_figure(run):
    _, results, paths = run
    page = paths["html"].read_text(encoding="utf-8")
    assert "Thresholds on the latent response scale (probit link" in page
    assert "low | mid" in page and "mid | high" in page
    assert "each category&#x27;s share of the units observed" in page \
        or "each category's share of the units observed" in page
    assert "no fitted candidate has a constant lag" in page
    figures = sorted(p.name for p in paths["figures"].glob("category-shares-*.png"))
    assert figures == ["category-shares-random-effects.png", "category-shares-waves-apart.png"]


def test_a_second_run_reuses_the_saved_categorical_fits(run):
    study, results, _ = run
    again = run_study(study, fit=False, progress=None, quiet_sampler=True, strict=True)
    assert again.reused == 2 and again.fitted == 0
    for old, new in zip(results.models, again.models):
        assert type(new.fit).__name__ == "CategoricalFit"
        np.testing.assert_array_equal(new.fit.threshold_draws(), old.fit.threshold_draws())


def test_identify_command_checks_categorical_models_and_check_data_reads_categories(
        tmp_path, capsys):
    import json

    from bayeslong.workflow.cli import main

    _ratings().to_csv(tmp_path / "ratings.csv", index=False)
    (tmp_path / "study.toml").write_text(STUDY)
    assert main(["identify", str(tmp_path / "study.toml"), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["model"] for r in rows] == ["random-effects", "waves-apart"]
    # random-effects and waves-apart with one ordinal item are identified (the random-intercept
    # probit and the ordered probit regression; docs/model-family.md)
    assert all(r["identified"] is True and r["deficient"] == [] for r in rows)
    assert main(["check-data", str(tmp_path / "study.toml"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    # reference: pandas on the CSV (unit 5 misses week 4)
    assert out["n_units"] == 60 and out["observed"]["4"]["rating"] == pytest.approx(59 / 60)


def test_a_maximum_likelihood_run_of_categorical_variables_is_refused_with_the_fix(tmp_path):
    from bayeslong.errors import SpecError

    _ratings().to_csv(tmp_path / "ratings.csv", index=False)
    (tmp_path / "study.toml").write_text(STUDY.replace("[sampling]", '[sampling]\nmethod = "ml"'))
    with pytest.raises(SpecError, match=r"`sampling.method = \"ml\"` cannot fit the categorical "
                                        r"variables rating: maximum likelihood is not available "
                                        r"for categorical variables yet.*set `method = \"bayes\"`"):
        run_study(load_study(tmp_path / "study.toml"), progress=None)
