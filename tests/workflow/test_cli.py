"""Tests of the ``bayeslong`` command line: exit codes, one-line errors, resumable runs.

Commands are run in-process through :func:`bayeslong.cli.main` (same code path as the
console script, without paying Python's start-up for each call). References: the model
files on disk (for ``models``), NumPy/pandas counts on the CSV (for ``check-data``), and
file modification times plus a guard on the fitting function (for reuse).
"""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayeslong.workflow.cli import main

MODELS_DIR = Path(__file__).resolve().parents[2] / "models"


def _frame(seed: int = 11, n: int = 30, t: int = 4) -> pd.DataFrame:
    """A small AR(1) panel drawn with NumPy (lag 0.5, unit variances), with some gaps."""
    rng = np.random.default_rng(seed)
    y = np.empty((n, t))
    y[:, 0] = rng.normal(size=n)
    for w in range(1, t):
        y[:, w] = 0.5 * y[:, w - 1] + rng.normal(size=n)
    y[rng.uniform(size=(n, t)) < 0.1] = np.nan
    y[:, 0] = np.where(np.isnan(y[:, 0]), 0.0, y[:, 0])  # every unit observed at wave 1
    return pd.DataFrame({"id": np.repeat(np.arange(n), t), "t": np.tile(np.arange(t), n),
                         "y": y.ravel().round(5)})


def _study(folder: Path, extra: str = "", model_lines: str = 'model = "ar"') -> Path:
    _frame().to_csv(folder / "d.csv", index=False)
    path = folder / "s.toml"
    path.write_text(f"""
title = "cli test"
output = "out"
[data]
path = "d.csv"
unit = "id"
wave = "t"
outcomes = ["y"]
[[models]]
{model_lines}
[sampling]
method = "ml"
{extra}
""")
    return path


