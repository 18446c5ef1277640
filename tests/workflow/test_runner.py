"""The sensitivity and leave-future-out refits of a study start from the study's own priors.

Reference: the study file's ``[priors]`` table. The fit function is replaced by a recorder
that notes each call's ``priors`` argument and then runs the real (tiny) fit, so what is
checked is what every refit was asked for, on the code path ``bayeslong run`` takes.
"""

import importlib
import json

import numpy as np
import pytest
from test_cli import _study

from bayeslong.workflow.cli import main

LAG = ("normal", 0.2, 0.4)
RESID = ("halfnormal", 2.0)
PRIORS = '[priors]\nlag = ["normal", 0.2, 0.4]\nresid_var = ["halfnormal", 2.0]\n'
MODELS = 'model = "ar"\n[[models]]\nmodel = "linear-growth"'


def test_sensitivity_and_leave_future_out_refits_use_the_study_priors(tmp_path, capsys, monkeypatch):
    pytest.importorskip("pymc")
    import bayeslong.evaluate.sensitivity as sensitivity

    # one lag prior and one SD scale on the prior axis keep the run small
    monkeypatch.setattr(sensitivity, "LAG_PRIORS", (("normal", 0.0, 0.1),))
    monkeypatch.setattr(sensitivity, "VARIANCE_SCALES", (2.0,))
    path = _study(tmp_path, extra='draws = 60\ntune = 60\nchains = 1\nsampler = "pymc"\n'
                                  "workers = 1\n[checks]\nppc = false\n[comparison]\nfuture = true\n"
                                  "[sensitivity]\nprior_grid = true\n" + PRIORS,
                  model_lines=MODELS)
    path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
    fit_module = importlib.import_module("bayeslong.infer.sampling")
    real, calls = fit_module.fit, []

    def recorded(spec, panel, **kwargs):
        hidden = panel.n_waves == 4 and bool(np.isnan(panel.y[:, -1]).all())
        calls.append((spec.name, "past" if hidden or panel.n_waves == 3 else "all",
                      dict(kwargs.get("priors") or {})))
        return real(spec, panel, **kwargs)

    monkeypatch.setattr(fit_module, "fit", recorded)
    assert main(["run", str(path), "--json", "--quiet"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["future"]["ran"] and out["sensitivity"]["ran"], out
    # 60 draws of one chain cannot reach the tail-ESS threshold of 400 (an ESS above the
    # number of draws needs anticorrelated draws, rare in the tails): every candidate's
    # convergence problems must reach the results, and from there the report's red banner
    assert all(any("ess" in p for p in m["problems"]) for m in out["models"]), out["models"]
    by = {}
    for name, data, priors in calls:
        by.setdefault((name, data), []).append(priors)
    # the candidates: the study's overrides that name their parameters
    assert by[("ar", "all")][0] == {"lag": LAG, "resid_var": RESID}
    assert by[("linear-growth", "all")][0] == {"resid_var": RESID}
    # leave-future-out refits (waves 1..3): the study's overrides, written out with the
    # other defaults when the compiled full-data model is reused (comparison.forecast_score)
    for name in ("ar", "linear-growth"):
        (lfo,) = by[(name, "past")]
        assert lfo["resid_var"] == RESID
        assert lfo.get("lag") == (LAG if name == "ar" else None)
    # the prior axis varies around the study's priors: the grid replaces the lag's prior
    # and keeps the rest; the SD scale multiplies the study's resid_var scale by 2
    grid, scaled = by[("ar", "all")][1:]
    assert grid == {"lag": ("normal", 0.0, 0.1), "resid_var": RESID}
    assert scaled["lag"] == LAG and scaled["resid_var"] == ("halfnormal", 4.0)
    assert len(calls) == 6  # 2 candidates, 2 leave-future-out refits, 2 prior settings


def test_worker_fits_and_their_leave_future_out_refits_get_the_study_priors(tmp_path):
    from bayeslong.workflow.runner import _fit_settings, _submit
    from bayeslong.workflow.study_file import load_study

    path = _study(tmp_path, extra="workers = 2\n" + PRIORS, model_lines=MODELS)
    study = load_study(path)
    panel = study.panel()
    submitted = []

    class Pool:  # records what would be sent to a worker process
        def submit(self, fn, *args):
            submitted.append(args)

    future = {**_fit_settings(study), "progressbar": False}
    for cand in study.models:
        _submit(Pool(), study, panel, cand, tmp_path, future, lambda m: None, 2)
    (ar_spec, _, ar_kwargs, _, ar_future), (_, _, lg_kwargs, _, lg_future) = submitted
    assert ar_spec.name == "ar"
    assert ar_kwargs["priors"] == ar_future["priors"] == {"lag": LAG, "resid_var": RESID}
    assert lg_kwargs["priors"] == lg_future["priors"] == {"resid_var": RESID}


def test_a_maximum_likelihood_run_finds_by_aic_with_a_wald_interval(tmp_path, capsys):
    from scipy import stats

    import bayeslong as bl

    path = _study(tmp_path, model_lines=MODELS)
    assert main(["run", str(path), "--json", "--quiet"]) == 0
    out = json.loads(capsys.readouterr().out)
    f = out["findings"]
    aic = {m["label"]: m["ml"]["aic"] for m in out["models"]}
    assert f["best_loo"] is None and f["best_aic"]["model"] == min(aic, key=aic.get)
    # reference: the ML fit of the same data, and the normal quantile from SciPy
    from bayeslong.workflow.study_file import load_study

    ml = bl.fit_ml(bl.model("ar"), load_study(path).panel())
    z = stats.norm.ppf(0.95)
    assert f["lag"]["mean"] == pytest.approx(ml.params["lag"], rel=1e-6)
    assert f["lag"]["high"] - f["lag"]["low"] == pytest.approx(2 * z * ml.se["lag"], rel=1e-6)
    assert "90% Wald interval" in " ".join(f["text"])
    page = (tmp_path / "out" / "report.html").read_text()
    assert "fitted by maximum likelihood only" in page and "(Akaike 1974)" in page


def test_a_second_study_in_one_process_reuses_the_worker_pool():
    # `bayeslong demo` runs two studies; the second must find the first one's workers, which
    # have imported the libraries and loaded the compiled kernel, instead of starting new ones
    import os

    from bayeslong.workflow import workers

    first = workers.get_pool(2)
    before = {first.submit(os.getpid).result() for _ in range(6)}
    assert workers.get_pool(2) is first
    after = {workers.get_pool(2).submit(os.getpid).result() for _ in range(6)}
    assert after <= set(first._processes) and before <= set(first._processes)
    workers.drop_pool(first)  # an interrupted run drops its pool ...
    second = workers.get_pool(2)
    assert second is not first and not first._processes  # ... and the next run gets a new one
    workers.drop_pool(second)
    assert workers._POOLS == {}
