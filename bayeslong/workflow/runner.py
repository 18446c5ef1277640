"""Carry out a study: intake, identification, fits, comparison, checks, sensitivity.

:func:`run_study` runs what a :class:`~bayeslong.workflow.study_file.Study` asks for and
saves every finished fit and table under the output folder, so that a second run reuses
them while the study and the data are unchanged (the content hashes of
:meth:`Study.fit_key`).
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import sys
import time
import warnings
from pathlib import Path
from typing import Callable

from bayeslong.errors import BayeslongError, SpecError
from bayeslong.evaluate.comparison import LFO_COLUMNS
from bayeslong.infer.pooling import POOLING_KEY
from bayeslong.model.measurement import nearest_exact
from bayeslong.workflow.category_run import (
    NO_ML,
    SENSITIVITY_AXES,
    is_categorical,
)
from bayeslong.workflow.progress import QueueForwarder
from bayeslong.workflow.results import (
    ModelResult,
    Step,
    StudyResults,
    convergence_problems,
    slug,
    table_of,
)
from bayeslong.workflow.steps import saved_step, step_path, timed_step
from bayeslong.workflow.study_file import (
    Candidate,
    Study,
    nearest_hint,
    software_versions,
)
from bayeslong.workflow.workers import drop_pool, get_pool, sample_job, worker_count


def _installed(package: str) -> bool:
    from importlib.util import find_spec

    return find_spec(package) is not None


def optional_module(name: str):
    """Import ``bayeslong.<name>`` if it exists; return (module, reason it is absent)."""
    import importlib

    try:
        return importlib.import_module(f"bayeslong.{name}"), ""
    except ModuleNotFoundError as err:
        if err.name in (f"bayeslong.{name}",):
            return None, f"this installation has no bayeslong.{name} module"
        raise


def _stderr(message: str) -> None:
    print(f"[bayeslong] {message}", file=sys.stderr, flush=True)


def check_priors(study: Study, panel) -> None:
    """Check every prior override against the candidates' parameters and prior rules.

    Raises
    ------
    SpecError
        A prior names a parameter no candidate has (nearest name suggested), or a prior
        is malformed for a model that has the parameter (the model is named).
    """
    from bayeslong.infer.priors import resolve_priors
    from bayeslong.model.structure import structure_for

    if not study.priors:
        return
    structures = {c.label: structure_for(c.spec, panel) for c in study.models}
    every = sorted({n for s in structures.values() for n in s.names})
    for name in study.priors:
        if name != POOLING_KEY and not any(name in s.names for s in structures.values()):
            raise SpecError(
                f"study file {study.source.name}: `priors.{name}` names no parameter of any "
                f"candidate{nearest_hint(name, every)} (the candidates' parameters: {', '.join(every)})")
    for label, structure in structures.items():
        mine = {k: v for k, v in study.priors.items() if k in structure.names or k == POOLING_KEY}
        try:
            resolve_priors(structure, panel, mine)
        except SpecError as err:
            raise SpecError(f"study file {study.source.name}, candidate {label!r}: {err}") from err


def _priors_for(study: Study, spec, panel) -> dict:
    from bayeslong.model.structure import structure_for

    names = structure_for(spec, panel).names
    return {k: v for k, v in study.priors.items() if k in names or k == POOLING_KEY}


def run_study(study: Study, *, fit: bool = True, progress: Callable[[str], None] | None = _stderr,
              quiet_sampler: bool = False, strict: bool = False,
              workers: int | None = None, live=None) -> StudyResults:
    """Carry out a study: intake, identification, fits, comparison, checks, sensitivity.

    Parameters
    ----------
    study : Study
        From :func:`load_study`.
    fit : bool, default True
        Sample fits that have no saved copy. ``False`` only loads saved fits (for
        re-rendering a report) and raises if one is missing.
    progress : callable, optional
        Receives one line of text per step (default: printed on stderr); ``None`` is silent.
    quiet_sampler : bool
        Hide the sampler's progress bar.
    strict : bool
        Let unexpected (internal) exceptions of a step propagate instead of recording them
        as "failed" in the results (for debugging).
    workers : int, optional
        Overrides ``sampling.workers`` of the study file (0: one per CPU core; 1: sample in
        this process, which needs no ``if __name__ == "__main__":`` guard in a script).
    live : bayeslong.workflow.progress.ProgressReporter, optional
        Shows each fit's compilation and draws per chain as it samples (also in worker
        processes); replaces the sampler's own progress bar.

    Returns
    -------
    StudyResults

    Raises
    ------
    DataError, SpecError
        The data or a prior override cannot be used (before anything is fitted).

    Notes
    -----
    Every finished fit is saved under ``<output>/fits`` with its content hash in the file
    name (see "Resuming" in the module notes) and reused by later runs while the hash is
    unchanged. Two or more candidates to sample are sampled side by side in worker
    processes (``sampling.workers``); each worker also makes its candidate's
    leave-future-out refit, which reuses the model compiled there. Steps whose module is not installed, or that fail, are recorded as "not run"
    with the reason instead of stopping the run; convergence problems are recorded per model.
    """
    import datetime

    say = progress or (lambda message: None)
    t0 = time.perf_counter()
    started = datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    record: list[str] = []
    panel = study.panel(record=record)
    intake_s = time.perf_counter() - t0
    say(f"data: {panel.n_units} units, {panel.n_waves} waves, "
        f"{panel.patterns().n_patterns} missing-data pattern(s)")
    check_priors(study, panel)
    fits_dir = study.output / "fits"
    fits_dir.mkdir(parents=True, exist_ok=True)

    method = study.sampling["method"]
    if method == "ml" and is_categorical(panel):
        raise SpecError(f"study file {study.source.name}: `sampling.method = \"ml\"` cannot fit "
                        f"the categorical variables {', '.join(map(str, panel.categories))}: "
                        + NO_ML.split(";")[0] + "; set `method = \"bayes\"`")
    fit_module = None
    if method == "bayes":  # bl.fit: continuous and categorical panels alike
        fit_module, absent = optional_module("infer.fitting")
        samplers = getattr(fit_module, "SAMPLERS", None)
        if samplers and study.sampling["sampler"] not in samplers:
            raise SpecError(
                f"study file {study.source.name}: `sampling.sampler` must be one of "
                f"{', '.join(repr(x) for x in samplers)}; got {study.sampling['sampler']!r}"
                f"{nearest_hint(study.sampling['sampler'], samplers)}")
        if study.sampling["sampler"] in ("nutpie", "generic") and not _installed("nutpie"):
            raise SpecError(
                f"study file {study.source.name}: `sampling.sampler = "
                f"\"{study.sampling['sampler']}\"` needs the "
                "nutpie package, which is not installed; install it with `pip install nutpie` "
                "(or `pip install bayeslong[fast]`), or set `sampler = \"auto\"` to use "
                "PyMC's NUTS (slower for many draws)")
        if fit_module is None:
            method = "ml-fallback"
            say("NOTE: " + absent + "; falling back to MAXIMUM LIKELIHOOD ONLY "
                "(no posteriors, no LOO/WAIC, no predictive checks)")

    def tell(i):
        return lambda m: say(f"[{i}/{len(study.models)}] {m}")

    # candidates to sample run side by side in worker processes when there are several and
    # the machine has the cores (see `sampling.workers`); each worker also makes its
    # candidate's leave-future-out refit while the model is compiled there
    jobs, pool = {}, None
    to_sample = ({c.label for c in study.models if _needs_sampling(study, panel, c, fits_dir)}
                 if fit and fit_module is not None else set())
    workers = worker_count(study.sampling["workers"] if workers is None else workers,
                            len(to_sample))
    models = []
    fitted = reused = 0
    t_fits = time.perf_counter()
    stack = contextlib.ExitStack()
    try:
        if workers > 1:
            queue = stack.enter_context(live.listening()) if live is not None else None
            pool = get_pool(workers)
            future_kwargs = _future_kwargs(study, panel, fits_dir)
            for i, cand in enumerate(study.models, start=1):
                if cand.label in to_sample:
                    jobs[cand.label] = _submit(pool, study, panel, cand, fits_dir, future_kwargs,
                                               tell(i), workers, queue)
        for i, cand in enumerate(study.models, start=1):
            result, did_fit = _run_candidate(study, panel, cand, fit_module, fits_dir, fit=fit,
                                             say=tell(i), quiet_sampler=quiet_sampler,
                                             strict=strict, job=jobs.get(cand.label), live=live)
            fitted += did_fit == "fitted"
            reused += did_fit == "reused"
            models.append(result)
    except BaseException:  # an interrupted run leaves no worker busy with its fits
        if pool is not None:
            drop_pool(pool)
        raise
    finally:
        stack.close()
    fits_s = time.perf_counter() - t_fits
    if reused:
        say(f"reused {reused} saved fit{'s' if reused != 1 else ''} (unchanged study, data "
            "and model)")
    scores = {m.label: m.forecast for m in models if m.forecast is not None}

    comparison, future = _compare(study, panel, models, method, say, strict, scores)
    models = [_check(study, panel, m, say, strict) for m in models]
    sensitivity = _sensitivity(study, panel, models, method, say, strict, show=live is not None)
    stages = [("intake", intake_s, f"{panel.n_units} units, {panel.n_waves} waves")]
    if jobs:
        stages.append(("candidates (all)", fits_s,
                       f"{len(jobs)} sampled side by side in {workers} worker processes, with "
                       "their leave-future-out refits where needed; the rows below are each "
                       "fit's own time in its worker"))
    stages += [(f"{m.label}: identification and fit", m.seconds,
                ("in a worker process: " if m.label in jobs and m.fit is not None else "")
                + _fit_detail(m)) for m in models]
    stages += [("comparison", comparison.seconds, _comparison_detail(comparison, scores)),
               ("predictive checks", sum(m.check.seconds for m in models), ""),
               ("lag sensitivity", sensitivity.seconds, _sensitivity_detail(sensitivity))]
    return StudyResults(
        study=study, panel=panel, intake_warnings=tuple(record), models=tuple(models),
        comparison=comparison, future=future, sensitivity=sensitivity, method=method,
        fitted=fitted, reused=reused, versions=software_versions(),
        seconds=time.perf_counter() - t0, started=started, stages=tuple(stages))


def _timing_text(timing: dict) -> str:
    """``compile 12 s, sampling 3 s`` from a :attr:`Fit.timing` (empty when there is none)."""
    names = {"compile": "compile", "sample": "sampling", "loglik": "log-likelihood"}
    return ", ".join(f"{label} {timing[key]:.0f} s" for key, label in names.items()
                     if key in timing)


def _fit_detail(m: ModelResult) -> str:
    if m.fit is None:
        return "no posterior fit"
    if m.reused:
        return "reused the saved fit"
    return _timing_text(getattr(m.fit, "timing", {}) or {})


def _comparison_detail(step: Step, elsewhere=()) -> str:
    """The leave-future-out refits' times (``elsewhere``: those made by worker processes)."""
    table = table_of(step.value) if step.ran else None
    timing = table.attrs.get("lfo_timing", {}) if table is not None else {}
    return "; ".join(f"leave-future-out refit of {name}"
                     + (" (in its worker process)" if name in elsewhere else "")
                     + f": {_timing_text(t)}" for name, t in timing.items() if t)


