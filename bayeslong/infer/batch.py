"""Many fits at once: a grid of priors, a set of models, replications of a simulation study.

A :class:`Task` is a small picklable description of one fit; :func:`run_many` sends the
tasks through any :class:`concurrent.futures.Executor` and gathers light summaries.

- By default a local process pool sized to the machine runs them. Each worker limits
  BLAS/OpenMP to one thread (several multi-threaded workers on a 2-core machine slow each
  other down many times over, docs/engine.md).
- A Dask cluster runs them when given its executor: ``run_many(tasks, client.get_executor())``
  (``pip install "dask[distributed]"``; imported only by the caller).
- A task that raises does not stop the others: its result has ``status="error"`` and the
  error message, under the task's name.
- Results are summaries (posterior mean, SD, 5% and 95% quantiles, R-hat and bulk ESS of
  each parameter; estimates and SEs for maximum likelihood) unless ``keep=True`` asks for
  the whole fit objects as well.

Scripts that use the default pool must guard their entry point with
``if __name__ == "__main__":``, as for any process pool that starts fresh interpreters.
"""

from __future__ import annotations

import concurrent.futures as cf
import importlib
import inspect
import os
import sys
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from bayeslong.errors import SpecError
from bayeslong.model.spec import Spec

#: Built-in task kinds; any other kind is a "package.module:function" path.
KINDS = ("fit", "fit_ml")

from bayeslong.threads import THREAD_VARS as _THREAD_VARS  # noqa: E402


@dataclass(frozen=True, kw_only=True, eq=False)
class Task:
    """One fit to run: which model, on which data, by which method.

    Parameters
    ----------
    name : str
        Unique label; results and errors are reported under it.
    spec : Spec or dict
        The model (a dict from :meth:`Spec.to_dict` is accepted).
    panel : Panel or Simulation
        The data, or a :class:`~bayeslong.simulate.Simulation` recipe drawn inside the
        worker (cheaper to ship than the data).
    kind : str, default "fit"
        ``"fit"`` (:func:`bayeslong.fit`), ``"fit_ml"`` (:func:`bayeslong.fit_ml`) or a
        ``"package.module:function"`` path to a function called as
        ``function(spec, panel, **kwargs)``; if it returns a dict, that dict is the
        result's ``info``, or ``{"summary": DataFrame, "info": dict}`` gives both.
    kwargs : dict
        Keyword arguments of the fitting function (``draws``, ``priors`` ...).
    seed : int, optional
        Passed as ``seed=`` to the fitting function.
    params : tuple of str, optional
        Parameters to summarise; default all.
    """

    name: str
    spec: Spec
    panel: object
    kind: str = "fit"
    kwargs: dict = field(default_factory=dict)
    seed: int | None = None
    params: tuple | None = None

    def __post_init__(self):
        if isinstance(self.spec, dict):
            object.__setattr__(self, "spec", Spec.from_dict(self.spec))
        if not isinstance(self.spec, Spec):
            raise SpecError(f"task {self.name!r}: `spec` must be a Spec (bl.model(...)) or its "
                            f"to_dict(); got {type(self.spec).__name__}")
        if self.kind not in KINDS and ":" not in str(self.kind):
            raise SpecError(f"task {self.name!r}: `kind` must be one of {', '.join(KINDS)} or a "
                            f"'package.module:function' path; got {self.kind!r}")
        if self.params is not None:
            object.__setattr__(self, "params", tuple(self.params))


