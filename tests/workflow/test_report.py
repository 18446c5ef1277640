"""Tests of the HTML and Markdown report: escaping, self-containedness, banners, readings.

Reports are rendered from hand-built results (no fitting), so these tests are fast. The
HTML is parsed with the standard library's ``html.parser`` (an outside reference), and
opened in headless Chromium when it is installed.
"""

import dataclasses
import html
import os
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayeslong as bl
from bayeslong.workflow.report import _figure_data, _loo_reading, write_report
from bayeslong.workflow.results import ModelResult, Step, StudyResults
from bayeslong.workflow.study_file import load_study, software_versions

EVIL_COLUMN = "<script>alert(1)</script>"
EVIL_TITLE = 'Title with <b>tags</b> & "quotes"'
EVIL_LABEL = "<img src=x onerror=alert(2)>"
VOID = {"meta", "img", "br", "hr", "input", "link"}


class _Collector(HTMLParser):
    """Collect tags, attributes and text; check that non-void tags nest properly."""

    def __init__(self):
        super().__init__()
        self.stack, self.tags, self.errors, self.text = [], [], [], []
        self.bad_text: list[str] = []
        self._in_bad = 0

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)
            if dict(attrs).get("class") == "bad" or self._in_bad:
                self._in_bad += 1

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
            return
        self.stack.pop()
        if self._in_bad:
            self._in_bad -= 1

    def handle_data(self, data):
        self.text.append(data)
        if self._in_bad:
            self.bad_text.append(data)


def _results(tmp_path: Path, problems=()) -> StudyResults:
    rng = np.random.default_rng(5)
    n, t = 12, 3
    frame = pd.DataFrame({"id": np.repeat(np.arange(n), t), "w": np.tile(np.arange(t), n),
                          EVIL_COLUMN: rng.normal(size=n * t)})
    frame.to_csv(tmp_path / "evil.csv", index=False)
    toml = tmp_path / "evil.toml"
    toml.write_text(f"""
title = '{EVIL_TITLE}'
[data]
path = "evil.csv"
unit = "id"
wave = "w"
outcomes = ['{EVIL_COLUMN}']
[[models]]
model = "ar"
label = '{EVIL_LABEL}'
""")
    study = load_study(toml)
    model = ModelResult(candidate=study.models[0], key="0123456789abcdef", problems=tuple(problems),
                        notes=("a note naming " + EVIL_COLUMN,),
                        check=Step.skipped("no posterior fit"))
    return StudyResults(study=study, panel=study.panel(), models=(model,),
                        comparison=Step.skipped("needs two or more fitted candidates; 1 fitted"),
                        versions=software_versions(), started="2026-12-01 00:00 UTC")


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    results = _results(folder, problems=("lag: r_hat 1.200 >= 1.01",))
    paths = write_report(results, folder / "out")
    return paths, paths["html"].read_text(encoding="utf-8")


def test_user_text_is_escaped_never_raw(rendered):
    _, page = rendered
    for raw in (EVIL_COLUMN, EVIL_LABEL, "<b>tags</b>"):
        assert raw not in page
        assert html.escape(raw) in page  # the standard library's escaping, as rendered
    assert "<script" not in page.lower()  # no script of ours either: none is needed


def test_html_is_well_formed_and_self_contained(rendered):
    _, page = rendered
    parser = _Collector()
    parser.feed(page)
    parser.close()
    assert parser.errors == [] and parser.stack == []
    images = [a for tag, a in parser.tags if tag == "img"]
    assert images, "the data figure should be embedded"
    assert all(a["src"].startswith("data:image/png;base64,") for a in images)
    for tag, attrs in parser.tags:
        assert tag not in ("script", "link", "iframe", "object")
        for value in attrs.values():
            assert "http:" not in (value or "") and "https:" not in (value or "")


def test_nonconvergence_is_in_a_red_banner(rendered):
    _, page = rendered
    parser = _Collector()
    parser.feed(page)
    banner = " ".join(parser.bad_text)
    assert "lag: r_hat 1.200 >= 1.01" in banner
    assert EVIL_LABEL in banner  # the parser unescapes: the model is named beside its problem
    # the banner comes before the first section heading, i.e. at the top
    assert page.index('class="bad"') < page.index('id="run"')