def _sensitivity_detail(step: Step) -> str:
    reused = tuple(getattr(step.value, "reused", ())) if step.ran else ()
    return f"read from the candidates' fits, not refitted: {', '.join(reused)}" if reused else ""


def _stem(study: Study, cand: Candidate) -> str:
    """File name stem of a candidate's saved results: its label and content hash."""
    return f"{slug(cand.label)}-{study.fit_key(cand)}"


def _needs_sampling(study, panel, cand, fits_dir: Path) -> bool:
    """Whether a run would sample ``cand``: identified, and no saved fit."""
    ident = _identification(cand, panel, fits_dir / f"{_stem(study, cand)}.identify.json", [])
    if ident is not None and not ident.identified:
        return False
    return not (fits_dir / f"{_stem(study, cand)}.nc").exists()


def _future_kwargs(study, panel, fits_dir: Path) -> dict | None:
    """Settings of the workers' leave-future-out refits; None when none is needed.

    Not needed when the comparison does not ask for it, or when its result for these
    candidates (all fitted) is saved already.
    """
    if not study.comparison["future"] or study.sampling["method"] != "bayes":
        return None
    keys = {}
    for c in study.models:
        ident = _identification(c, panel, fits_dir / f"{_stem(study, c)}.identify.json", [])
        if ident is None or ident.identified:
            keys[c.label] = study.fit_key(c)
    if len(keys) < 2 or step_path(study, "compare", _compare_parts(keys, True)).exists():
        return None
    return {**_fit_settings(study), "progressbar": False}


