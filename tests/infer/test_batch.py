"""Batch runs: local process pool and a loopback Dask cluster agree; failures stay local.

The reference for every batch result is the same fit run directly in this process
(`bl.fit_ml`), so the pool, the cluster and a plain loop must give the same numbers.
Maximum-likelihood tasks keep these tests fast.
"""

import concurrent.futures as cf

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.infer.batch import Task, run_many
from bayeslong.model.simulation import Simulation

AR = {"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0, "initial_var": 1.0, "resid_var": 1.0}
FAST = {"starts": 1, "check": False}  # one start, no identification pass: compile + one optimisation


def _grid():
    """A small seeded grid: the AR model on two simulated panels (drawn inside the workers
    from their recipes); a recipe whose parameters are misspelt (fails while drawing the
    data); and a fixed-effects fit on a panel with a time-invariant covariate, which is not
    identified (docs/model-family.md: z cannot enter the fixed-effects model) and must fail by name."""
    tasks = [Task(name=f"ar-{s}", spec=bl.model("ar"), kind="fit_ml", seed=0, kwargs=FAST,
                  panel=Simulation(spec=bl.model("ar"), params=AR, n_units=150, n_waves=4, seed=s))
             for s in (1, 2)]
    tasks.append(Task(name="misspelt", spec=bl.model("ar"), kind="fit_ml", kwargs=FAST,
                      panel=Simulation(spec=bl.model("ar"), params={**AR, "lagg": 0.1},
                                       n_units=150, n_waves=4, seed=3)))
    with_z = Simulation(spec=bl.model("ar"), params={**AR, "effect[z]": 0.3,
                                                     "initial_effect[z]": 0.2},
                        n_units=120, n_waves=4, seed=9, time_invariant={"z": ("bernoulli", 0.5)})
    tasks.append(Task(name="fixed-effects-with-z", spec=bl.model("fixed-effects").to_dict(),
                      panel=with_z.panel(), kind="fit_ml"))
    return tasks


@pytest.fixture(scope="module")
def local_run():
    return run_many(_grid(), progress=True)


def test_failed_tasks_are_reported_by_name_and_the_rest_complete(local_run):
    assert list(local_run.table.index) == ["ar-1", "ar-2", "misspelt", "fixed-effects-with-z"]
    assert sorted(local_run.failed) == ["fixed-effects-with-z", "misspelt"]
    assert local_run.failed["fixed-effects-with-z"].startswith("IdentificationError: model "
                                                               "'fixed-effects' is not identified")
    assert local_run.failed["misspelt"].startswith("SpecError: params has 'lagg'")
    assert list(local_run.table["status"]) == ["ok", "ok", "error", "error"]
    assert list(local_run["ar-1"].summary.columns) == ["estimate", "se"]


def test_pool_equals_fit_ml_called_here(local_run):
    # reference: bl.fit_ml called by hand in this process on the same recipe
    task = _grid()[0]
    ml = bl.fit_ml(task.spec, task.panel.panel(), seed=0, **FAST)
    np.testing.assert_allclose(local_run["ar-1"].summary["estimate"], ml.params.to_numpy(),
                               rtol=1e-10)  # same code and data, one BLAS thread: round-off only
    assert local_run["ar-1"].info["loglik"] == pytest.approx(ml.loglik, rel=1e-12)
    # the two seeds gave two different panels, hence different estimates
    assert not np.allclose(local_run["ar-1"].summary["estimate"],
                           local_run["ar-2"].summary["estimate"])


def test_dask_cluster_gives_identical_summaries(local_run):
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=None)
    try:
        with distributed.Client(cluster) as client:
            remote = run_many(_grid(), client.get_executor(), progress=False)
    finally:
        cluster.close()
    assert remote.failed == local_run.failed
    # identical: same deterministic optimiser, one BLAS thread on both sides
    pd.testing.assert_frame_equal(remote.summaries(), local_run.summaries(), check_exact=True)
    pd.testing.assert_frame_equal(remote.table.drop(columns="seconds"),
                                  local_run.table.drop(columns="seconds"), check_exact=True)


def _boom(spec, panel, seed=None):
    raise RuntimeError("deliberate failure")


def _warns(spec, panel, seed=None):
    import warnings

    warnings.warn("deliberate warning", UserWarning)
    return {"units": panel.n_units}


def test_thread_executor_and_custom_function_path():
    panel = Simulation(spec=bl.model("ar"), params=AR, n_units=50, n_waves=4, seed=5)
    tasks = [Task(name="boom", spec=bl.model("ar"), panel=panel, kind="test_batch:_boom"),
             Task(name="bad-path", spec=bl.model("ar"), panel=panel, kind="nowhere.at_all:fn"),
             Task(name="warns", spec=bl.model("ar"), panel=panel, kind="test_batch:_warns")]
    with cf.ThreadPoolExecutor(1) as ex:
        out = run_many(tasks, ex, progress=False)
    assert out.failed == {"boom": "RuntimeError: deliberate failure",
                          "bad-path": out.failed["bad-path"]}
    assert "names no importable function" in out.failed["bad-path"]
    # a returned dict becomes the info; warnings are collected on the result, not lost
    assert out["warns"].info == {"units": 50, "warnings": 1}
    assert out["warns"].warnings == ("UserWarning: deliberate warning",)


def test_bad_tasks_say_what_to_fix():
    t = Task(name="a", spec=bl.model("ar"), panel=None, kind="fit_ml")
    with pytest.raises(SpecError, match="task names must be unique; 'a' appear"):
        run_many([t, t])
    with pytest.raises(SpecError, match="`kind` must be one of fit, fit_ml"):
        Task(name="b", spec=bl.model("ar"), panel=None, kind="mcmc")
    with pytest.raises(SpecError, match="run_many takes Task objects"):
        run_many([("a", "b")])


def test_serial_executor_reports_progress_per_task(capsys):
    from bayeslong.infer.batch import SerialExecutor

    panel = Simulation(spec=bl.model("ar"), params=AR, n_units=20, n_waves=4, seed=5)
    tasks = [Task(name=f"w{i}", spec=bl.model("ar"), panel=panel, kind="test_batch:_warns")
             for i in range(2)] + [Task(name="boom", spec=bl.model("ar"), panel=panel,
                                        kind="test_batch:_boom")]
    out = run_many(tasks, SerialExecutor())
    lines = capsys.readouterr().err.splitlines()
    assert [ln.split(" (")[0] for ln in lines] == [
        "[1/3] w0: ok", "[2/3] w1: ok", "[3/3] boom: RuntimeError: deliberate failure"]
    assert list(out.table["status"]) == ["ok", "ok", "error"]
