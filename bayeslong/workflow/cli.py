"""The ``bayeslong`` command line: from a study file to a report without writing Python.

Commands
--------
``bayeslong models``                 the catalog, one line per model, with its options
``bayeslong check-data STUDY``       intake report: units, waves, missingness patterns, warnings
``bayeslong identify STUDY``         local identification of every candidate
``bayeslong run STUDY``              fit, compare, check and report (resumable)
``bayeslong report STUDY``           re-render the report from the saved fits
``bayeslong simulate MODEL``         simulate a panel from a model and parameter values to CSV
``bayeslong plan MODEL``             how well would the lag be recovered at given N and T?
``bayeslong demo``                   the two worked examples end to end, into ./bayeslong-demo/

Exit codes: 0 success; 1 a user error (bad study file, data or option), printed as one
line ``error: ...`` on stderr (``--debug`` shows the traceback); 2 wrong usage of the
command line itself. ``--json`` prints a machine-readable summary on stdout for
``models``, ``check-data``, ``identify``, ``run`` and ``report``; progress goes to stderr.
"""

from __future__ import annotations

import argparse
import json
import logging
import shutil
import sys
import textwrap
import time
import warnings
from pathlib import Path

from bayeslong.errors import BayeslongError, SpecError
from bayeslong.workflow.study_file import check_folder

__all__ = ["main"]

#: Exit codes.
OK, USER_ERROR, USAGE = 0, 1, 2

#: Where ``bayeslong demo`` writes by default, and the worked examples' files (study, data):
#: one observed score per wave, and a latent measured by three indicators.
DEMO_FOLDER = "bayeslong-demo"
EXAMPLES = (("shift_sleep.toml", "shift_sleep.csv"),
            ("reading_motivation.toml", "reading_motivation.csv"))