def _submit(pool, study, panel, cand, fits_dir, future_kwargs, say, workers, queue=None):
    s = study.sampling
    say(f"{cand.label}: sampling {s['chains']} chains x {s['draws']} draws (+{s['tune']} "
        f"tuning) in one of {workers} worker processes")
    priors = _priors_for(study, cand.spec, panel) or None
    # in a worker the pool is the parallelism: the chains run one after another there
    kwargs = dict(_fit_settings(study), priors=priors, cores=1,
                  progressbar=False if queue is None else QueueForwarder(queue, cand.label))
    future = (None if future_kwargs is None
              else {**future_kwargs, "cores": 1, **({"priors": priors} if priors else {})})
    if future is not None and queue is not None:
        future["progressbar"] = QueueForwarder(queue, f"{cand.label} (leave-future-out refit)")
    path = fits_dir / f"{_stem(study, cand)}.nc"
    return pool.submit(sample_job, cand.spec, panel, kwargs, str(path), future)


def _fit_failed(err: Exception, cand, notes: list, say, strict: bool) -> None:
    """Record a failed Bayesian fit of one candidate; the others go on (``strict`` raises)."""
    if isinstance(err, BayeslongError):
        notes.append(f"Bayesian fit failed: {err}")
        say(f"{cand.label}: Bayesian fit failed: {err}")
        return
    if strict:
        raise err
    notes.append(f"Bayesian fit failed with an internal error ({type(err).__name__}: "
                 f"{err}); rerun with --debug for the traceback and report it")
    say(f"{cand.label}: Bayesian fit FAILED ({type(err).__name__}: {err})")