def test_markdown_has_the_same_sections(rendered):
    paths, page = rendered
    md = paths["markdown"].read_text(encoding="utf-8")
    parser = _Collector()
    parser.feed(page)
    html_headings = []
    collecting = None

    class Headings(HTMLParser):
        def handle_starttag(self, tag, attrs):
            nonlocal collecting
            if tag in ("h1", "h2", "h3"):
                collecting = []

        def handle_endtag(self, tag):
            nonlocal collecting
            if tag in ("h1", "h2", "h3") and collecting is not None:
                html_headings.append("".join(collecting))
                collecting = None

        def handle_data(self, data):
            if collecting is not None:
                collecting.append(data)

    Headings().feed(page)
    md_headings = [line.lstrip("#").strip() for line in md.splitlines() if line.startswith("#")]
    assert md_headings == html_headings
    for section in ("Data", "Candidate models", "Model comparison", "Posterior predictive checks",
                    "Lag sensitivity", "Identification", "Reproducibility", "Caution"):
        assert section in md_headings
    figures = list(paths["figures"].glob("*.png"))
    assert figures and all(f"report_figures/{f.name}" in md for f in figures)


def test_steps_not_run_say_why(rendered):
    _, page = rendered
    assert "Comparison not run: needs two or more fitted candidates; 1 fitted." in page
    assert "not run: no posterior fit." in page
    assert "Not run: not requested" in page  # sensitivity, off by default


def test_versions_and_seed_are_reported(rendered):
    _, page = rendered
    import numpy

    assert f"<td>numpy</td><td>{numpy.__version__}</td>" in page
    assert "<td>seed</td><td>1</td>" in page  # the default seed of the study file


@pytest.mark.parametrize("diff, dse, verdict", [
    (1.0, 1.5, "too small or too uncertain"),   # 1.0 < 2 x 1.5 (and < 4): no preference
    (5.0, 3.0, "too small or too uncertain"),   # 5.0 < 2 x 3.0 = 6: no preference
    (10.0, 2.0, "expected to predict better"),  # 10 > 2 x 2 and > 4: a preference
], ids=["small", "within-2se", "clear"])
def test_loo_reading_follows_the_two_se_rule(diff, dse, verdict):
    # rule of thumb (common practice; Sivula, Magnusson & Vehtari 2020)
    table = pd.DataFrame({"elpd_diff": [0.0, diff], "dse": [0.0, dse]}, index=["a", "b"])
    (line,) = _loo_reading(table)
    assert line.startswith("a vs b: difference")
    assert verdict in line


def _findings_results(folder: Path) -> StudyResults:
    """Two candidates with normal-approximation posteriors and their real comparison."""
    from bayeslong.evaluate.comparison import compare
    from bayeslong.infer.laplace import approximate_fit

    rng = np.random.default_rng(8)
    n, t = 80, 5
    y = np.empty((n, t))
    y[:, 0] = rng.normal(size=n)
    for w in range(1, t):  # AR(1), lag 0.6 (NumPy)
        y[:, w] = 0.6 * y[:, w - 1] + rng.normal(size=n)
    pd.DataFrame({"id": np.repeat(np.arange(n), t), "w": np.tile(np.arange(t), n),
                  "y": y.ravel()}).to_csv(folder / "ar.csv", index=False)
    (folder / "ar.toml").write_text("""
title = "findings"
[data]
path = "ar.csv"
unit = "id"
wave = "w"
outcomes = ["y"]
[[models]]
model = "ar"
label = "lag only"
[[models]]
model = "linear-growth"
label = "growth only"
""")
    study = load_study(folder / "ar.toml")
    panel = study.panel()
    models, fits = [], {}
    for cand in study.models:
        fit = approximate_fit(cand.spec, panel, draws=400, chains=2, seed=3)
        fits[cand.label] = fit
        models.append(ModelResult(candidate=cand, key=cand.label[:4], fit=fit,
                                  check=Step.skipped("not requested")))
    table = compare(fits)
    return StudyResults(study=study, panel=panel, models=tuple(models),
                        comparison=Step(ran=True, value=table), versions=software_versions(),
                        started="2026-12-01 00:00 UTC")


@pytest.fixture(scope="module")
def rendered_findings(tmp_path_factory):
    folder = tmp_path_factory.mktemp("findings")
    results = _findings_results(folder)
    paths = write_report(results, folder / "out")
    return results, paths, paths["html"].read_text(encoding="utf-8")


def _expected_findings(results) -> tuple[str, str]:
    """The best model by LOO and the lag's 90% interval, computed here from the draws."""
    table = results.comparison.value
    best = str(table["elpd_loo"].idxmax())  # reference: the table's own scores
    lag = results.models[0].fit.idata.posterior["lag"].values.ravel()
    lo, hi = np.quantile(lag, [0.05, 0.95])  # the central 90% of the draws (NumPy)
    return best, f"90% interval {lo:.2f} to {hi:.2f}"


