"""Tests of the live progress of ``bayeslong run``: plain lines off a terminal, one status
line rewritten in place on one, and what a real (tiny) run writes on stderr.

References: the reports fed in are built by hand, so the expected lines are counted from
the rule stated in :mod:`bayeslong.workflow.progress` (one line per tenth, or after a
silence); the real run's stderr is captured by pytest (not a terminal).
"""

import io
import json
import re

import pytest

from bayeslong.infer.progress import SamplingProgress, parse_nutpie
from bayeslong.workflow.progress import ProgressReporter, describe

CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f]")  # every control character but \t and \n


def _reports(n=200, chains=2, per_chain=500):
    """A compile report, then ``n`` evenly spaced reports of chains sampled one after another."""
    yield SamplingProgress(stage="compiling", sampler="pymc")
    total = chains * per_chain
    for k in range(1, n + 1):
        done_all = total * k // n
        done = tuple(min(per_chain, max(0, done_all - c * per_chain)) for c in range(chains))
        yield SamplingProgress(stage="sampling", done=done, total=(per_chain,) * chains,
                               elapsed=0.05 * k, sampler="pymc")
    yield SamplingProgress(stage="done", done=(per_chain,) * chains, total=(per_chain,) * chains,
                           elapsed=0.05 * n, sampler="pymc")


def test_without_a_terminal_progress_is_plain_lines_about_every_tenth():
    out = io.StringIO()  # not a terminal: isatty() is False
    clock = iter(range(10_000))
    reporter = ProgressReporter(out, clock=lambda: next(clock) * 0.01)  # 10 ms per report
    for p in _reports():
        reporter.update("alt", p)
    reporter.close()
    text = out.getvalue()
    assert not CONTROL.search(text)  # no carriage return, no escape sequence
    lines = text.splitlines()
    assert lines[0].startswith("[bayeslong] alt: compiling")
    assert lines[-1] == "[bayeslong] alt: sampling done in 10 s"
    sampling = lines[1:-1]
    # one line per tenth passed (0%, 10%, ..., 100%): 11 at most for 200 reports
    assert 10 <= len(sampling) <= 11
    assert sampling[5] == ("[bayeslong] alt: sampling, iterations per chain 500 0 of 500 "
                           "(tuning included), 50%, about 5 s left")


def test_without_a_terminal_a_slow_model_still_prints_after_a_silence():
    out = io.StringIO()
    times = iter([0.0, 0.5, 4.0, 11.0])  # the clock at each report
    reporter = ProgressReporter(out, clock=lambda: next(times), every_seconds=10.0)
    for done in (1, 2, 3, 4):  # all within the first tenth of 1000 iterations
        reporter.update("slow", SamplingProgress(stage="sampling", done=(done,), total=(1000,),
                                                 elapsed=float(done)))
    lines = out.getvalue().splitlines()
    # the first report, then nothing until 10 s passed without a line (the 4th, at 11 s)
    assert [line.split("chain ")[1].split(" of")[0] for line in lines] == ["1", "4"]


def test_on_a_terminal_one_status_line_is_rewritten_in_place(monkeypatch):
    # the status line is cut to the terminal's width; pytest's workers may have a narrow one
    monkeypatch.setenv("COLUMNS", "200")
    out = io.StringIO()
    reporter = ProgressReporter(out, tty=True)
    reporter.update("alt", SamplingProgress(stage="sampling", done=(10, 0), total=(100, 100),
                                            elapsed=2.0))
    reporter.update("ar", SamplingProgress(stage="compiling"))
    reporter.line("a message")
    reporter.close()
    text = out.getvalue()
    assert text.count("\n") == 1  # only the message is a line of its own
    assert "\r[bayeslong] alt: sampling, iterations per chain 10 0 of 100, 5%, about 38 s left" in text
    assert "alt: sampling" in text.split("\r")[-3] and "| ar: compiling" in text
    assert "[bayeslong] a message\n" in text
    assert text.endswith("\r")  # the status line is erased at the end


def test_nutpie_template_is_parsed():
    assert parse_nutpie("120/2000/0;2000/2000/3;") == ((120, 2000), (2000, 2000), 3)
    p = SamplingProgress(stage="sampling", done=(1000, 0), total=(2000, 2000), elapsed=10.0)
    assert p.fraction == 0.25 and p.seconds_left == pytest.approx(30.0)
    assert describe("m", p, short=True) == ("m: sampling, iterations per chain 1000 0 of 2000, "
                                            "25%, about 30 s left")