def _say_problems(cand, bayes, say) -> tuple[str, ...]:
    """Say a fit's convergence problems loudly and return them (the report shows them in red)."""
    problems = () if bayes is None else tuple(convergence_problems(bayes))
    if problems:
        say(f"{cand.label}: CONVERGENCE PROBLEMS: " + "; ".join(problems))
    return problems


def _run_candidate(study, panel, cand, fit_module, fits_dir, *, fit, say, quiet_sampler,
                   strict, job=None, live=None):
    """Identify, ML-fit and (when asked) sample one candidate; return (result, what happened).

    ``job`` is the future of the candidate's sampling in a worker process (see
    :func:`_submit`), which is waited for instead of sampling here.
    """
    t0 = time.perf_counter()
    key = study.fit_key(cand)
    notes: list[str] = []
    stem = f"{slug(cand.label)}-{key}"
    ident_path = fits_dir / f"{stem}.identify.json"
    if not fit and not ident_path.exists() and not is_categorical(panel):
        raise SpecError(
            f"candidate {cand.label!r} has no saved results for the current study and data "
            f"(nothing for hash {key} in {fits_dir}); run `bayeslong run {study.source.name}` "
            "first")
    _, exact_note = nearest_exact(cand.spec)
    if exact_note:
        notes.append(exact_note)
    ident = _identification(cand, panel, ident_path, notes)
    if ident is not None and not ident.identified:
        notes.append("not identified on this panel (" + ", ".join(ident.deficient)
                     + "); not fitted. " + ident.advice)
        say(f"{cand.label}: NOT IDENTIFIED, skipped")
        return ModelResult(candidate=cand, key=key, identification=ident, notes=tuple(notes),
                           seconds=time.perf_counter() - t0), "skipped"

    ml, what = None, "none"
    if is_categorical(panel) and study.checks["ml"]:
        notes.append(NO_ML)
    elif fit_module is None or study.checks["ml"]:
        ml, ml_reused = _ml(study, panel, cand, fits_dir / f"{stem}.ml.json", notes, say,
                            fit=fit)
        if fit_module is None and ml is not None:  # the ML fit is the run's fit
            what = "reused" if ml_reused else "fitted"
    bayes, problems, forecast = None, (), None
    if job is not None:  # sampled in a worker process, which saved the fit
        try:
            done = job.result()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # problems are recorded below, once
                bayes = dataclasses.replace(fit_module.load_fit(fits_dir / f"{stem}.nc"),
                                            timing=done["timing"])
            forecast = done["forecast"]
            what = "fitted"
            detail = _timing_text(done["timing"])
            say(f"{cand.label}: fitted in {done['seconds']:.0f} s in a worker process"
                + (f" ({detail})" if detail else ""))
        except Exception as err:  # an internal failure of one fit must not lose the others
            _fit_failed(err, cand, notes, say, strict)
        problems = _say_problems(cand, bayes, say)
    elif fit_module is not None:
        path = fits_dir / f"{stem}.nc"
        if path.exists():
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")  # problems are recorded below, once
                    bayes = fit_module.load_fit(path)
                what = "reused"
                say(f"{cand.label}: reused the saved fit {path.name}")
            except Exception as err:  # a damaged or outdated file: refit rather than stop
                notes.append(f"the saved fit {path.name} could not be read ({err}); refitted")
        if bayes is None:
            if not fit:
                raise SpecError(
                    f"candidate {cand.label!r} has no saved fit for the current study and data "
                    f"(looked for {path.name} in {fits_dir}); run `bayeslong run "
                    f"{study.source.name}` first")
            s = study.sampling
            say(f"{cand.label}: sampling {s['chains']} chains x {s['draws']} draws "
                f"(+{s['tune']} tuning)")
            try:
                kwargs = dict(_fit_settings(study),
                              priors=_priors_for(study, cand.spec, panel) or None,
                              progressbar=(live.for_model(cand.label) if live is not None
                                           else not quiet_sampler))
                with warnings.catch_warnings():
                    # convergence problems are recorded (and shown) below, once
                    warnings.simplefilter("ignore", _convergence_warning())
                    bayes = fit_module.fit(cand.spec, panel, **kwargs)
                bayes.save(path)
                what = "fitted"
                detail = _timing_text(getattr(bayes, "timing", {}) or {})
                say(f"{cand.label}: fitted in {time.perf_counter() - t0:.0f} s"
                    + (f" ({detail})" if detail else ""))
            except Exception as err:  # an internal failure of one fit must not lose the others
                _fit_failed(err, cand, notes, say, strict)
        problems = _say_problems(cand, bayes, say)
    seconds = time.perf_counter() - t0
    if job is not None and bayes is not None:
        seconds = done["seconds"]  # the worker's time; this process only waited for it
    return ModelResult(candidate=cand, key=key, identification=ident, ml=ml, fit=bayes,
                       reused=what == "reused", notes=tuple(notes), problems=problems,
                       seconds=seconds, forecast=forecast), what