def test_findings_are_the_first_section_and_name_the_best_model_and_lag(rendered_findings):
    results, paths, page = rendered_findings
    best, interval = _expected_findings(results)
    first_h2 = page.index("<h2")
    assert page[first_h2:].startswith('<h2 id="findings">Findings</h2>')
    findings = page[first_h2:page.index("<h2", first_h2 + 1)]
    assert f"{best} predicts best a new unit" in findings
    assert interval in findings
    assert "Prediction is not causation" in findings
    assert "No fit is flagged" not in findings or not any(m.problems for m in results.models)
    md = paths["markdown"].read_text(encoding="utf-8")
    assert [line for line in md.splitlines() if line.startswith("## ")][0] == "## Findings"
    # the methods text is written from the run: the comparison ran, leave-future-out did not
    assert "PSIS-LOO" in page and "Vehtari, A., Gelman, A. &amp; Gabry, J. (2017)" in page
    assert "leave-future-out" not in page[page.index('id="manuscript"'):page.index('id="identification"')]


def test_sampling_facts_read_the_target_acceptance_of_first_runs():
    from types import SimpleNamespace

    import xarray as xr

    from bayeslong.workflow.findings import _sampling_facts

    def stand_in(draws, accept, rerun):
        post = xr.Dataset({"lag": (("chain", "draw"), np.zeros((2, draws)))})
        return SimpleNamespace(idata=SimpleNamespace(posterior=post), target_accept=accept,
                               rerun=rerun, sampler="nutpie")  # no diagnostics(): skipped

    fits = [stand_in(100, 0.9, ""), stand_in(300, 0.95, "failed at 0.8"), stand_in(100, 0.8, "")]
    results = SimpleNamespace(models=[SimpleNamespace(fit=f) for f in fits])
    facts = _sampling_facts(results)
    # a re-run's 0.95 is told apart (its own sentence); the first runs' values are listed
    assert facts["accepts"] == [0.8, 0.9] and facts["reruns"] == 1
    assert facts["draws"] == 100 and facts["rerun_draws"] == 300


def test_findings_read_a_difference_under_two_se_as_no_clear_preference(tmp_path):
    import dataclasses

    from bayeslong.workflow.findings import study_findings

    base = _results(tmp_path)
    # rule of thumb (common practice; Sivula, Magnusson & Vehtari 2020): 3.0 < 2 x 2.0
    table = pd.DataFrame({"elpd_loo": [-10.0, -13.0, -40.0], "elpd_diff": [0.0, 3.0, 30.0],
                          "dse": [0.0, 2.0, 5.0]}, index=pd.Index(["a", "b", "c"], name="model"))
    f = study_findings(dataclasses.replace(base, comparison=Step(ran=True, value=table)))
    assert f["best_loo"]["model"] == "a"
    assert [(o["model"], o["clear"]) for o in f["best_loo"]["others"]] == [("b", False), ("c", True)]
    assert f["text"][0] == ("a predicts best a new unit's trajectory (PSIS-LOO), clearly better "
                            "than c (difference 30.0, SE 5.0), but not clearly better than b "
                            "(difference 3.0, SE 2.0): a difference smaller than 2 standard "
                            "errors of the difference is no clear preference.")


CHROMIUM = Path("/usr/bin/chromium")  # Debian's package (apt-get install chromium)


def _open_in_chromium(page: Path, profile: Path) -> tuple[int, list[str], str]:
    """Load ``page`` in headless Chromium; return (exit code, console lines, rendered DOM).

    The flags are the machine notes' (no sandbox, GPU, QUIC, first-run, background
    networking, component updates or sync; a fresh profile). With ``--enable-logging=stderr``
    Chromium writes every console message of the page to stderr as a ``CONSOLE`` line
    (uncaught exceptions as "Uncaught ...").
    """
    result = subprocess.run(
        [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
         "--no-first-run", "--disable-background-networking", "--disable-component-update",
         "--disable-sync", f"--user-data-dir={profile}", "--enable-logging=stderr",
         "--v=0", "--dump-dom", page.resolve().as_uri()],
        capture_output=True, text=True, timeout=120)
    console = [line for line in result.stderr.splitlines() if "CONSOLE" in line or "Uncaught" in line]
    return result.returncode, console, result.stdout