def test_a_run_shows_plain_progress_and_the_findings_on_stderr_and_in_json(tmp_path, capsys):
    pytest.importorskip("pymc")
    from test_cli import _study

    from bayeslong.workflow.cli import main

    path = _study(tmp_path, extra='draws = 60\ntune = 60\nchains = 1\nsampler = "pymc"\n'
                                  "workers = 1\n[checks]\nppc = false\n",
                  model_lines='model = "ar"\n[[models]]\nmodel = "linear-growth"')
    path.write_text(path.read_text().replace('method = "ml"', 'method = "bayes"'))
    assert main(["run", str(path), "--json"]) == 0
    captured = capsys.readouterr()
    err = captured.err
    assert not CONTROL.search(err)  # stderr is not a terminal here: plain lines only
    for label in ("ar", "linear-growth"):
        assert f"[bayeslong] {label}: compiling" in err
        assert re.search(rf"\[bayeslong\] {label}: sampling, iterations per chain \d+ of 120 "
                         r"\(tuning included\), \d+%", err)
        assert f"[bayeslong] {label}: sampling done in" in err
    assert "Traceback" not in err and ".py:" not in err  # no Python warning with a source line
    summary = json.loads(captured.out)
    findings = summary["findings"]
    table = summary["comparison"]["table"]
    best = max(table, key=lambda k: table[k]["elpd_loo"])  # reference: the JSON's own table
    assert findings["best_loo"]["model"] == best
    assert findings["lag"]["model"] == "ar" and findings["lag"]["low"] < findings["lag"]["high"]
    assert findings["caution"].startswith("Prediction is not causation")
    assert main(["run", str(path), "--quiet"]) == 0  # reused fits; findings on stdout
    captured = capsys.readouterr()
    assert captured.err == "" or "compiling" not in captured.err
    assert captured.out.startswith("Findings:\n- ")
    assert f"- {best} predicts best" in captured.out


def test_first_use_of_the_kernel_on_a_machine_is_one_plain_line(tmp_path, monkeypatch):
    # a fresh machine: numba's cache directory empty (as NUMBA_CACHE_DIR pointed at a new
    # folder) and the kernel not loaded in the process; the CLI's reporter then says, before
    # the kernel compiles, that it does, in one plain line (stream not a terminal)
    import sys

    import numba.core.config

    from bayeslong.infer import generic_kernel  # noqa: F401  (in numba's usual cache now)
    from bayeslong.infer.generic_logp import announce_compile

    monkeypatch.delitem(sys.modules, "bayeslong.infer.generic_kernel")
    out = io.StringIO()
    reporter = ProgressReporter(out)
    assert not announce_compile(reporter.for_model("alt"))  # the machine's cache holds it
    assert out.getvalue() == ""
    monkeypatch.setattr(numba.core.config, "CACHE_DIR", str(tmp_path))
    assert announce_compile(reporter.for_model("alt"))
    assert out.getvalue() == ("[bayeslong] alt: compiling the sampler (first use on this machine; "
                              "about half a minute, once)\n")
    assert not announce_compile(False)  # --quiet: the runner passes progressbar=False


def test_warnings_are_one_line_in_the_tools_words(capsys):
    import warnings

    from bayeslong.workflow import cli

    cli._show_warning(UserWarning("waves are not\n equally spaced"), UserWarning, "/x/y.py", 12)
    assert capsys.readouterr().err == "warning: waves are not equally spaced\n"
    shown = warnings.showwarning
    assert cli.main(["models"]) == 0
    assert warnings.showwarning is shown  # restored after the command


def test_on_a_narrow_terminal_the_status_line_is_cut_with_an_ellipsis(monkeypatch):
    monkeypatch.setenv("COLUMNS", "40")
    out = io.StringIO()
    reporter = ProgressReporter(out, tty=True)
    reporter.update("alt", SamplingProgress(stage="sampling", done=(10, 0), total=(100, 100),
                                            elapsed=2.0))
    reporter.close()
    shown = out.getvalue().split("\r")[1]
    assert shown == "[bayeslong] alt: sampling, iteration..."  # 39 characters: width - 1