def _convergence_warning():
    from bayeslong.errors import ConvergenceWarning

    return ConvergenceWarning


def _identification(cand, panel, path: Path, notes: list):
    """Local identification of one candidate, saved as JSON and reused when present."""
    from bayeslong.model.identification import Identification, identify

    if path.exists():
        try:
            saved = json.loads(path.read_text())
            return Identification(**{**saved, "deficient": tuple(saved["deficient"])})
        except (ValueError, TypeError, KeyError):
            pass
    try:
        # at the nearest exact invariance level (model/measurement.py: nearest_exact)
        ident = identify(nearest_exact(cand.spec)[0], panel)
    except BayeslongError as err:
        notes.append(f"identification check failed: {err}")
        return None
    path.write_text(json.dumps(dataclasses.asdict(ident), indent=1))
    return ident


def _ml(study, panel, cand, path: Path, notes: list, say, *, fit: bool = True
        ) -> tuple[dict | None, bool]:
    """Maximum-likelihood fit of one candidate, saved as JSON and reused when present.

    Returns the result (None when it failed) and whether it was read from the saved file.
    """
    import pandas as pd

    from bayeslong.infer.ml import fit_ml

    if path.exists():
        try:
            saved = json.loads(path.read_text())
            saved["table"] = pd.DataFrame(saved["table"]).set_index("parameter")
            notes.extend(saved.pop("notes", []))
            say(f"{cand.label}: reused the saved maximum-likelihood fit {path.name}")
            return saved, True
        except (ValueError, KeyError):
            pass
    if not fit:
        raise SpecError(
            f"candidate {cand.label!r} has no saved maximum-likelihood fit for the current study "
            f"and data (looked for {path.name} in {path.parent}); run `bayeslong run "
            f"{study.source.name}` first")
    say(f"{cand.label}: maximum likelihood")
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            res = fit_ml(nearest_exact(cand.spec)[0], panel, check=False)
    except BayeslongError as err:
        notes.append(f"maximum likelihood failed: {err}")
        return None, False
    found = [f"maximum likelihood: {w.message}" for w in caught]
    notes.extend(found)
    table = pd.DataFrame({"estimate": res.params, "se": res.se})
    table.index.name = "parameter"
    out = {"loglik": float(res.loglik), "aic": float(res.aic), "bic": float(res.bic),
           "n_params": int(res.n_params), "converged": bool(res.converged),
           "boundary": list(res.boundary)}
    path.write_text(json.dumps({**out, "notes": found, "table": json.loads(
        table.reset_index().to_json(orient="records"))}, indent=1))
    return {**out, "table": table}, False