def _need_chromium() -> None:
    """Skip without the browser on a user's machine; fail in CI, whose .ci/run installs it."""
    if CHROMIUM.exists():
        return
    if os.environ.get("CI"):
        pytest.fail("CI must run the browser test: /usr/bin/chromium is missing (.ci/run "
                    "installs Debian's chromium package; did that step fail?)")
    pytest.skip("/usr/bin/chromium is not installed here (apt-get install chromium to run it)")


def test_report_opens_in_headless_chromium_without_console_errors(rendered, tmp_path):
    _need_chromium()
    # control: the same check sees a page's console error, so an empty list below means
    # the report logged nothing (not that Chromium stopped reporting console messages)
    control = tmp_path / "control.html"
    control.write_text("<!DOCTYPE html><html><head><title>c</title></head><body>"
                       "<script>console.error('control-error'); undefinedName;</script>"
                       "</body></html>", encoding="utf-8")
    code, console, _ = _open_in_chromium(control, tmp_path / "profile-control")
    assert code == 0
    assert any("control-error" in line for line in console)
    assert any("Uncaught ReferenceError" in line for line in console)

    paths, _ = rendered
    code, console, dom = _open_in_chromium(paths["html"], tmp_path / "profile")
    assert code == 0, console
    assert console == []  # the report has no script: any console message is a fault
    assert "Lag sensitivity" in dom  # the DOM was rendered
    assert EVIL_COLUMN not in dom  # still escaped after parsing
    assert dom.count('src="data:image/png;base64,') >= 1  # figures embedded, nothing fetched


@pytest.mark.skipif(not CHROMIUM.exists(), reason="/usr/bin/chromium is not installed here")
def test_findings_come_first_in_the_rendered_page(rendered_findings, tmp_path):
    results, paths, _ = rendered_findings
    best, interval = _expected_findings(results)
    code, console, dom = _open_in_chromium(paths["html"], tmp_path / "profile")
    assert code == 0 and console == []
    parser = _Collector()
    parser.feed(dom)
    h2 = [attrs.get("id") for tag, attrs in parser.tags if tag == "h2"]
    assert h2[0] == "findings"  # the first section of the page as the browser built it
    text = " ".join(" ".join(parser.text).split())
    start = text.index("Findings")
    findings = text[start:text.index("What was run", start)]
    assert f"{best} predicts best" in findings and interval in findings


@pytest.mark.parametrize("d_aic, verdict", [(1.5, "about equally supported"),
                                            (7.0, "less supported than a")],
                         ids=["close", "far"])
def test_aic_reading_follows_the_two_point_rule(d_aic, verdict):
    from bayeslong.workflow.report import _aic_reading

    # rule of thumb (common practice; Burnham & Anderson 2002): under 2 AIC points is close
    table = pd.DataFrame({"d_aic": [0.0, d_aic]}, index=["a", "b"])
    (line,) = _aic_reading(table)
    assert line == f"b: AIC {d_aic:.1f} above a: {verdict} by this criterion."


def test_leave_future_out_problems_and_time_spent_are_reported(tmp_path):
    import dataclasses

    from bayeslong.evaluate.comparison import LFO_COLUMNS

    base = _results(tmp_path)
    table = pd.DataFrame({"elpd_loo": [-10.0, -12.0], "elpd_diff": [0.0, 2.0], "dse": [0.0, 1.5],
                          "elpd_lfo": [-3.0, -4.0], "se_lfo": [1.0, 1.0], "lfo_diff": [0.0, 1.0],
                          "lfo_dse": [0.0, 0.8]}, index=pd.Index(["a", "b"], name="model"))
    table.attrs["lfo_problems"] = {"b": "lag: r_hat 1.300 >= 1.01; " + EVIL_COLUMN}
    stages = (("intake", 0.2, ""), ("comparison", 12.5, "leave-future-out refit of b: compile 9 s"))
    results = dataclasses.replace(
        base, comparison=Step(ran=True, value=table),
        future=Step(ran=True, value=table[list(LFO_COLUMNS)]), stages=stages, seconds=13.0)
    paths = write_report(results, tmp_path / "out")
    page = paths["html"].read_text(encoding="utf-8")
    parser = _Collector()
    parser.feed(page)
    text = "".join(parser.text)
    assert "These refits did not converge by the stated criteria" in text
    assert "b: lag: r_hat 1.300 >= 1.01; " + EVIL_COLUMN in text  # shown, and escaped:
    assert EVIL_COLUMN not in page
    assert "Time spent by step (the run took 13 s" in text
    assert "leave-future-out refit of b: compile 9 s" in text
    md = paths["markdown"].read_text(encoding="utf-8")
    assert "| comparison | 12.5 | leave-future-out refit of b: compile 9 s |" in md