@dataclass(frozen=True, kw_only=True, eq=False)
class TaskResult:
    """Outcome of one :class:`Task`.

    Attributes
    ----------
    name : str
    status : {"ok", "error"}
    error : str
        ``"ErrorClass: message"`` when the task raised, else empty.
    seconds : float
        Wall time of the task inside its worker (data drawing included).
    summary : pandas.DataFrame
        One row per parameter. Bayesian fits: mean, sd, q5, q95, r_hat, ess_bulk.
        Maximum likelihood: estimate, se.
    info : dict
        Fit-level numbers: divergences, max R-hat, min bulk ESS (Bayes); loglik, converged
        (maximum likelihood); ``warnings``, the number of warnings the task raised.
    warnings : tuple of str
        ``"WarningClass: message"`` of each distinct warning raised by the task (collected
        here, since a worker process's warnings would not reach the caller).
    value : object or None
        The whole fit object when ``keep=True``.
    """

    name: str
    status: str
    error: str = ""
    seconds: float = float("nan")
    summary: pd.DataFrame = field(default_factory=pd.DataFrame)
    info: dict = field(default_factory=dict)
    warnings: tuple = ()
    value: object = None

    @property
    def ok(self) -> bool:
        return self.status == "ok"


@dataclass(frozen=True, kw_only=True, eq=False)
class BatchResult:
    """All results of :func:`run_many`, in task order.

    ``result.table`` has one row per task (name, status, error, seconds and the info
    numbers); ``result.summaries()`` stacks the per-parameter summaries with a ``task``
    column; ``result["name"]`` is one task's :class:`TaskResult`.
    """

    results: tuple[TaskResult, ...]

    @property
    def table(self) -> pd.DataFrame:
        rows = [{"name": r.name, "status": r.status, "error": r.error, "seconds": r.seconds,
                 **r.info} for r in self.results]
        return pd.DataFrame(rows).set_index("name")

    def summaries(self) -> pd.DataFrame:
        """Per-parameter summaries of the tasks that succeeded, with ``task`` and ``parameter`` columns."""
        parts = [r.summary.rename_axis("parameter").reset_index().assign(task=r.name)
                 for r in self.results if r.ok and len(r.summary)]
        if not parts:
            return pd.DataFrame(columns=["task", "parameter"])
        out = pd.concat(parts, ignore_index=True)
        return out[["task", "parameter"] + [c for c in out.columns if c not in ("task", "parameter")]]

    @property
    def failed(self) -> dict[str, str]:
        """Error message of each failed task, by name."""
        return {r.name: r.error for r in self.results if not r.ok}

    def __getitem__(self, name: str) -> TaskResult:
        for r in self.results:
            if r.name == name:
                return r
        raise KeyError(f"no task named {name!r}; tasks are: {', '.join(r.name for r in self.results)}")

    def __len__(self) -> int:
        return len(self.results)

    def __iter__(self):
        return iter(self.results)


# --- inside a worker ---------------------------------------------------------------------
def limit_threads() -> None:
    """Cap BLAS/OpenMP at one thread in this process (the pool's worker initializer)."""
    for var in _THREAD_VARS:
        os.environ[var] = "1"
    try:
        from threadpoolctl import threadpool_limits

        global _LIMITER
        _LIMITER = threadpool_limits(limits=1)
    except ImportError:  # threadpoolctl is a dependency; the env vars still apply
        pass


_LIMITER = None


def _function(kind: str):
    if kind == "fit":  # continuous and categorical panels alike (infer/fitting.py)
        from bayeslong.infer.fitting import fit

        return fit
    if kind == "fit_ml":
        from bayeslong.infer.ml import fit_ml

        return fit_ml
    module, _, attr = kind.partition(":")
    try:
        return getattr(importlib.import_module(module), attr)
    except (ImportError, AttributeError) as err:
        raise SpecError(f"task kind {kind!r} names no importable function ({err}); give "
                        "'package.module:function' of a module-level function") from err


def summarise_draws(idata, params=None) -> tuple[pd.DataFrame, dict]:
    """Mean, SD, 5%/95% quantiles, R-hat and bulk ESS of each posterior variable, and fit flags."""
    import arviz as az

    post = idata.posterior
    names = list(params) if params is not None else list(post.data_vars)
    rhat = az.rhat(post[names])
    ess = az.ess(post[names], method="bulk")
    rows = {}
    for n in names:
        x = np.asarray(post[n].values, dtype=float).reshape(-1)
        rows[n] = {"mean": x.mean(), "sd": x.std(ddof=1), "q5": np.quantile(x, 0.05),
                   "q95": np.quantile(x, 0.95), "r_hat": float(rhat[n]), "ess_bulk": float(ess[n])}
    table = pd.DataFrame.from_dict(rows, orient="index")
    info = {"max_r_hat": float(table["r_hat"].max()) if len(table) else float("nan"),
            "min_ess_bulk": float(table["ess_bulk"].min()) if len(table) else float("nan")}
    stats = getattr(idata, "sample_stats", None)
    if stats is not None and "diverging" in stats:
        info["divergences"] = int(np.asarray(stats["diverging"]).sum())
    return table, info


