"""The worker processes of a study run: how many, one pool kept per process, the job they run.

A study samples its candidates side by side in worker processes when there are several and
the machine has the cores (``[sampling] workers``); each worker also makes its candidate's
leave-future-out refit while the model is compiled there (docs/engine.md, "Compile once per
machine"). The pool outlives one run, so a second study in the same process (``bayeslong
demo`` runs two) starts on workers that have imported the libraries and loaded the kernel.
"""

from __future__ import annotations

import atexit
import time
import warnings

from bayeslong.errors import BayeslongError, SpecError


def worker_count(asked: int, n_jobs: int) -> int:
    """Worker processes for ``n_jobs`` candidate fits (1: sample here, one after another)."""
    from bayeslong.infer.batch import default_workers

    if isinstance(asked, bool) or not isinstance(asked, int) or asked < 0:
        raise SpecError(f"`workers` must be a whole number >= 0 (0: one per CPU core); "
                        f"got {asked!r}")
    return max(1, min(asked or default_workers(), n_jobs))


#: Worker pools by size, kept for the next study run in this process (``bayeslong demo``
#: runs two studies): their workers have imported the libraries and loaded the compiled
#: kernel already, which a new pool's workers spend seconds on.
_POOLS: dict = {}


def get_pool(workers: int):
    """The process pool of ``workers`` workers: this process's kept one, or a new one."""
    from bayeslong.infer.batch import default_executor

    pool = _POOLS.get(workers)
    if pool is None or pool._broken or pool._shutdown_thread:  # a dead pool is replaced
        pool = _POOLS[workers] = default_executor(workers)
        if len(_POOLS) == 1:
            atexit.register(close_pools)
    return pool


def drop_pool(pool) -> None:
    """Shut ``pool`` down (its queued fits cancelled) and forget it."""
    pool.shutdown(wait=True, cancel_futures=True)
    for k in [k for k, v in _POOLS.items() if v is pool]:
        del _POOLS[k]


def close_pools() -> None:
    for pool in list(_POOLS.values()):
        drop_pool(pool)


def sample_job(spec, panel, kwargs: dict, path: str, future_kwargs: dict | None) -> dict:
    """Sample one candidate and save it to ``path`` (in a worker process).

    With ``future_kwargs``, also make its leave-future-out score while its model is
    compiled in this process. Returns the fit's timing and the score (or why not).
    """
    from bayeslong.errors import ConvergenceWarning
    from bayeslong.infer.fitting import fit

    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # recorded from the saved fit
        result = fit(spec, panel, **kwargs)
    result.save(path)
    out = {"timing": dict(result.timing), "seconds": time.perf_counter() - t0, "forecast": None}
    if future_kwargs is not None:
        from bayeslong.evaluate.comparison import forecast_score

        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ConvergenceWarning)  # kept in score.problems
                out["forecast"] = forecast_score(spec, panel, **future_kwargs)
        except BayeslongError:
            pass  # the comparison meets the same error and says so
    return out