# --------------------------------------------------------------------------------------------
# the measurement section of a study with indicators
# --------------------------------------------------------------------------------------------

DRIFT_ITEMS = ["calm", "rested", "focused"]


def _indicator_results(folder: Path):
    """A study of one latent measured by three indicators, simulated with a fixed seed: the
    loadings are equal over waves but the intercept of 'focused' rises by 0.4 a wave
    (metric invariance holds, scalar does not). ML fits; a normal-approximation posterior of
    the lag model stands in for the Bayesian fit (for the latent-score figure)."""
    from bayeslong.infer.laplace import approximate_fit
    from bayeslong.model.structure import build_structure
    from bayeslong.workflow.runner import run_study

    spec = bl.model("ar", invariance="metric", unique_covariance="none")
    names = build_structure(spec, outcomes=("calm_latent",), n_waves=4,
                            indicators={"calm_latent": tuple(DRIFT_ITEMS)}).names
    values = {"intercept": 1.0, "lag": 0.5, "initial_mean": 2.0, "initial_var": 1.0,
              "resid_var": 0.6, "loading[rested]": 0.8, "loading[focused]": 1.1}
    params = {}
    for name in names:
        if name in values:
            params[name] = values[name]
        elif name.startswith("intercept[focused,"):
            params[name] = 0.4 * (int(name[-2]) - 1)  # drifts: 0, 0.4, 0.8, 1.2
        elif name.startswith("intercept["):
            params[name] = 0.0 if name.startswith("intercept[calm,") else 0.5
        else:
            params[name] = 0.4  # unique variances
    df = bl.simulate(spec, params, 300, 4, seed=11, outcomes=["calm_latent"],
                     indicators={"calm_latent": DRIFT_ITEMS})
    df.to_csv(folder / "calm.csv", index=False)
    (folder / "calm.toml").write_text(f"""
title = "calm (invented)"
[data]
path = "calm.csv"
unit = "unit"
wave = "wave"
outcomes = {{ calm_latent = {DRIFT_ITEMS!r} }}
[[models]]
model = "ar"
label = "lag"
[[models]]
model = "waves-apart"
label = "unlinked waves"
[sampling]
method = "ml"
[checks]
ppc = false
""".replace("'", '"'))
    study = load_study(folder / "calm.toml")
    results = run_study(study, progress=None)
    fit = approximate_fit(study.models[0].spec, results.panel, draws=100, chains=2, seed=1)
    lag = dataclasses.replace(results.models[0], fit=fit)
    return dataclasses.replace(results, models=(lag, results.models[1]))


@pytest.fixture(scope="module")
def rendered_measurement(tmp_path_factory):
    folder = tmp_path_factory.mktemp("measurement")
    results = _indicator_results(folder)
    paths = write_report(results, folder / "out")
    return results, paths, paths["html"].read_text(encoding="utf-8")


def _section(page: str, anchor: str) -> str:
    start = page.index(f'<h2 id="{anchor}">')
    return page[start:page.index("<h2", start + 1)]