def _summarise(kind: str, value, params):
    if kind == "fit_ml":
        names = list(params) if params is not None else list(value.params.index)
        table = pd.DataFrame({"estimate": value.params[names], "se": value.se[names]})
        return table, {"loglik": float(value.loglik), "converged": bool(value.converged)}
    if kind == "fit" or hasattr(value, "idata"):
        return summarise_draws(value.idata, params)
    if isinstance(value, dict):
        if isinstance(value.get("summary"), pd.DataFrame):  # {"summary": table, "info": {...}}
            return value["summary"], dict(value.get("info", {}))
        return pd.DataFrame(), dict(value)
    return pd.DataFrame(), {}


def fit_defaults(fn, kwargs: dict) -> dict:
    """Fill in ``cores=1`` inside a worker process and ``progressbar=False`` (in place).

    In a pool worker the pool is the parallelism: chains run one after another there
    instead of starting processes of their own. In the calling process (a serial run) the
    fit keeps its own default.
    """
    import multiprocessing as mp

    accepted = inspect.signature(fn).parameters
    # a function taking **kwargs (bl.fit, which passes them to the continuous or the
    # categorical fit, both of which take these two) gets them too
    every = any(p.kind is inspect.Parameter.VAR_KEYWORD for p in accepted.values())
    if ("cores" in accepted or every) and mp.parent_process() is not None:
        kwargs.setdefault("cores", 1)
    if "progressbar" in accepted or every:
        kwargs.setdefault("progressbar", False)
    return kwargs


def run_task(task: Task, keep: bool = False) -> TaskResult:
    """Run one task here and now; any exception becomes an error result (never raised)."""
    start = time.perf_counter()
    try:
        from threadpoolctl import threadpool_limits

        limiter = threadpool_limits(limits=1)
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        limiter = None
    caught: list = []
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            panel = task.panel.panel() if hasattr(task.panel, "panel") and \
                callable(task.panel.panel) else task.panel
            fn = _function(task.kind)
            kwargs = dict(task.kwargs)
            if task.seed is not None:
                kwargs.setdefault("seed", task.seed)
            if task.kind == "fit":
                fit_defaults(fn, kwargs)
            value = fn(task.spec, panel, **kwargs)
            summary, info = _summarise(task.kind, value, task.params)
        seen = warning_texts(caught)
        return TaskResult(name=task.name, status="ok", seconds=time.perf_counter() - start,
                          summary=summary, info={**info, "warnings": len(seen)}, warnings=seen,
                          value=value if keep else None)
    except Exception as err:  # noqa: BLE001 - one failed task must not lose the others
        return TaskResult(name=task.name, status="error", error=f"{type(err).__name__}: {err}",
                          seconds=time.perf_counter() - start, warnings=warning_texts(caught))
    finally:
        if limiter is not None:
            limiter.restore_original_limits()


def warning_texts(caught) -> tuple[str, ...]:
    return tuple(dict.fromkeys(f"{w.category.__name__}: {w.message}" for w in caught
                               if not issubclass(w.category, (DeprecationWarning,
                                                              PendingDeprecationWarning))))


# --- the caller's side -------------------------------------------------------------------
class SerialExecutor(cf.Executor):
    """Run each submitted call at once in this process (no pool, no pickling).

    Useful when the fits should reuse this process's compiled models, e.g. a prior grid
    on one dataset: ``run_many(tasks, SerialExecutor())``.
    """

    def submit(self, fn, /, *args, **kwargs) -> cf.Future:
        future: cf.Future = cf.Future()
        try:
            future.set_result(fn(*args, **kwargs))
        except BaseException as err:  # noqa: BLE001 - handed to the caller through the future
            future.set_exception(err)
        return future


