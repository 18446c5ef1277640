"""What a study run produced: each step's outcome, each candidate's fits, the whole run.

The runner (:mod:`bayeslong.workflow.runner`) fills these; the report
(:mod:`bayeslong.workflow.report`) and ``bayeslong run --json`` read them.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

from bayeslong.workflow.study_file import Candidate, Study


@dataclass(frozen=True, kw_only=True, eq=False)
class Step:
    """The outcome of one optional step of a run (comparison, checks, sensitivity ...).

    Attributes
    ----------
    ran : bool
    reason : str
        Why the step did not run or failed (empty when it ran).
    value : object
        The step's result (a table, a result object) when it ran.
    seconds : float
    """

    ran: bool
    reason: str = ""
    value: Any = None
    seconds: float = 0.0

    @classmethod
    def skipped(cls, reason: str) -> "Step":
        return cls(ran=False, reason=reason)


@dataclass(frozen=True, kw_only=True, eq=False)
class ModelResult:
    """Everything a run learned about one candidate.

    Attributes
    ----------
    candidate : Candidate
    key : str
        Content hash of the fit (file names under ``<output>/fits``).
    identification : bayeslong.Identification or None
    ml : dict or None
        ``loglik``, ``aic``, ``bic``, ``n_params``, ``converged``, ``boundary`` and the
        ``table`` (DataFrame of estimate and se) of the maximum-likelihood fit.
    fit : bayeslong.fit.Fit or None
        The Bayesian fit (None for ``method = "ml"``, or when it could not run).
    reused : bool
        The Bayesian fit was loaded from a saved file instead of sampled.
    notes : tuple of str
        What went wrong or was skipped, in words.
    problems : tuple of str
        Convergence problems, each naming the parameter and the threshold.
    check : Step
        Posterior predictive checks.
    seconds : float
    forecast : ForecastScore or None
        The leave-future-out score, when the worker process that sampled the candidate made
        it (see ``sampling.workers``); otherwise the comparison makes it.
    """

    candidate: Candidate
    key: str
    identification: Any = None
    ml: dict | None = None
    fit: Any = None
    reused: bool = False
    notes: tuple[str, ...] = ()
    problems: tuple[str, ...] = ()
    check: Step = field(default_factory=lambda: Step.skipped("not requested"))
    seconds: float = 0.0
    forecast: Any = None

    @property
    def label(self) -> str:
        return self.candidate.label


@dataclass(frozen=True, kw_only=True, eq=False)
class StudyResults:
    """The outcome of :func:`run_study`, which :func:`bayeslong.report.write_report` renders.

    Attributes
    ----------
    study : Study
    panel : Panel
    intake_warnings : tuple of str
    models : tuple of ModelResult
    comparison, future, sensitivity : Step
    method : str
        ``"bayes"``, ``"ml"`` (asked for), or ``"ml-fallback"`` (the Bayesian fit module
        is absent).
    fitted, reused : int
        The run's fits (Bayesian; maximum likelihood when that is the method) made in this
        run, and loaded from saved files.
    versions : dict
    seconds : float
    started : str
        UTC time stamp of the run.
    stages : tuple of (str, float, str)
        Where the time went: each step of the run, its seconds and a detail (e.g. the
        compile and sampling seconds of a fit), in the order they ran.
    """

    study: Study
    panel: Any
    intake_warnings: tuple[str, ...] = ()
    models: tuple[ModelResult, ...] = ()
    comparison: Step = field(default_factory=lambda: Step.skipped("not requested"))
    future: Step = field(default_factory=lambda: Step.skipped("not requested"))
    sensitivity: Step = field(default_factory=lambda: Step.skipped("not requested"))
    method: str = "bayes"
    fitted: int = 0
    reused: int = 0
    versions: dict = field(default_factory=dict)
    seconds: float = 0.0
    started: str = ""
    stages: tuple = ()

    def to_dict(self) -> dict:
        """Machine-readable summary (JSON safe) of the run."""
        models = []
        for m in self.models:
            ident = m.identification
            models.append({
                "label": m.label,
                "model": m.candidate.spec.name,
                "options": dict(m.candidate.spec.options),
                "key": m.key,
                "identified": None if ident is None else bool(ident.identified),
                "deficient": [] if ident is None else list(ident.deficient),
                "ml": None if m.ml is None else {k: m.ml[k] for k in
                                                 ("loglik", "aic", "bic", "n_params", "converged")},
                "bayes": m.fit is not None,
                "reused": m.reused,
                "problems": list(m.problems),
                "notes": list(m.notes),
            })

        def step(s: Step):
            out = {"ran": s.ran, "reason": s.reason}
            table = table_of(s.value)
            if table is not None:
                out["table"] = json.loads(table.to_json(orient="index", default_handler=str))
            return out

        return {
            "title": self.study.title,
            "method": self.method,
            "n_units": self.panel.n_units,
            "n_waves": self.panel.n_waves,
            "fitted": self.fitted,
            "reused": self.reused,
            "models": models,
            "comparison": step(self.comparison),
            "future": step(self.future),
            "sensitivity": step(self.sensitivity),
            "output": str(self.study.output),
            "seconds": round(self.seconds, 1),
            "stages": [{"step": step, "seconds": round(sec, 1), "detail": detail}
                       for step, sec, detail in self.stages],
            "versions": self.versions,
        }


def table_of(value):
    """The DataFrame inside a step's value, if any (a DataFrame or an object with .table)."""
    import pandas as pd

    if isinstance(value, pd.DataFrame):
        return value
    table = getattr(value, "table", None)
    return table if isinstance(table, pd.DataFrame) else None


def slug(text: str) -> str:
    import re

    return re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower()[:40] or "model"


def convergence_problems(bayes) -> list[str]:
    """Name each failed convergence criterion of a fit, from :meth:`Fit.diagnostics`.

    The criteria and thresholds are the fit module's (R-hat, bulk and tail ESS per
    parameter; divergences and E-BFMI per run); this only puts them in words.
    """
    table = bayes.diagnostics()
    out = [f"{name}: {flag}" for name, flag in table["flag"].items() if flag]
    n_div = int(table.attrs.get("divergences", 0) or 0)
    if n_div:
        out.append(f"{n_div} divergent transition{'s' if n_div != 1 else ''} after warm-up "
                   "(threshold 0: the sampler met geometry it could not follow; estimates may "
                   "be biased)")
    floor = table.attrs.get("thresholds", {}).get("ebfmi")
    low = [i for i, v in enumerate(table.attrs.get("ebfmi", [])) if floor is not None and v < floor]
    if low:
        out.append(f"E-BFMI below {floor} in chain(s) {', '.join(map(str, low))}")
    return out
