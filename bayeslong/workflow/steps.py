"""Optional steps of a study run: timed, failure-tolerant, and saved for reuse by content.

A step (comparison, checks, sensitivity) that fails records why instead of stopping the
run; its value is saved under ``<output>/steps`` keyed by a hash of everything it depends
on, so a second run with the same fits reuses it.
"""

from __future__ import annotations

import hashlib
import json
import time
from pathlib import Path
from typing import Any, Callable

from bayeslong.errors import BayeslongError
from bayeslong.workflow.results import Step
from bayeslong.workflow.study_file import Study, package_version


def step_path(study: Study, name: str, parts: dict) -> Path:
    """Where :func:`saved_step` saves the value of step ``name`` for ``parts``."""
    key = hashlib.sha256(json.dumps({"step": name, **parts, "version": package_version()},
                                    sort_keys=True, default=str).encode()).hexdigest()[:16]
    return study.output / "steps" / f"{name}-{key}.pkl"


def saved_step(study: Study, name: str, parts: dict, compute: Callable[[], Any], say=None,
            message: str = "") -> Callable[[], Any]:
    """Wrap ``compute`` so its value is saved under ``<output>/steps`` and reused by content.

    ``parts`` must hold everything the value depends on (fit keys and settings);
    ``message`` is said before computing, or with "reused" when the saved value serves.
    """
    say = say or (lambda m: None)
    import pickle

    path = step_path(study, name, parts)

    def run():
        if path.exists():
            try:
                with open(path, "rb") as fh:
                    value = pickle.load(fh)
                say(f"{message}: reused the saved result")
                return value
            except Exception:  # unreadable (other version): compute again
                pass
        say(message)
        value = compute()
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            with open(path, "wb") as fh:
                pickle.dump(value, fh)
        except Exception:  # not picklable: it is simply recomputed next time
            path.unlink(missing_ok=True)
        return value

    return run


def timed_step(step: Callable[[], Any], what: str, say, strict: bool = False) -> Step:
    """Run one optional step; a failure becomes a 'not run' record with the reason."""
    t0 = time.perf_counter()
    try:
        value = step()
    except BayeslongError as err:
        say(f"{what}: not run: {err}")
        return Step(ran=False, reason=str(err), seconds=time.perf_counter() - t0)
    except Exception as err:  # an unexpected failure in one step must not lose the others
        if strict:
            raise
        say(f"{what}: FAILED ({type(err).__name__}: {err})")
        return Step(ran=False, reason=f"failed with {type(err).__name__}: {err}",
                    seconds=time.perf_counter() - t0)
    return Step(ran=True, value=value, seconds=time.perf_counter() - t0)