def default_workers() -> int:
    """CPU cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def default_executor(n_tasks: int) -> cf.Executor:
    import multiprocessing as mp

    # forkserver: workers start from a clean process, not a copy of a parent that may run
    # threads (a Dask client, a progress thread) -- forking those is unsafe
    method = "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"
    return cf.ProcessPoolExecutor(max_workers=max(1, min(default_workers(), n_tasks)),
                                  mp_context=mp.get_context(method), initializer=limit_threads)


def run_many(tasks, executor: cf.Executor | None = None, *, progress: bool = True,
             keep: bool = False) -> BatchResult:
    """Run many fits through a process pool or any executor and gather their summaries.

    Parameters
    ----------
    tasks : sequence of Task
        Names must be unique.
    executor : concurrent.futures.Executor, optional
        Where to run. Default: a local process pool with one worker per core, each
        limited to one BLAS/OpenMP thread, shut down at the end. A Dask cluster:
        ``client.get_executor()`` (the caller owns and closes it).
        :class:`SerialExecutor` runs the tasks one after another in this process.
    progress : bool, default True
        Print one line per finished task to stderr (name, status, seconds).
    keep : bool, default False
        Also return the whole fit objects (``TaskResult.value``); they must be picklable
        to come back from a process pool.

    Returns
    -------
    BatchResult
        Results in task order; ``.table`` one row per task, ``.summaries()`` per parameter,
        ``.failed`` the errors by task name.

    Raises
    ------
    SpecError
        A task is not a :class:`Task` or two tasks share a name.

    Examples
    --------
    >>> import bayeslong as bl
    >>> sims = [bl.Simulation(spec=bl.model("ar"), n_units=100, n_waves=4, seed=s,
    ...                       params={"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0,
    ...                               "initial_var": 1.0, "resid_var": 1.0}) for s in range(4)]
    >>> tasks = [bl.Task(name=f"rep{s}", spec=bl.model("ar"), panel=sim, kind="fit_ml")
    ...          for s, sim in enumerate(sims)]
    >>> if __name__ == "__main__":                                       # doctest: +SKIP
    ...     print(bl.run_many(tasks).summaries())
    """
    tasks = list(tasks)
    for t in tasks:
        if not isinstance(t, Task):
            raise SpecError(f"run_many takes Task objects (bl.Task(name=..., spec=..., panel=...)); "
                            f"got {type(t).__name__}")
    names = [t.name for t in tasks]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise SpecError(f"task names must be unique; {', '.join(map(repr, dup))} appear more than "
                        "once (results are reported by name)")
    if not tasks:
        return BatchResult(results=())
    own = executor is None
    if own:
        executor = default_executor(len(tasks))
    results: dict[str, TaskResult] = {}

    def collect(name: str, fut: cf.Future) -> None:
        try:
            res = fut.result()
        except Exception as err:  # noqa: BLE001 - a worker that died, a pickling failure
            res = TaskResult(name=name, status="error", error=f"{type(err).__name__}: {err}")
        results[name] = res
        if progress:
            what = "ok" if res.ok else res.error.splitlines()[0][:120]
            print(f"[{len(results)}/{len(tasks)}] {name}: {what} ({res.seconds:.1f} s)",
                  file=sys.stderr, flush=True)

    try:
        if isinstance(executor, SerialExecutor):  # runs on submit: report each as it ends
            for t in tasks:
                collect(t.name, executor.submit(run_task, t, keep))
        else:
            futures = {executor.submit(run_task, t, keep): t.name for t in tasks}
            for fut in cf.as_completed(futures):
                collect(futures[fut], fut)
    finally:
        if own:
            executor.shutdown(wait=True, cancel_futures=True)
    return BatchResult(results=tuple(results[n] for n in names))