def _say(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def _print_json(data) -> None:
    print(json.dumps(data, indent=2, default=str))


def _quiet_libraries() -> None:
    """Keep library chatter (PyTensor's BLAS notice) from being the first thing a user reads."""
    logging.getLogger("pytensor.tensor.blas").setLevel(logging.ERROR)
    logging.getLogger("pymc").setLevel(logging.WARNING)
    # PyMC adds a handler of its own that prints its notes ("Initializing NUTS ...") unless
    # the root logger has one; ours shows only warnings, in the tool's words
    if not logging.root.handlers:
        handler = logging.StreamHandler(sys.stderr)
        handler.setLevel(logging.WARNING)
        handler.setFormatter(logging.Formatter("warning: %(message)s"))
        logging.root.addHandler(handler)
    # a graph rewrite that does not apply is logged at ERROR level and then skipped; it is
    # not the user's problem and does not change results
    logging.getLogger("pytensor.graph.rewriting.basic").setLevel(logging.CRITICAL)


# --------------------------------------------------------------------------------------------
# commands
# --------------------------------------------------------------------------------------------


def cmd_models(args) -> int:
    from bayeslong.model.spec import describe_catalog

    rows = describe_catalog()
    if args.json:
        _print_json(rows)
        return OK
    width = max(len(r["model"]) for r in rows)
    for r in rows:
        print(f"{r['model']:<{width}}  {r['description']}")
        opts = ", ".join(f"{k}: {' | '.join(v)}" for k, v in r["allowed"].items())
        defaults = ", ".join(f"{k}={r[k]}" for k in ("initial", "lag", "residuals", "effects",
                                                     "intercepts"))
        print(f"{'':<{width}}  defaults: {defaults}")
        if opts:
            print(f"{'':<{width}}  options:  {opts}")
        if r["processes"] > 1:
            print(f"{'':<{width}}  processes: {r['processes']} by default, any K with processes = K; "
                  "cross_lags, same_wave")
    print("\nUse a model in a study file as  [[models]] model = \"<name>\"  "
          "with  options = { initial = \"endogenous\" }.")
    return OK


def _load(args):
    from bayeslong.workflow.study_file import load_study

    return load_study(args.study)


def cmd_check_data(args) -> int:
    study = _load(args)
    record: list[str] = []
    panel = study.panel(record=record)
    desc = panel.describe()
    if args.json:
        _print_json({
            "data": str(study.data.path), "n_units": panel.n_units, "n_waves": panel.n_waves,
            "waves": list(panel.waves), "outcomes": list(panel.outcomes),
            "indicators": {str(k): list(v) for k, v in panel.indicators.items()},
            "time_varying": list(panel.time_varying),
            "time_invariant": list(panel.time_invariant),
            "observed": {str(k): v for k, v in desc["observed"].to_dict(orient="index").items()},
            "patterns": desc["patterns"].to_dict(orient="records"),
            "warnings": record,
        })
        return OK
    print(f"data:      {study.data.path}")
    print(f"units:     {panel.n_units}")
    print(f"waves:     {panel.n_waves} ({', '.join(map(str, panel.waves))})")
    print(f"outcomes:  {', '.join(map(str, panel.outcomes))}")
    if panel.has_indicators:
        for name, group in panel.indicators.items():
            measured = ("observed directly" if tuple(group) == (name,)
                        else "measured by " + ", ".join(map(str, group)))
            print(f"  {name}: {measured}")
    print(f"time-varying covariates:   {', '.join(map(str, panel.time_varying)) or 'none'}")
    print(f"time-invariant covariates: {', '.join(map(str, panel.time_invariant)) or 'none'}")
    print("\nshare observed by wave" + (" and indicator:" if panel.has_indicators else ":"))
    print(desc["observed"].round(3).to_string())
    print("\nmissing-data patterns (o observed, . missing):")
    print(desc["patterns"].to_string())
    if record:
        print("\nwarnings:")
        for w in record:
            print(f"  - {w}")
    else:
        print("\nno warnings")
    return OK


def cmd_identify(args) -> int:
    from bayeslong.model.identification import identify
    from bayeslong.model.measurement import nearest_exact

    study = _load(args)
    panel = study.panel()
    rows = []
    for cand in study.models:
        spec, note = nearest_exact(cand.spec)  # as the run checks it (workflow/runner.py)
        ident = identify(spec, panel)
        rows.append({"model": cand.label, "identified": ident.identified, "rank": ident.rank,
                     "n_params": ident.n_params, "n_moments": ident.n_moments,
                     "deficient": list(ident.deficient), "advice": ident.advice, "note": note})
    if args.json:
        _print_json(rows)
    else:
        for r in rows:
            state = "identified" if r["identified"] else "NOT IDENTIFIED"
            print(f"{r['model']}: {state} (rank {r['rank']} of {r['n_params']} parameters, "
                  f"{r['n_moments']} moments)")
            if r["note"]:
                print(f"  {r['note']}")
            if not r["identified"]:
                print(f"  not separable: {', '.join(r['deficient'])}")
                print(f"  {r['advice']}")
    return OK


def _run(args, *, fit: bool, collect: list | None = None) -> int:
    from bayeslong.workflow.findings import study_findings
    from bayeslong.workflow.progress import ProgressReporter
    from bayeslong.workflow.report import write_report
    from bayeslong.workflow.runner import run_study

    study = _load(args)
    # live progress on stderr: a status line rewritten in place on a terminal, plain lines
    # otherwise (workflow/progress.py); --quiet silences it and the sampler's own bar
    live = None if args.quiet else ProgressReporter(sys.stderr)
    try:
        results = run_study(study, fit=fit, progress=None if live is None else live.line,
                            quiet_sampler=args.quiet, strict=args.debug, live=live)
    finally:
        if live is not None:
            live.close()
    t0 = time.perf_counter()
    paths = write_report(results, study.output)
    report_s = time.perf_counter() - t0
    summary = results.to_dict()
    summary["report"] = {k: str(v) for k, v in paths.items()}
    summary["stages"].append({"step": "report", "seconds": round(report_s, 1), "detail": ""})
    summary["findings"] = findings = study_findings(results)
    if collect is not None:  # the caller prints all summaries as one JSON document
        collect.append(summary)
    elif args.json:
        _print_json(summary)
    if not args.json:
        _say("[bayeslong] time by step: " + "; ".join(
            f"{s['step']} {s['seconds']:.0f} s" + (f" ({s['detail']})" if s["detail"] else "")
            for s in summary["stages"]))
        _say(f"[bayeslong] report: {paths['html']}")
        _say(f"[bayeslong] markdown: {paths['markdown']}")
        bad = [m.label for m in results.models if m.problems]
        if bad:
            _say("[bayeslong] WARNING: convergence problems in " + ", ".join(bad)
                 + " (see the red banner in the report)")
        print("Findings:")  # the answer, on stdout (progress went to stderr)
        for line in findings["text"] + [findings["caution"]]:
            print(textwrap.fill(line, width=92, initial_indent="- ", subsequent_indent="  "))
    return OK


def cmd_run(args) -> int:
    return _run(args, fit=True)


def cmd_report(args) -> int:
    return _run(args, fit=False)


def _read_params(path: str | None) -> dict:
    """Parameter values from a TOML or JSON file (a flat table name -> number)."""
    from bayeslong.errors import SpecError

    if path is None:
        return {}
    file = Path(path)
    if not file.is_file():
        raise SpecError(f"parameter file {path!r} does not exist")
    text = file.read_text(encoding="utf-8")
    try:
        if file.suffix.lower() == ".json":
            data = json.loads(text)
        else:
            import tomllib

            data = tomllib.loads(text)
    except ValueError as err:
        raise SpecError(f"parameter file {path!r} cannot be read: {err}") from err
    for key, value in data.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise SpecError(f"parameter file {path!r}: `{key}` must be a number; got {value!r}")
    return {k: float(v) for k, v in data.items()}


#: Default parameter values by kind for ``simulate`` and ``plan`` without a file: a
#: moderate lag, unit variances, no covariances, modest effects (our own round numbers).
_DEFAULT_BY_KIND = {"mean": 0.0, "intercept": 0.0, "loading": 1.0, "lag": 0.3, "effect": 0.2,
                    "var": 1.0, "cov": 0.0}


def default_params(spec, *, n_waves: int, covariates=(), time_invariant=()) -> dict:
    """Round default values for every parameter of ``spec`` (see ``_DEFAULT_BY_KIND``)."""
    from bayeslong.model.simulation import default_outcomes
    from bayeslong.model.structure import build_structure

    structure = build_structure(spec, outcomes=default_outcomes(spec), n_waves=n_waves,
                                time_varying=tuple(covariates), time_invariant=tuple(time_invariant))
    out = {}
    for name, kind in zip(structure.names, structure.kinds):
        value = _DEFAULT_BY_KIND[kind]
        if kind == "lag" and spec.lag_offset:
            value -= spec.lag_offset * 0.5  # proportional change: 1 + beta stays below 1
        if kind == "loading" and "[" in name:  # free time scores: keep them increasing
            try:
                value = float(name.rsplit("[", 1)[1].rstrip("]")) - 1.0
            except ValueError:
                pass
        out[name] = value
    return out


def _model_from_args(args):
    from bayeslong.model.spec import model

    options = {}
    for item in args.option or []:
        key, sep, value = item.partition("=")
        if not sep:
            from bayeslong.errors import SpecError

            raise SpecError(f"--option {item!r} must look like name=value, e.g. initial=endogenous")
        key, value = key.strip(), value.strip()
        if key == "processes" and value.isdigit():
            value = int(value)
        elif key == "same_wave":  # a comma-separated list of pairs, "sleep<-stress,mood<-sleep"
            value = [v.strip() for v in value.split(",") if v.strip()]
        options[key] = value
    return model(args.model, **options)


def cmd_simulate(args) -> int:
    from bayeslong.model.simulation import simulate

    spec = _model_from_args(args)
    covariates = {c: ("normal", 0.0, 1.0) for c in args.covariate or []}
    invariant = {c: ("normal", 0.0, 1.0) for c in args.time_invariant or []}
    params = {**default_params(spec, n_waves=args.waves, covariates=covariates,
                               time_invariant=invariant), **_read_params(args.params)}
    missing = {"dropout": args.dropout} if args.dropout else None
    df = simulate(spec, params, args.units, args.waves, seed=args.seed, covariates=covariates,
                  time_invariant=invariant, missing=missing)
    out = Path(args.output)
    if out.is_dir():
        raise SpecError(f"`--output` {str(out)!r} is a folder; give a file name, e.g. "
                        f"{str(out / 'simulated.csv')!r}")
    check_folder(out.parent, "--output")
    out.parent.mkdir(parents=True, exist_ok=True)
    df.to_csv(out, index=False)
    _say(f"[bayeslong] wrote {len(df)} rows ({args.units} units x {args.waves} waves) of model "
         f"{spec} to {out}")
    return OK


def _grid(text: str, option: str, example: str) -> list[int]:
    """Whole numbers separated by commas, or a SpecError that shows the value and an example."""
    parts = [p.strip() for p in str(text).split(",")]
    if not all(p.lstrip("-").isdigit() for p in parts):
        raise SpecError(f"`{option}` takes whole numbers separated by commas, e.g. {example}; "
                        f"got {text!r}")
    return [int(p) for p in parts]


def cmd_plan(args) -> int:
    from bayeslong.evaluate.planning import plan

    spec = _model_from_args(args)
    waves = _grid(args.waves_grid, "--waves-grid", "4,6")
    units = _grid(args.units_grid, "--units-grid", "30,60,120")
    params = {**default_params(spec, n_waves=max(waves)), **_read_params(args.params)}
    table = plan(spec, params, n_units=units, n_waves=waves, replications=args.replications,
                 fit_kwargs={"draws": args.draws, "tune": args.draws, "chains": 2,
                             "progressbar": False} if not args.ml else {},
                 seed=args.seed, kind="fit_ml" if args.ml else "fit",
                 missing={"dropout": args.dropout} if args.dropout else None)
    if args.json:
        _print_json(json.loads(table.to_json(orient="records")))
    else:
        print(table.to_string(index=False))
    return OK


def _example_folder() -> Path:
    """The repository's ``examples/`` folder (the worked examples ship there)."""
    here = Path(__file__).resolve().parents[2] / "examples"
    names = [name for pair in EXAMPLES for name in pair]
    if all((here / name).is_file() for name in names):
        return here
    from bayeslong.errors import SpecError

    raise SpecError(f"the worked examples ({', '.join(names)}) are not next to this "
                    f"installation (looked in {here}); run `bayeslong demo` from a clone of the "
                    "repository, or copy the examples/ folder there")


def cmd_demo(args) -> int:
    source = _example_folder()
    folder = Path(args.folder)
    folder.mkdir(parents=True, exist_ok=True)
    for pair in EXAMPLES:
        for name in pair:
            shutil.copy2(source / name, folder / name)
    _say(f"[bayeslong] demo: copied the worked examples (invented data) to {folder.resolve()}")
    from bayeslong.workflow.study_file import load_study

    t0 = time.perf_counter()
    code, reports, summaries = OK, [], []
    for i, (name, _) in enumerate(EXAMPLES, start=1):
        _say(f"[bayeslong] demo {i} of {len(EXAMPLES)}: {name}")
        args.study = str(folder / name)
        code = max(code, _run(args, fit=True, collect=summaries if args.json else None))
        reports.append(str(load_study(args.study).output / "report.html"))
    if args.json:
        _print_json(summaries)
    _say(f"[bayeslong] demo finished in {time.perf_counter() - t0:.0f} s; open "
         + " and ".join(reports))
    return code


# --------------------------------------------------------------------------------------------
# the parser
# --------------------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="bayeslong",
        description="Bayesian growth-and-lag models for panel data, from a study file to a report.",
        epilog="Exit codes: 0 ok, 1 a problem with your study, data or options, 2 wrong usage.")
    parser.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def add(name, func, help_, *, study=False, json_=False, quiet=False):
        p = sub.add_parser(name, help=help_, description=help_)
        p.set_defaults(func=func)
        if study:
            p.add_argument("study", metavar="STUDY", help="the study file (TOML)")
        if json_:
            p.add_argument("--json", action="store_true", help="print a JSON summary on stdout")
        if quiet:
            p.add_argument("--quiet", action="store_true", help="no progress on stderr")
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show tracebacks of errors")
        return p

    add("models", cmd_models, "list the model catalog with descriptions and options", json_=True)
    add("check-data", cmd_check_data, "intake report of a study's data", study=True, json_=True)
    add("identify", cmd_identify, "check that every candidate model is identified", study=True,
        json_=True)
    add("run", cmd_run, "fit all candidates, compare, check, and write the report (resumable)",
        study=True, json_=True, quiet=True)
    add("report", cmd_report, "re-render the report from the saved fits", study=True, json_=True,
        quiet=True)

    p = add("simulate", cmd_simulate, "simulate a panel from a model to a CSV file")
    p.add_argument("model", help="catalog name or model .toml file")
    p.add_argument("--params", help="TOML or JSON file of parameter values (default: round values)")
    p.add_argument("--option", action="append", metavar="NAME=VALUE",
                   help="a model option, e.g. --option initial=endogenous (repeatable)")
    p.add_argument("--units", type=int, default=100, help="number of units (default 100)")
    p.add_argument("--waves", type=int, default=5, help="number of waves (default 5)")
    p.add_argument("--seed", type=int, default=1, help="random seed (default 1)")
    p.add_argument("--covariate", action="append", metavar="NAME",
                   help="add a standard-normal time-varying covariate (repeatable)")
    p.add_argument("--time-invariant", action="append", metavar="NAME",
                   help="add a standard-normal time-invariant covariate (repeatable)")
    p.add_argument("--dropout", type=float, default=0.0, help="per-wave dropout rate (default 0)")
    p.add_argument("--output", "-o", default="simulated.csv", help="CSV file to write")

    p = add("plan", cmd_plan, "how well is the lag recovered at given numbers of units and waves?",
            json_=True)
    p.add_argument("model", help="catalog name or model .toml file (with a constant lag)")
    p.add_argument("--params", help="TOML or JSON file of true parameter values")
    p.add_argument("--option", action="append", metavar="NAME=VALUE", help="a model option")
    p.add_argument("--units-grid", default="30,60,120", help="comma-separated numbers of units")
    p.add_argument("--waves-grid", default="4,6", help="comma-separated numbers of waves")
    p.add_argument("--replications", type=int, default=20, help="panels per design (default 20)")
    p.add_argument("--draws", type=int, default=300, help="draws (and tuning) per chain")
    p.add_argument("--dropout", type=float, default=0.0, help="per-wave dropout rate")
    p.add_argument("--seed", type=int, default=0, help="random seed")
    p.add_argument("--ml", action="store_true", help="maximum likelihood instead of sampling (fast)")

    p = add("demo", cmd_demo, "run the two worked examples end to end into ./bayeslong-demo/",
            json_=True, quiet=True)
    p.add_argument("--folder", default=DEMO_FOLDER, help=f"where to write (default ./{DEMO_FOLDER})")
    return parser


def main(argv=None) -> int:
    """Run the command line; return the exit code (0 ok, 1 user error, 2 usage).

    Parameters
    ----------
    argv : list of str, optional
        Arguments without the program name; default ``sys.argv[1:]``.
    """
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: --help exits 0, usage errors exit 2
        return int(exc.code or 0)
    _quiet_libraries()
    shown = warnings.showwarning
    warnings.showwarning = _show_warning
    try:
        return args.func(args)
    except (BayeslongError, OSError) as err:
        if args.debug:
            raise
        message = " ".join(str(err).split())
        if isinstance(err, OSError) and err.filename:
            message = f"{err.strerror}: {err.filename}"
        print(f"error: {message}", file=sys.stderr)
        return USER_ERROR
    except KeyboardInterrupt:
        print("interrupted; finished fits are saved and will be reused", file=sys.stderr)
        return 130
    finally:
        warnings.showwarning = shown


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """A warning as one line in the tool's words: ``warning: <message>`` (no source line)."""
    text = " ".join(str(message).split())
    print(f"warning: {text}", file=file if file is not None else sys.stderr, flush=True)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