def _ml_comparison(models) -> Step:
    """Rank ML fits by AIC (BIC beside it): the comparison available without posteriors."""
    import pandas as pd

    rows = {m.label: {"loglik": m.ml["loglik"], "n_params": m.ml["n_params"],
                      "aic": m.ml["aic"], "bic": m.ml["bic"]}
            for m in models if m.ml is not None}
    if len(rows) < 2:
        return Step.skipped("fewer than two candidates have a maximum-likelihood fit")
    table = pd.DataFrame.from_dict(rows, orient="index").sort_values("aic")
    table["d_aic"] = table["aic"] - table["aic"].min()
    table["d_bic"] = table["bic"] - table["bic"].min()
    table.index.name = "model"
    return Step(ran=True, value=table)


def _compare_parts(keys: dict, future: bool) -> dict:
    """What the saved comparison depends on: the fits, and how leave-future-out refits."""
    # "lfo": the refits take each fit's priors and may hide wave T (compare.forecast_score)
    parts = {"fits": keys, "future": future}
    if future:
        parts["lfo"] = "fit priors, wave T hidden"
    return parts


def _compare(study, panel, models, method, say, strict=False,
             scores: dict | None = None) -> tuple[Step, Step]:
    """Compare the candidates by LOO/WAIC (and leave-future-out when asked).

    ``scores``: leave-future-out scores the workers made, by label (not refitted here).
    """
    want_future = study.comparison["future"]
    if method != "bayes":
        ml = _ml_comparison(models)
        reason = ("leave-future-out needs posterior fits, which this run "
                  + ("did not make (sampling.method = \"ml\")" if method == "ml"
                     else "could not make (no Bayesian fit module)"))
        return ml, (Step.skipped(reason) if want_future else Step.skipped("not requested"))
    fits = {m.label: m.fit for m in models if m.fit is not None}
    if len(fits) < 2:
        skipped = Step.skipped(f"needs two or more fitted candidates; {len(fits)} fitted")
        return skipped, (skipped if want_future else Step.skipped("not requested"))
    module, absent = optional_module("evaluate.comparison")
    if module is None:
        skipped = Step.skipped(absent)
        return skipped, (skipped if want_future else Step.skipped("not requested"))
    keys = {m.label: m.key for m in models if m.fit is not None}
    kwargs = {}
    if want_future:
        given = {k: v for k, v in (scores or {}).items() if k in fits}
        kwargs = {"future": True, "fit_kwargs": {**_fit_settings(study), "progressbar": False},
                  "future_scores": given}
        left = len(fits) - len(given)
        message = ("comparing candidates by PSIS-LOO, WAIC and leave-future-out ("
                   + (f"{left} refit{'s' if left != 1 else ''} on all but the last wave"
                      if left else "no refit")
                   + (f"; {len(given)} made by the worker processes" if given else "") + ")")
    else:
        message = "comparing candidates by PSIS-LOO and WAIC"
    comparison = timed_step(saved_step(study, "compare", _compare_parts(keys, want_future),
                                lambda: module.compare(fits, **kwargs), say, message),
                        "comparison", say, strict)
    future = Step.skipped("not requested (set `comparison.future = true`)")
    if want_future:
        table = comparison.value
        if comparison.ran and "elpd_lfo" in getattr(table, "columns", ()):
            future = Step(ran=True, value=table[[c for c in LFO_COLUMNS if c in table.columns]])
        else:
            future = Step.skipped(comparison.reason or "the comparison gave no leave-future-out "
                                  "scores")
    return comparison, future