def test_models_lists_every_catalog_file(capsys):
    assert main(["models", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    # reference: the model files themselves
    assert sorted(r["model"] for r in rows) == sorted(p.stem for p in MODELS_DIR.glob("*.toml"))
    assert all(r["description"] for r in rows)


def test_check_data_counts_match_pandas(tmp_path, capsys):
    path = _study(tmp_path)
    assert main(["check-data", str(path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    frame = _frame()
    # reference: pandas on the CSV
    assert out["n_units"] == frame["id"].nunique()
    assert out["n_waves"] == frame["t"].nunique()
    shares = frame.groupby("t")["y"].apply(lambda s: s.notna().mean())
    got = {int(k): v["y"] for k, v in out["observed"].items()}
    for wave, share in shares.items():
        assert got[int(wave)] == pytest.approx(share, abs=1e-12)  # same counts, exact ratio
    assert sum(p["count"] for p in out["patterns"]) == frame["id"].nunique()
    complete = frame.groupby("id")["y"].apply(lambda s: s.notna().all()).sum()
    assert out["patterns"][0]["y"] == "oooo" and out["patterns"][0]["count"] == complete


def test_run_twice_reuses_saved_fits(tmp_path, capsys, monkeypatch):
    path = _study(tmp_path)
    assert main(["run", str(path), "--json"]) == 0
    first = capsys.readouterr()
    summary = json.loads(first.out)
    assert summary["fitted"] == 1 and summary["reused"] == 0
    fits = sorted((tmp_path / "out" / "fits").iterdir())
    stamps = {p: p.stat().st_mtime_ns for p in fits}
    assert (tmp_path / "out" / "report.html").is_file()

    import sys

    import bayeslong.infer.ml

    def refit(*args, **kwargs):  # any refit in the second run fails the test
        raise AssertionError("the second run fitted again")

    monkeypatch.setattr(bayeslong.infer.ml, "fit_ml", refit)
    monkeypatch.setattr(sys.modules["bayeslong.model.identification"], "identify", refit)
    assert main(["run", str(path), "--json"]) == 0
    second = capsys.readouterr()
    assert "reused 1 saved fit (unchanged study, data and model)" in second.err
    summary = json.loads(second.out)
    assert summary["fitted"] == 0 and summary["reused"] == 1
    assert {p: p.stat().st_mtime_ns for p in fits} == stamps
    # the maximum-likelihood AIC is -2 loglik + 2 k (closed form)
    ml = summary["models"][0]["ml"]
    assert ml["aic"] == pytest.approx(-2 * ml["loglik"] + 2 * ml["n_params"], rel=1e-12)


def test_report_rerenders_without_fitting(tmp_path, capsys, monkeypatch):
    path = _study(tmp_path)
    assert main(["run", str(path), "--quiet"]) == 0
    (tmp_path / "out" / "report.html").unlink()
    import bayeslong.infer.ml

    monkeypatch.setattr(bayeslong.infer.ml, "fit_ml", lambda *a, **k: pytest.fail("refitted"))
    assert main(["report", str(path), "--quiet"]) == 0
    assert (tmp_path / "out" / "report.html").is_file()


MALFORMED = [
    # (id, how to break the tiny study, the wording on stderr)
    ("missing-key", lambda t: t.replace('unit = "id"\n', ""),
     "error: study file s.toml: the required key `data.unit` is missing; add it in [data]"),
    ("unknown-model", lambda t: t.replace('model = "ar"', 'model = "arr"'),
     "error: study file s.toml: `models[1].model` is 'arr', which is not in the catalog; "
     "did you mean 'ar'?"),
    ("wrong-type", lambda t: t.replace('method = "ml"', 'method = "ml"\ndraws = "many"'),
     "error: study file s.toml: `sampling.draws` must be a whole number; got 'many'"),
    ("no-data-file", lambda t: t.replace('path = "d.csv"', 'path = "missing.csv"'),
     "error: study file s.toml: the data file 'missing.csv' (`data.path`) does not exist"),
    ("unknown-column", lambda t: t.replace('outcomes = ["y"]', 'outcomes = ["yy"]'),
     "error: `data.outcomes` names the column 'yy', which is not in d.csv; did you mean 'y'?"),
    ("unknown-key", lambda t: t.replace('title = "cli test"', 'title = "cli test"\nouput = "x"'),
     "error: study file s.toml: unknown key `ouput`; did you mean 'output'?"),
]


@pytest.mark.parametrize("breaks, wording", [m[1:] for m in MALFORMED], ids=[m[0] for m in MALFORMED])
@pytest.mark.parametrize("command", ["check-data", "run"])
def test_malformed_study_exits_1_with_one_line(tmp_path, capsys, breaks, wording, command):
    path = _study(tmp_path)
    path.write_text(breaks(path.read_text()))
    assert main([command, str(path)]) == 1
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.startswith("error:")]
    assert len(lines) == 1, err
    assert lines[0].startswith(wording)
    assert "Traceback" not in err


def test_missing_study_file_exits_1(tmp_path, capsys):
    assert main(["identify", str(tmp_path / "nope.toml")]) == 1
    err = capsys.readouterr().err.strip()
    assert err == (f"error: study file {str(tmp_path / 'nope.toml')!r} does not exist; check the "
                   "path (`bayeslong demo` writes an example study to start from)")


def test_debug_shows_the_traceback(tmp_path):
    from bayeslong.errors import SpecError

    with pytest.raises(SpecError, match="does not exist"):
        main(["check-data", str(tmp_path / "nope.toml"), "--debug"])


@pytest.mark.parametrize("argv", [[], ["run"], ["frobnicate"], ["run", "a.toml", "--colour"],
                                  ["simulate", "ar", "--units", "many"]],
                         ids=["nothing", "no-study", "unknown-command", "unknown-flag", "bad-int"])
def test_bad_usage_exits_2(argv, capsys):
    assert main(argv) == 2
    assert "usage: bayeslong" in capsys.readouterr().err


def test_help_exits_0(capsys):
    assert main(["--help"]) == 0
    assert "check-data" in capsys.readouterr().out


def test_simulate_writes_a_panel_of_the_asked_size(tmp_path, capsys):
    out = tmp_path / "sim.csv"
    params = tmp_path / "p.toml"
    params.write_text("lag = 0.6\n")
    assert main(["simulate", "ar", "--units", "25", "--waves", "4", "--seed", "3",
                 "--params", str(params), "--covariate", "x", "-o", str(out)]) == 0
    df = pd.read_csv(out)
    # N x T rows, one column each for unit, wave, outcome and covariate (simulate's layout)
    assert df.shape == (25 * 4, 4)
    assert sorted(df["wave"].unique()) == [1, 2, 3, 4]


def test_simulate_unknown_parameter_is_a_user_error(tmp_path, capsys):
    params = tmp_path / "p.toml"
    params.write_text("lagg = 0.6\n")
    assert main(["simulate", "ar", "--params", str(params), "-o", str(tmp_path / "x.csv")]) == 1
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "lagg" in err


def test_plan_of_a_model_without_lag_is_a_user_error(capsys):
    assert main(["plan", "linear-growth", "--ml"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("error: model 'linear-growth' has no constant lag")


def test_demo_copies_the_examples_and_runs_both(tmp_path, monkeypatch, capsys):
    import bayeslong.workflow.cli as cli

    seen = []

    def fake_run(args, *, fit, collect=None):  # the real run is exercised above; here the wiring
        seen.append((args.study, fit))
        if collect is not None:
            collect.append({"study": args.study})
        return 0

    monkeypatch.setattr(cli, "_run", fake_run)
    folder = tmp_path / "demo"
    assert main(["demo", "--folder", str(folder), "--quiet"]) == 0
    example = Path(cli.__file__).resolve().parents[2] / "examples"
    for name in ("shift_sleep.toml", "shift_sleep.csv", "reading_motivation.toml",
                 "reading_motivation.csv"):
        assert (folder / name).read_bytes() == (example / name).read_bytes()
    assert seen == [(str(folder / "shift_sleep.toml"), True),
                    (str(folder / "reading_motivation.toml"), True)]
    err = capsys.readouterr().err
    assert "invented data" in err and "demo 2 of 2: reading_motivation.toml" in err
    # --json: one document listing both runs' summaries
    assert main(["demo", "--folder", str(folder), "--quiet", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [s["study"] for s in out] == [str(folder / "shift_sleep.toml"),
                                         str(folder / "reading_motivation.toml")]


def test_reading_motivation_example_loads_with_its_indicators():
    # reference: the CSV read by pandas (the indicator columns named in the study file)
    from bayeslong.workflow.study_file import load_study

    example = Path(__file__).resolve().parents[2] / "examples"
    study = load_study(example / "reading_motivation.toml")
    panel = study.panel()
    assert dict(panel.indicators) == {"motivation": ("enjoys", "chooses", "persists")}
    df = pd.read_csv(example / "reading_motivation.csv")
    assert panel.n_units == df["pupil"].nunique() and panel.n_waves == df["term"].nunique()
    np.testing.assert_allclose(np.nanmean(panel.y, axis=0),
                               df.groupby("term")[["enjoys", "chooses", "persists"]].mean())
    assert "invented" in study.title


def test_check_data_lists_intake_warnings(tmp_path, capsys):
    frame = _frame()
    frame["t"] = frame["t"].map({0: 0, 1: 1, 2: 2, 3: 5})  # unequal spacing: 0, 1, 2, 5
    path = _study(tmp_path)
    frame.to_csv(tmp_path / "d.csv", index=False)
    assert main(["check-data", str(path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert len(out["warnings"]) == 1 and "spaced" in out["warnings"][0]


def test_bayesian_run_twice_reuses_the_saved_posterior(tmp_path, capsys, monkeypatch):
    pytest.importorskip("pymc")
    # one small chain with PyMC's NUTS (the cheaper compile): the smallest real Bayesian run
    path = _study(tmp_path, extra='draws = 60\ntune = 60\nchains = 1\nsampler = "pymc"\n'
                                  "[checks]\nppc_draws = 10\n")
    path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
    assert main(["run", str(path), "--json", "--quiet"]) == 0
    first = json.loads(capsys.readouterr().out)
    assert first["method"] == "bayes" and first["fitted"] == 1
    (saved,) = (tmp_path / "out" / "fits").glob("*.nc")
    stamp = saved.stat().st_mtime_ns

    import sys

    monkeypatch.setattr(sys.modules["bayeslong.infer.sampling"], "fit",
                        lambda *a, **k: pytest.fail("sampled again"))
    assert main(["run", str(path), "--json"]) == 0
    second = capsys.readouterr()
    assert "reused 1 saved fit" in second.err
    assert json.loads(second.out)["reused"] == 1 and saved.stat().st_mtime_ns == stamp

    # the lag's posterior mean against pooled least squares of y_t on y_(t-1) (NumPy), the
    # ML estimate of this model's lag when the first wave is predetermined and the panel is
    # complete (here over the pairs with both waves observed; about 10% of entries are
    # missing, so full-information ML differs a little); the tolerance of 2.5 posterior SDs
    # covers that, the prior's pull (normal(0, 0.5)) and the Monte Carlo error of 60 draws
    from bayeslong.infer.sampling import load_fit

    post = load_fit(saved).idata.posterior["lag"].values.ravel()
    wide = _frame().pivot(index="id", columns="t", values="y").to_numpy()
    prev, now = wide[:, :-1].ravel(), wide[:, 1:].ravel()
    ok = ~np.isnan(prev) & ~np.isnan(now)
    X = np.column_stack([np.ones(ok.sum()), prev[ok]])
    ols = np.linalg.lstsq(X, now[ok], rcond=None)[0][1]
    assert abs(post.mean() - ols) < 2.5 * post.std()
    page = (tmp_path / "out" / "report.html").read_text()
    assert "Posterior summary" in page and "Posterior predictive checks" in page


def test_unknown_sampler_is_a_user_error_before_any_fit(tmp_path, capsys):
    path = _study(tmp_path, extra='sampler = "hmc2"\n')
    path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
    assert main(["run", str(path)]) == 1
    err = capsys.readouterr().err
    from bayeslong.infer.sampling import (
        SAMPLERS,  # the fit module's own list is the reference
    )

    listed = ", ".join(repr(s) for s in SAMPLERS)
    assert f"error: study file s.toml: `sampling.sampler` must be one of {listed}; got 'hmc2'" in err
    assert not (tmp_path / "out" / "fits").exists() or not any((tmp_path / "out" / "fits").iterdir())


def test_report_before_run_says_to_run_first(tmp_path, capsys):
    path = _study(tmp_path)
    assert main(["report", str(path)]) == 1
    (line,) = [x for x in capsys.readouterr().err.splitlines() if x.startswith("error:")]
    assert line.startswith("error: candidate 'ar' has no saved results for the current study "
                           "and data")
    assert line.endswith("run `bayeslong run s.toml` first")


def test_sensitivity_reads_the_candidates_fits_instead_of_refitting(tmp_path, capsys, monkeypatch):
    pytest.importorskip("pymc")
    import importlib

    path = _study(tmp_path, extra='draws = 60\ntune = 60\nchains = 1\nsampler = "pymc"\n'
                                  "[checks]\nppc = false\n[sensitivity]\nspecification = true\n"
                                  '[priors]\nlag = ["normal", 0.2, 0.4]\n')
    path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
    fit_module = importlib.import_module("bayeslong.infer.sampling")  # the module, not bl.fit
    real, calls = fit_module.fit, []

    def counted(spec, panel, **kwargs):  # the real fit, counted
        calls.append((spec.name, panel.n_waves, kwargs.get("priors")))
        return real(spec, panel, **kwargs)

    monkeypatch.setattr(fit_module, "fit", counted)
    assert main(["run", str(path), "--json", "--quiet"]) == 0
    out = json.loads(capsys.readouterr().out)
    # one fit, the candidate's (with the study's prior); the sensitivity made none of its own
    assert calls == [("ar", 4, {"lag": ("normal", 0.2, 0.4)})]
    rows = out["sensitivity"]["table"]
    default = next(r for r in rows.values() if r["axis"] == "default")
    assert default["setting"] == "priors as given"
    # reference: the candidate's saved draws, summarised with NumPy (the JSON keeps 10 digits)
    from bayeslong.infer.sampling import load_fit

    (saved,) = (tmp_path / "out" / "fits").glob("*.nc")
    lag = load_fit(saved).idata.posterior["lag"].values.ravel()
    assert default["mean"] == pytest.approx(lag.mean(), rel=1e-8)
    assert default["sd"] == pytest.approx(lag.std(ddof=1), rel=1e-8)
    assert default["q5"] == pytest.approx(np.quantile(lag, 0.05), rel=1e-8)
    # where the time went: every step is listed, and the report says the row was not refitted
    steps = [s["step"] for s in out["stages"]]
    assert steps[0] == "intake" and steps[-1] == "report" and "lag sensitivity" in steps
    page = (tmp_path / "out" / "report.html").read_text()
    assert "read from that fit instead of refitted (default)" in page
    assert "Time spent by step" in page


def test_nutpie_sampler_without_nutpie_is_a_user_error_before_any_fit(tmp_path, capsys, monkeypatch):
    import bayeslong.workflow.runner as study_module

    path = _study(tmp_path, extra='sampler = "nutpie"\n')
    path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
    real = study_module._installed
    monkeypatch.setattr(study_module, "_installed", lambda name: name != "nutpie" and real(name))
    assert main(["run", str(path)]) == 1
    (line,) = [x for x in capsys.readouterr().err.splitlines() if x.startswith("error:")]
    assert line.startswith('error: study file s.toml: `sampling.sampler = "nutpie"` needs the '
                           "nutpie package, which is not installed; install it with")
    assert not (tmp_path / "out" / "fits").exists() or not any((tmp_path / "out" / "fits").iterdir())


def test_worker_processes_give_the_fits_and_forecasts_of_a_run_in_one_process(tmp_path, capsys):
    pytest.importorskip("pymc")
    # reference: the same study run with `workers = 1` (everything in this process); the
    # seeds are the same, so the draws, LOO and leave-future-out scores must be the same
    tables = {}
    for workers in (2, 1):
        folder = tmp_path / f"w{workers}"
        folder.mkdir()
        path = _study(folder, extra=f'draws = 60\ntune = 60\nchains = 1\nsampler = "pymc"\n'
                                    f"workers = {workers}\n[checks]\nppc = false\n"
                                    "[comparison]\nfuture = true\n",
                      model_lines='model = "ar"\n[[models]]\nmodel = "linear-growth"')
        path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
        # --quiet where this process samples: PyMC's progress bar would write to the
        # stream an earlier test captured (workers sample without one)
        assert main(["run", str(path), "--json"] + (["--quiet"] if workers == 1 else [])) == 0
        captured = capsys.readouterr()
        out = json.loads(captured.out)
        assert out["fitted"] == 2, [m["notes"] for m in out["models"]]
        tables[workers] = out["comparison"]["table"]
        if workers == 2:
            assert "in one of 2 worker processes" in captured.err
            # the workers' progress reaches this process's stderr (through a queue)
            assert "ar: sampling done in" in captured.err
            assert "ar (leave-future-out refit): sampling done in" in captured.err
            assert "candidates (all)" in [s["step"] for s in out["stages"]]
    for name in ("ar", "linear-growth"):
        for column in ("elpd_loo", "elpd_waic", "elpd_lfo", "se_lfo"):
            assert tables[2][name][column] == pytest.approx(tables[1][name][column], rel=1e-9)