def test_measurement_section_tables_and_readings(rendered_measurement):
    results, paths, page = rendered_measurement
    section = _section(page, "measurement")
    assert "calm_latent: calm, rested, focused" in section
    assert "The measurement alone: unlinked waves" in section  # one process: tested free of structure
    parser = _Collector()
    parser.feed(section)
    text = " ".join(" ".join(parser.text).split())
    # the by-wave table: the marker's loading is fixed at 1, the others carry intervals
    assert "1 (fixed)" in text
    assert "loading" in text and "intercept" in text and "unique_var" in text
    # the invariance comparison of the unlinked model, reference: the same ML comparison
    # run here, with the p-value recomputed from scipy's chi-square
    inv = bl.compare_invariance(bl.model("waves-apart"), results.panel, starts=1,
                                seed=results.study.sampling["seed"])
    r = inv.loc["scalar"]
    p = stats.chi2.sf(r["lr"], r["df"])
    assert p < 0.05  # the intercept of 'focused' drifts by 0.4 a wave in the simulated data
    assert (f"scalar against metric: LR {r['lr']:.2f} on {int(r['df'])} df, p = {p:.3g}; the "
            "added equalities fit worse than chance") in text
    m = inv.loc["metric"]
    assert f"metric against configural: LR {m['lr']:.2f} on {int(m['df'])} df" in text
    # the lag model cannot identify the levels below scalar: said, not tested
    assert "configural, metric: not identified with this model" in text
    # what the tests can and cannot show
    assert "A large p-value does not show invariance" in text
    assert "with many units small differences reach significance" in text
    # the lag at each identified level, and its reading
    lag = bl.compare_invariance(bl.model("ar"), results.panel, starts=1,
                                seed=results.study.sampling["seed"])
    assert f"scalar {lag.loc['scalar', 'lag']:.3f} (SE {lag.loc['scalar', 'lag se']:.3f})" in text
    spread = abs(lag.loc["strict", "lag"] - lag.loc["scalar", "lag"])
    assert f"The estimates span {spread:.3f}" in text
    # the latent-score figure is embedded, and the Markdown twin has the section too
    assert section.count('src="data:image/png;base64,') == 1
    assert "lag: latent trajectories of 3 units (posterior mean, 90% interval)" in text
    md = paths["markdown"].read_text(encoding="utf-8")
    assert "## Measurement" in md and "A large p-value does not show invariance" in md
    # the data figure draws every indicator, each named with its process
    fig = _figure_data(results.panel)
    assert [ax.get_ylabel() for ax in fig.axes] == [f"calm_latent / {i}" for i in DRIFT_ITEMS]
    # the findings name the indicators and the level the lag was estimated at
    findings = _section(page, "findings")
    assert "Latent outcomes: calm_latent measured by calm, rested, focused" in findings
    assert "at scalar invariance" in findings
    methods = _section(page, "manuscript")
    assert ("calm_latent (indicators calm, rested, focused) was a latent variable at every wave"
            in methods)
    assert "Meredith, W. (1993)" in methods and "Wilks, S. S. (1938)" in methods


def test_no_measurement_section_without_indicators(rendered):
    _, page = rendered
    assert 'id="measurement"' not in page


def test_measurement_section_opens_in_headless_chromium(rendered_measurement, tmp_path):
    _need_chromium()
    _, paths, _ = rendered_measurement
    code, console, dom = _open_in_chromium(paths["html"], tmp_path / "profile")
    assert code == 0 and console == []
    parser = _Collector()
    parser.feed(dom)
    h2 = [attrs.get("id") for tag, attrs in parser.tags if tag == "h2"]
    assert h2.index("measurement") == h2.index("models") + 1  # right after the candidates


def test_sensitivity_section_of_a_categorical_panel_says_how_power_scaling_and_skips_ran():
    # the lag-sensitivity section names the thinned draws power-scaling used and each model
    # the specification axis skipped with its reason (evaluate/sensitivity.py); a result
    # made by hand, the section's input, so no fit is needed
    import types

    from bayeslong.evaluate.sensitivity import LagSensitivity
    from bayeslong.workflow.report import _Doc, _section_sensitivity

    table = pd.DataFrame({"axis": ["default", "power-scaling"], "setting": ["default priors", "prior"],
                          "model": ["ar", "ar"], "parameter": ["lag", "lag"], "mean": [0.4, 0.4],
                          "sd": [0.1, 0.1], "q5": [0.2, 0.2], "q95": [0.6, 0.6],
                          "shift": [0.0, 0.0], "sign_change": [False, False],
                          "flag": [False, True], "psens": [np.nan, 0.08], "diagnosis": ["", ""]})
    ps = pd.DataFrame({"prior": [0.08], "likelihood": [0.01], "diagnosis": [""]},
                      index=pd.Index(["lag"], name="parameter"))
    ps.attrs["draws"] = 250
    value = LagSensitivity(table=table, power_scaling=ps, reference="ar",
                           skipped={"specification: alt": "not run for model 'alt': it is not "
                                                           "identified"})
    panels = {"categorical": types.SimpleNamespace(categories={"y": (1, 2)}),
              "continuous": types.SimpleNamespace(categories={})}
    texts = {}
    for kind, panel in panels.items():
        doc = _Doc()
        _section_sensitivity(doc, types.SimpleNamespace(sensitivity=Step(ran=True, value=value),
                                                        panel=panel))
        texts[kind] = [b.text for b in doc.blocks if b.kind == "para"]
    note = ("Power-scaling of the default fit is computed on its 250 draws that carry the "
            "marginal log-likelihood")
    assert any(t.startswith(note) for t in texts["categorical"])
    assert not any(t.startswith(note) for t in texts["continuous"])
    assert "Axis 'specification: alt' not run for model 'alt': it is not identified." in texts["categorical"]