#: Units whose predictive trajectory bands the report shows.
N_TRAJECTORY_UNITS = 6


def _check(study, panel, m: ModelResult, say, strict=False) -> ModelResult:
    """Posterior predictive checks of one fitted candidate."""
    if not study.checks["ppc"]:
        return dataclasses.replace(m, check=Step.skipped("not requested (`checks.ppc = false`)"))
    if m.fit is None:
        return dataclasses.replace(m, check=Step.skipped("no posterior fit"))
    module, absent = optional_module("evaluate.checks")
    if module is None:
        return dataclasses.replace(m, check=Step.skipped(absent))
    draws, seed = study.checks["ppc_draws"], study.sampling["seed"]

    def compute():
        if getattr(m.fit, "categorical", None) is not None:  # shares and transitions
            from bayeslong.evaluate.category_checks import category_ppc

            return category_ppc(m.fit, draws=draws, seed=seed)
        table = module.ppc(m.fit, draws=draws, seed=seed)
        units = list(m.fit.panel.units[:N_TRAJECTORY_UNITS])
        bands = module.trajectories(m.fit, units, draws=draws, seed=seed)
        return {"ppc": table, "trajectories": bands}

    step = timed_step(saved_step(study, "check", {"fit": m.key, "checks": study.checks}, compute,
                          say, f"{m.label}: posterior predictive checks"),
                  f"{m.label}: checks", say, strict)
    return dataclasses.replace(m, check=step)


def _sensitivity(study, panel, models, method, say, strict=False, show=False) -> Step:
    """Lag sensitivity along the axes the study turns on."""
    axes = [k for k, on in study.sensitivity.items() if on]
    if not axes:
        return Step.skipped("not requested (turn axes on in [sensitivity])")
    if method != "bayes":
        return Step.skipped("lag sensitivity needs posterior fits, which this run did not make")
    module, absent = optional_module("evaluate.sensitivity")
    if module is None:
        return Step.skipped(absent)
    specs, seen = [], set()
    for m in models:
        spec = m.candidate.spec
        key = json.dumps(spec.to_dict(), sort_keys=True)
        if m.fit is not None and module.lag_parameter(spec, panel.outcomes) and key not in seen:
            seen.add(key)
            specs.append(spec)
    if not specs:
        return Step.skipped("no fitted candidate has a constant lag")
    message = ("lag sensitivity: " + ", ".join(axes) + " around "
               + ", ".join(str(spec) for spec in specs) + " with the study's priors "
               "(settings equal to a candidate's fit reuse it; the others are refitted)"
               + (f"; {SENSITIVITY_AXES}" if is_categorical(panel) else ""))
    on = study.sensitivity
    # the candidates' own sampling settings (as in _run_candidate), so that a setting equal
    # to a candidate is that candidate's fit and needs no refit
    fit_kwargs = {**_fit_settings(study), "progressbar": False}
    fits = [m.fit for m in models if m.fit is not None]
    keys = {m.label: m.key for m in models if m.fit is not None}
    return timed_step(saved_step(study, "sensitivity", {"fits": keys, "axes": axes,
                                                 "priors": "study", "kwargs": fit_kwargs},
                          lambda: module.lag_sensitivity(
                              panel, models=specs,
                              prior_grid=None if on["prior_grid"] else False,
                              variance_scales=None if on["prior_grid"] else False,
                              initial=on["initial"], specification=on["specification"],
                              power_scaling=on["power_scaling"], fit_kwargs=fit_kwargs,
                              priors=study.priors, fits=fits, progress=show),
                          say, message),
                  "lag sensitivity", say, strict)


def _fit_settings(study: Study) -> dict:
    """Keyword arguments of :func:`bayeslong.fit` from ``[sampling]`` (without priors)."""
    s = study.sampling
    kwargs = {"draws": s["draws"], "tune": s["tune"], "chains": s["chains"], "seed": s["seed"]}
    if s["sampler"] != "auto":
        kwargs["sampler"] = s["sampler"]
    if s.get("target_accept") is not None:
        kwargs["target_accept"] = s["target_accept"]
    return kwargs
