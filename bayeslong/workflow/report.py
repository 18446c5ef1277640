"""The study report: one self-contained HTML file and a Markdown twin with the same content.

:func:`write_report` turns the :class:`~bayeslong.study.StudyResults` of a run into

- ``report.html``: one file, plots embedded as base64 PNG, no scripts, no network
  resources, so it can be mailed, archived or opened offline;
- ``report.md``: the same sections for pasting into a paper's supplement, with the plots
  as PNG files in ``report_figures/`` beside it.

Both are rendered from one list of blocks (headings, paragraphs, tables, figures), so they
cannot drift apart. Every piece of user-supplied text (titles, labels, column and file
names) passes through :func:`html.escape` in the HTML version.
"""

from __future__ import annotations

import base64
import html
import io
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bayeslong.evaluate.comparison import LFO_COLUMNS
from bayeslong.workflow import category_report
from bayeslong.workflow.findings import add_findings, add_manuscript_text, prior_text
from bayeslong.workflow.measurement_section import add_measurement_section
from bayeslong.workflow.results import slug, table_of

__all__ = ["write_report"]

#: Thresholds of the plain-language reading of a LOO difference (common practice, after
#: Sivula, Magnusson & Vehtari 2020, arXiv:2008.10296: differences under about 4 elpd
#: points, or within about 2 standard errors, do not separate the models).
SE_MULTIPLE = 2.0
SMALL_ELPD = 4.0


# --------------------------------------------------------------------------------------------
# the document model
# --------------------------------------------------------------------------------------------


@dataclass
class _Block:
    kind: str  # heading | para | items | table | figure | code
    text: str = ""
    level: int = 2
    tone: str = ""  # "" | note | warn | bad
    items: tuple = ()
    table: Any = None
    figure: bytes = b""
    name: str = ""
    anchor: str = ""


@dataclass
class _Doc:
    blocks: list = field(default_factory=list)

    def heading(self, text: str, level: int = 2, anchor: str = "") -> None:
        self.blocks.append(_Block("heading", text=text, level=level, anchor=anchor))

    def para(self, text: str, tone: str = "") -> None:
        self.blocks.append(_Block("para", text=text, tone=tone))

    def items(self, items, tone: str = "") -> None:
        items = tuple(items)
        if items:
            self.blocks.append(_Block("items", items=items, tone=tone))

    def table(self, frame, caption: str = "", index: bool = True) -> None:
        frame = frame if index else frame.reset_index(drop=True)
        self.blocks.append(_Block("table", table=_format_frame(frame, index), text=caption))

    def figure(self, fig, name: str, caption: str) -> None:
        import matplotlib.pyplot as plt

        buf = io.BytesIO()
        # a figure with a layout engine fits its canvas already; "tight" would draw it twice
        tight = None if fig.get_layout_engine() is not None else "tight"
        fig.savefig(buf, format="png", dpi=110, bbox_inches=tight)
        plt.close(fig)
        self.blocks.append(_Block("figure", figure=buf.getvalue(), name=name, text=caption))

    def code(self, text: str) -> None:
        self.blocks.append(_Block("code", text=text))


def _fmt(value) -> str:
    """Format one table cell: numbers to 4 significant digits, the rest as text."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if math.isnan(value):
            return ""
        if value != 0 and (abs(value) >= 1e5 or abs(value) < 1e-3):
            return f"{value:.3g}"
        return f"{value:.4g}" if abs(value) < 1000 else f"{value:.1f}"
    try:
        import numpy as np

        if isinstance(value, np.floating):
            return _fmt(float(value))
        if isinstance(value, np.bool_):
            return _fmt(bool(value))
        if isinstance(value, np.integer):
            return str(int(value))
    except ImportError:  # pragma: no cover
        pass
    return str(value)


def _format_frame(frame, index: bool) -> tuple[list[str], list[list[str]]]:
    """A DataFrame as (header, rows) of strings."""
    header = ([str(frame.index.name or "")] if index else []) + [str(c) for c in frame.columns]
    rows = []
    for label, row in zip(frame.index, frame.itertuples(index=False)):
        cells = [_fmt(v) for v in row]
        rows.append(([_fmt(label)] if index else []) + cells)
    return header, rows


# --------------------------------------------------------------------------------------------
# renderers
# --------------------------------------------------------------------------------------------

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;max-width:62rem;margin:2rem auto;
padding:0 1rem;color:#1d232b;line-height:1.45}
h1{font-size:1.7rem;border-bottom:3px solid #2c5f8a;padding-bottom:.3rem}
h2{font-size:1.3rem;margin-top:2.2rem;border-bottom:1px solid #c9d3dd;padding-bottom:.2rem}
h3{font-size:1.1rem;margin-top:1.6rem}
table{border-collapse:collapse;margin:.6rem 0 1.2rem;font-size:.86rem}
th,td{border:1px solid #d3dae2;padding:.2rem .5rem;text-align:right}
th{background:#eef2f6}td:first-child,th:first-child{text-align:left}
caption{caption-side:top;text-align:left;font-weight:600;padding:.2rem 0}
.note{background:#eef5fb;border-left:4px solid #2c5f8a;padding:.5rem .8rem}
.warn{background:#fff6e0;border-left:4px solid #c98a00;padding:.5rem .8rem}
.bad{background:#fde8e8;border:2px solid #b3261e;color:#7a1410;padding:.6rem .9rem;font-weight:600}
figure{margin:1rem 0}figure img{max-width:100%;border:1px solid #e1e6eb}
figcaption{font-size:.85rem;color:#4a5560}
pre{background:#f5f7f9;border:1px solid #e1e6eb;padding:.6rem;overflow-x:auto;font-size:.82rem}
nav ul{columns:2;font-size:.9rem}
"""


def _html(doc: _Doc, title: str) -> str:
    esc = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{esc(title)}</title>", f"<style>{_CSS}</style>", "</head>", "<body>"]
    for b in doc.blocks:
        if b.kind == "heading":
            anchor = f' id="{esc(b.anchor)}"' if b.anchor else ""
            out.append(f"<h{b.level}{anchor}>{esc(b.text)}</h{b.level}>")
        elif b.kind == "para":
            cls = f' class="{b.tone}"' if b.tone else ""
            role = ' role="alert"' if b.tone == "bad" else ""
            out.append(f"<p{cls}{role}>{esc(b.text)}</p>")
        elif b.kind == "items":
            cls = f' class="{b.tone}"' if b.tone else ""
            lis = "".join(f"<li>{esc(str(i))}</li>" for i in b.items)
            out.append(f"<ul{cls}>{lis}</ul>")
        elif b.kind == "table":
            header, rows = b.table
            cap = f"<caption>{esc(b.text)}</caption>" if b.text else ""
            head = "".join(f"<th>{esc(h)}</th>" for h in header)
            body = "".join("<tr>" + "".join(f"<td>{esc(c)}</td>" for c in r) + "</tr>" for r in rows)
            out.append(f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")
        elif b.kind == "figure":
            data = base64.b64encode(b.figure).decode("ascii")
            out.append(f'<figure><img alt="{esc(b.text)}" src="data:image/png;base64,{data}">'
                       f"<figcaption>{esc(b.text)}</figcaption></figure>")
        elif b.kind == "code":
            out.append(f"<pre>{esc(b.text)}</pre>")
    out += ["</body>", "</html>", ""]
    return "\n".join(out)


def _md_cell(text: str) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def _markdown(doc: _Doc, figures: Path) -> tuple[str, list[Path]]:
    out, written = [], []
    marks = {"bad": "**STOP:** ", "warn": "**Warning:** ", "note": "*Note:* "}
    for b in doc.blocks:
        if b.kind == "heading":
            out.append("#" * b.level + " " + b.text)
        elif b.kind == "para":
            text = marks.get(b.tone, "") + b.text
            out.append(("> " + text) if b.tone else text)
        elif b.kind == "items":
            out.append("\n".join(f"- {i}" for i in b.items))
        elif b.kind == "table":
            header, rows = b.table
            lines = ([f"*{b.text}*", ""] if b.text else [])
            lines.append("| " + " | ".join(_md_cell(h) for h in header) + " |")
            lines.append("|" + "|".join("---" for _ in header) + "|")
            lines += ["| " + " | ".join(_md_cell(c) for c in r) + " |" for r in rows]
            out.append("\n".join(lines))
        elif b.kind == "figure":
            figures.mkdir(parents=True, exist_ok=True)
            path = figures / f"{b.name}.png"
            path.write_bytes(b.figure)
            written.append(path)
            out.append(f"![{b.text}]({figures.name}/{path.name})\n\n*{b.text}*")
        elif b.kind == "code":
            out.append("```\n" + b.text + "\n```")
    return "\n\n".join(out) + "\n", written


# --------------------------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------------------------


def _figure_data(panel):
    """Observed trajectories of each outcome, with the wave means."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    import numpy as np

    names = [name if group == (p,) else f"{p} / {name}"  # each indicator of a latent process
             for p, group in panel.indicators.items() for name in group]
    k = len(names)
    fig, axes = plt.subplots(1, k, figsize=(min(6.2, 16.0 / k) * k, 3.6), squeeze=False)
    x = np.arange(1, panel.n_waves + 1)
    shown = min(panel.n_units, 60)
    for j, (ax, name) in enumerate(zip(axes[0], names)):
        y = panel.y[:, :, j]
        for i in range(shown):
            ax.plot(x, y[i], color="#7f9bb5", lw=0.7, alpha=0.6, marker=".", ms=2)
        ax.plot(x, np.nanmean(y, axis=0), color="#b3261e", lw=2.2, marker="o", label="wave mean")
        ax.set_xticks(x, [str(w) for w in panel.waves])
        ax.set_xlabel("wave")
        ax.set_ylabel(str(name))
        ax.set_title(f"{name}: {shown} of {panel.n_units} units")
        ax.legend(loc="best", fontsize=8)
    fig.tight_layout()
    return fig


def _draw(doc: "_Doc", name: str, make, file: str, caption: str) -> None:
    """Add the figure ``make(plots_module)`` or, without the plots module, say why not."""
    from bayeslong.workflow.runner import optional_module

    plots, absent = optional_module("evaluate.plots")
    if plots is None:
        doc.para(f"Figure not drawn ({name}): {absent}.", "note")
        return
    try:
        fig = make(plots)
    except Exception as err:  # a figure must not stop the report; say what happened
        doc.para(f"Figure not drawn ({name}): {type(err).__name__}: {err}.", "warn")
        return
    doc.figure(fig, file, caption)


# --------------------------------------------------------------------------------------------
# sections
# --------------------------------------------------------------------------------------------


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def _section_header(doc: _Doc, results) -> None:
    study = results.study
    s = study.sampling
    doc.heading(study.title, 1)
    method = {"bayes": "Bayesian (NUTS posterior sampling)",
              "ml": "maximum likelihood only (sampling.method = \"ml\")",
              "ml-fallback": "MAXIMUM LIKELIHOOD ONLY: the Bayesian fit module is not installed"}
    doc.para(f"Study file {study.source.name}, run {results.started}, "
             f"{results.seconds:.0f} s. Method: {method[results.method]}.")
    add_findings(doc, results)  # the answer first; convergence problems are said there
    if results.method == "ml-fallback":
        doc.para("This run fell back to maximum likelihood because bayeslong.fit is not "
                 "available: there are no posteriors, LOO, WAIC or predictive checks below.", "bad")
    unidentified = [m.label for m in results.models
                    if m.identification is not None and not m.identification.identified]
    if unidentified:
        doc.para("Not identified on these data (not fitted): " + ", ".join(unidentified), "bad")
    failed = [m.label for m in results.models if results.method == "bayes" and m.fit is None
              and m.label not in unidentified]
    if failed:
        doc.para("No posterior for: " + ", ".join(failed) + " (the fit failed; the reason is "
                 "in the model's section below).", "bad")
    doc.heading("What was run", 2, "run")
    rows = [("candidates", ", ".join(m.label for m in results.models)),
            ("fits made in this run", str(results.fitted)),
            ("fits reused from saved files", str(results.reused))]
    if results.method == "bayes":
        rows += [("chains x draws (tuning)", f"{s['chains']} x {s['draws']} ({s['tune']})"),
                 ("sampler", s["sampler"])]
    axes = [k.replace("_", " ") for k, on in study.sensitivity.items() if on]
    rows += [("leave-future-out", "on" if study.comparison["future"] else "off"),
             ("predictive checks", f"on ({study.checks['ppc_draws']} draws)"
              if study.checks["ppc"] else "off"),
             ("lag sensitivity axes", ", ".join(axes) or "none"),
             ("prior overrides", "; ".join(f"{k} ~ {prior_text(v)}"
                                           for k, v in study.priors.items()) or "none"),
             ("seed", str(s["seed"])), ("output folder", str(study.output))]
    import pandas as pd

    doc.table(pd.DataFrame(rows, columns=["setting", "value"]).set_index("setting"))


def _section_data(doc: _Doc, results) -> None:
    import pandas as pd

    study, panel = results.study, results.panel
    d = study.data
    doc.heading("Data", 2, "data")
    desc = panel.describe()
    roles = [("file", d.path.name), ("layout", d.layout), ("unit column", d.unit)]
    if d.layout == "long":
        roles.append(("wave column", d.wave))
    roles += [("outcomes", ", ".join(map(str, panel.outcomes))),
              ("time-varying covariates", ", ".join(map(str, panel.time_varying)) or "none"),
              ("time-invariant covariates", ", ".join(map(str, panel.time_invariant)) or "none"),
              ("units", str(panel.n_units)),
              ("waves", f"{panel.n_waves} ({', '.join(map(str, panel.waves))})")]
    doc.table(pd.DataFrame(roles, columns=["item", "value"]).set_index("item"))
    if results.intake_warnings:
        doc.para("Intake warnings:", "warn")
        doc.items(results.intake_warnings, "warn")
    observed = desc["observed"].copy()
    observed.columns = [f"share observed: {c}" for c in observed.columns]
    doc.table(observed, "Share of units observed at each wave")
    patterns = desc["patterns"]
    shown = patterns.head(15)
    doc.table(shown, "Missing-data patterns (o observed, . missing), most common first"
              + (f"; {len(shown)} of {len(patterns)} shown" if len(patterns) > len(shown) else ""))
    doc.figure(_figure_data(panel), "data-trajectories",
               "Observed trajectories (thin lines) and the wave means (thick line)")
    if getattr(panel, "categories", None):
        category_report.add_categories(doc, panel)


def _section_models(doc: _Doc, results) -> None:
    import pandas as pd

    doc.heading("Candidate models", 2, "models")
    for m in results.models:
        spec = m.candidate.spec
        doc.heading(m.label, 3)
        doc.para(f"{spec.name}: {spec.description}")
        fields = {"processes": spec.processes, "form": spec.form,
                  "growth factors": ", ".join(spec.factors) or "none",
                  "time scores": spec.scores if spec.factors else "",
                  **{f"option: {k}": v for k, v in spec.options.items()}}
        opts = pd.DataFrame({"value": pd.Series(fields)})
        opts.index.name = "specification"
        doc.table(opts, "Specification and options")
        if m.problems:
            doc.para("This model did not converge by the stated criteria:", "bad")
            doc.items(m.problems, "bad")
        for note in m.notes:
            doc.para(note, "warn")
        ident = m.identification
        if ident is not None:
            doc.para(("Locally identified" if ident.identified else "NOT identified")
                     + f": Jacobian rank {ident.rank} of {ident.n_params} parameters "
                     f"({ident.n_moments} moments)."
                     + (" Not separable: " + ", ".join(ident.deficient) + ". " + ident.advice
                        if not ident.identified else ""),
                     "" if ident.identified else "bad")
        if m.fit is not None:
            priors = _try_table(lambda: m.fit.priors())
            if priors is not None:
                doc.table(priors, "Priors (source 'user' marks an override from the study file)")
            summary = _try_table(lambda: m.fit.summary())
            if summary is not None:
                doc.table(summary, "Posterior summary")
            if getattr(m.fit, "categorical", None) is not None:
                category_report.add_thresholds(doc, m.fit)
            diag = _try_table(lambda: m.fit.diagnostics())
            if diag is not None:
                a = diag.attrs
                run = pd.DataFrame({"value": {
                    "sampler": getattr(m.fit, "sampler", ""),
                    "divergent transitions after warm-up": a.get("divergences", ""),
                    "E-BFMI by chain": ", ".join(f"{v:.2f}" for v in a.get("ebfmi", [])),
                    "share of draws at the maximum tree depth": a.get("treedepth_share", ""),
                    "thresholds": ", ".join(f"{k} {v}" for k, v in a.get("thresholds", {}).items()),
                }})
                run.index.name = "sampler check"
                doc.table(run, "Sampler diagnostics (per-parameter R-hat and ESS are in the "
                          "posterior summary)")
            if m.reused:
                doc.para(f"Fit reused from the saved file (content hash {m.key}).", "note")
            else:
                doc.para(f"Fitted in this run ({m.seconds:.0f} s including compilation; "
                         f"content hash {m.key}).", "note")
        if m.ml is not None:
            doc.table(m.ml["table"], f"Maximum likelihood: log-likelihood {m.ml['loglik']:.3f}, "
                      f"{m.ml['n_params']} parameters, AIC {m.ml['aic']:.2f}, BIC {m.ml['bic']:.2f}")


def _try_table(get):
    import pandas as pd

    try:
        value = get()
    except Exception:  # a display helper must not stop the report
        return None
    if isinstance(value, pd.Series):
        value = value.to_frame()
    if isinstance(value, dict):
        value = pd.DataFrame({"value": pd.Series(value)})
    return value if isinstance(value, pd.DataFrame) else None


def _loo_reading(table) -> list[str]:
    """Plain-language reading of each model's distance from the best, in standard errors."""
    cols = {c.lower(): c for c in table.columns}
    diff = next((cols[c] for c in ("elpd_diff", "lfo_diff") if c in cols), None)
    dse = next((cols[c] for c in ("dse", "lfo_dse") if c in cols), None)
    if diff is None or dse is None or len(table) < 2:
        return []
    best = str(table[diff].abs().idxmin())
    lines = []
    for label, row in table.iterrows():
        if str(label) == best:
            continue
        d, se = abs(float(row[diff])), float(row[dse])
        if not (math.isfinite(d) and math.isfinite(se)):
            continue
        if d < SMALL_ELPD or d < SE_MULTIPLE * se:
            lines.append(f"{best} vs {label}: difference {d:.1f} with standard error {se:.1f}: "
                         "too small or too uncertain to prefer either model for prediction.")
        else:
            lines.append(f"{best} vs {label}: difference {d:.1f} ({d / se:.1f} standard errors): "
                         f"{best} is expected to predict better.")
    return lines


#: AIC distances below this are not a preference (common practice, after Burnham &
#: Anderson 2002, Model Selection and Multimodel Inference, section 2.6).
AIC_CLOSE = 2.0


def _aic_reading(table) -> list[str]:
    """Plain-language reading of AIC distances from the best model."""
    if "d_aic" not in table.columns or len(table) < 2:
        return []
    best = str(table["d_aic"].idxmin())
    lines = []
    for label, d in table["d_aic"].items():
        if str(label) == best:
            continue
        verdict = ("about equally supported" if d < AIC_CLOSE
                   else f"less supported than {best}")
        lines.append(f"{label}: AIC {d:.1f} above {best}: {verdict} by this criterion.")
    return lines


def _section_comparison(doc: _Doc, results) -> None:
    doc.heading("Model comparison", 2, "comparison")
    comp = results.comparison
    if results.method != "bayes" and comp.ran:
        doc.para("Without posteriors the candidates are compared by AIC and BIC of the "
                 "maximum-likelihood fits (lower is better; d_aic and d_bic are distances from "
                 "the best).", "warn")
    table = table_of(comp.value) if comp.ran else None
    if table is not None:
        main = table.drop(columns=[c for c in LFO_COLUMNS if c in table.columns])
        doc.table(main, "Leave-one-unit-out comparison by PSIS-LOO, WAIC beside it"
                  if results.method == "bayes" else "Information criteria")
        if results.method == "bayes":
            _draw(doc, "comparison", lambda plots: plots.plot_compare(table), "comparison",
                  "Expected log predictive density of each model (left) and its difference "
                  "from the best with two standard errors of the difference (right)")
        reading = table.attrs.get("reading")
        if results.method != "bayes":
            doc.items(_aic_reading(main))
        else:
            doc.items(_loo_reading(main) if not reading else
                      [line for line in reading.splitlines() if "leave-future-out" not in line])
    else:
        doc.para(f"Comparison not run: {comp.reason}.", "warn")
    fut = results.future
    doc.heading("Leave-future-out", 3)
    table = table_of(fut.value) if fut.ran else None
    if table is not None:
        doc.para("Each candidate is refitted on all waves but the last (same priors and "
                 "sampling settings) and scored on how well it predicts each unit's last wave "
                 "from its earlier ones (log predictive density).")
        doc.table(table, "Predicting the last wave from the earlier ones")
        doc.items(_loo_reading(table))
        full = table_of(comp.value)
        problems = full.attrs.get("lfo_problems", {}) if full is not None else {}
        if problems:
            doc.para("These refits did not converge by the stated criteria, so their elpd_lfo "
                     "is uncertain beyond its standard error:", "warn")
            doc.items([f"{name}: {text}" for name, text in problems.items()], "warn")
    else:
        doc.para(f"Not run: {fut.reason}.", "note")
    doc.heading("How to read this comparison", 3)
    doc.items([
        "The comparison ranks models by how well they are expected to predict the outcomes "
        "of a new unit (LOO, WAIC) or of a later wave (leave-future-out), nothing more.",
        f"A difference smaller than about {SE_MULTIPLE:g} standard errors of the difference "
        f"(or under about {SMALL_ELPD:g} points of elpd) is not a preference: the models "
        "predict about equally well.",
        "Better prediction is not evidence of causation: a model with a lag can predict best "
        "because last wave's score stands in for stable differences the model misses.",
        "The lag is a parameter of a model, and its size depends on what else the model "
        "contains (growth factors, first-wave treatment); read it conditional on the model.",
        "All results assume outcomes missing at random given the observed data and the "
        "covariates, and equally spaced waves.",
    ])


def _section_checks(doc: _Doc, results) -> None:
    doc.heading("Posterior predictive checks", 2, "checks")
    any_ran = False
    for m in results.models:
        step = m.check
        if not step.ran:
            doc.para(f"{m.label}: not run: {step.reason}.", "note")
            continue
        any_ran = True
        doc.heading(m.label, 3)
        value = step.value
        if isinstance(value, dict) and "shares" in value:  # categorical variables
            category_report.add_category_checks(doc, m.label, value)
            continue
        table = value.get("ppc") if isinstance(value, dict) else None
        if table is not None and len(table):
            _draw(doc, "predictive check",
                  lambda plots: plots.plot_ppc(table, statistics=("mean", "sd", "lag1_cor")),
                  f"ppc-{slug(m.label)}",
                  f"{m.label}: observed wave statistics against their replicated 50% and 90% "
                  "bands")
            flagged = table[table["flag"]]
            if len(flagged):
                doc.para(f"{len(flagged)} of {len(table)} statistics fall in the outer 5% tails "
                         "of their replicated distribution:", "warn")
                doc.table(flagged.set_index("statistic"), "Flagged statistics", index=True)
            else:
                doc.para(f"None of the {len(table)} statistics falls in the outer 5% tails. "
                         "That is no proof of fit: predictive p-values are conservative.")
        bands = value.get("trajectories") if isinstance(value, dict) else None
        if bands is not None and len(bands):
            _draw(doc, "trajectories", lambda plots: plots.plot_trajectories(bands),
                  f"trajectories-{slug(m.label)}",
                  f"{m.label}: each unit's outcome at each wave predicted from its other waves "
                  "(50% and 90% bands) against the observed values")
    if any_ran:
        doc.para("Posterior predictive p-values pile up near 0.5 even for a true model "
                 "(Gelman, Meng & Stern 1996); a flag is a signal of misfit in that statistic, "
                 "the absence of flags is not a proof of fit.", "note")


def _section_sensitivity(doc: _Doc, results) -> None:
    doc.heading("Lag sensitivity", 2, "sensitivity")
    step = results.sensitivity
    if not step.ran:
        doc.para(f"Not run: {step.reason}.", "note")
        return
    value = step.value
    table = getattr(value, "table", None)
    if table is not None:
        reused = tuple(getattr(value, "reused", ()))
        doc.para("Each row fits the data with one setting changed and shows the lag "
                 "(posterior mean, SD and 90% interval). A row is flagged when its interval "
                 "moves to another side of zero than the default fit's, or its mean moves by "
                 "more than one posterior SD. Every setting starts from the study's priors "
                 "and sampling settings."
                 + (" Settings that equal a candidate's fit are read from that fit instead "
                    f"of refitted ({', '.join(reused)})." if reused else ""))
        doc.table(table, "The lag under each setting", index=False)
        unsettled = [k for k, ws in (getattr(value, "warnings", None) or {}).items()
                     if any(w.startswith("ConvergenceWarning") for w in ws)]
        if unsettled:
            doc.para("Fits behind these settings did not converge by the stated criteria "
                     "(read their rows with care): " + "; ".join(unsettled), "warn")
        flagged = table[table["flag"]] if "flag" in table else table.iloc[:0]
        if len(flagged):
            doc.para(f"{len(flagged)} setting(s) move the lag materially: " + "; ".join(
                f"{a}: {s}" for a, s in zip(flagged["axis"], flagged["setting"])), "warn")
    plot = getattr(value, "plot", None)
    if callable(plot):
        try:
            doc.figure(plot(), "lag-sensitivity", "The lag's 90% intervals by setting "
                       "(red: flagged; dashed: the default fit's mean; dotted: zero)")
        except Exception as err:  # the table is already shown; say why the plot is not
            doc.para(f"The sensitivity plot could not be drawn ({err}).", "warn")
    if getattr(getattr(results, "panel", None), "categories", None):
        category_report.add_power_scaling_note(doc, value)
    for axis, why in (getattr(value, "skipped", None) or {}).items():
        doc.para(f"Axis '{axis}' {why}.", "note")
    failed = getattr(value, "failed", None)
    if failed:
        doc.para("Refits that failed: " + "; ".join(f"{k}: {v}" for k, v in failed.items()), "warn")


def _section_identification(doc: _Doc, results) -> None:
    import pandas as pd

    doc.heading("Identification", 2, "identification")
    rows = []
    for m in results.models:
        ident = m.identification
        if ident is None:
            rows.append({"model": m.label, "identified": "not checked", "rank": "",
                         "parameters": "", "moments": "", "not separable": ""})
        else:
            rows.append({"model": m.label, "identified": ident.identified, "rank": ident.rank,
                         "parameters": ident.n_params, "moments": ident.n_moments,
                         "not separable": ", ".join(ident.deficient)})
    doc.table(pd.DataFrame(rows).set_index("model"),
              "Local identification: rank of the Jacobian of the implied moments at random "
              "parameter points (Rothenberg 1971)")


def _section_reproducibility(doc: _Doc, results) -> None:
    import pandas as pd

    doc.heading("Reproducibility", 2, "reproducibility")
    versions = pd.DataFrame({"version": pd.Series(results.versions)})
    versions.index.name = "software"
    doc.table(versions, "Software")
    stages = getattr(results, "stages", ())
    if stages:
        spent = pd.DataFrame([{"step": step, "seconds": round(float(sec), 1), "detail": detail}
                              for step, sec, detail in stages]).set_index("step")
        doc.table(spent, f"Time spent by step (the run took {results.seconds:.0f} s; writing "
                  "this report is not included)")
    keys = pd.DataFrame({"content hash": {m.label: m.key for m in results.models}})
    keys.index.name = "model"
    doc.table(keys, f"Fits are saved under {results.study.output / 'fits'} by content hash; "
              f"seed {results.study.sampling['seed']}")
    try:
        text = results.study.source.read_text(encoding="utf-8")
    except OSError:
        text = ""
    if text:
        doc.para(f"The study file ({results.study.source.name}) as run:")
        doc.code(text)


def _section_caution(doc: _Doc) -> None:
    doc.heading("Caution", 2, "caution")
    doc.para("Comparing models by prediction does not establish causal carry-over from one "
             "wave to the next: a lag that predicts well may stand for stable differences, "
             "omitted time-varying causes or measurement artefacts. Every estimate here is "
             "conditional on the model class considered (linear Gaussian growth and lag "
             "models for equally spaced waves), on outcomes missing at random, and on the "
             "priors shown. Report the sensitivity of the lag alongside its estimate.")


# --------------------------------------------------------------------------------------------
# entry point
# --------------------------------------------------------------------------------------------


def write_report(results, folder) -> dict[str, Path]:
    """Write the HTML and Markdown reports of a study run.

    Parameters
    ----------
    results : bayeslong.study.StudyResults
        From :func:`bayeslong.study.run_study`.
    folder : str or pathlib.Path
        Created if needed.

    Returns
    -------
    dict of str to pathlib.Path
        ``"html"``: the self-contained ``report.html``; ``"markdown"``: ``report.md``;
        ``"figures"``: the folder of the Markdown version's PNG files.

    Notes
    -----
    Sections: the findings first (the best-predicting model by LOO and leave-future-out,
    its lag with a 90% interval, the lag's range over the sensitivity settings, red
    banners for non-convergence, and the caution; :mod:`bayeslong.workflow.findings`),
    what was run (banners for unidentified models and a maximum-likelihood fallback), data
    and missingness, each candidate (spec, priors, posterior summary, diagnostics), the
    measurement part when a process has several indicators (by wave, invariance levels by
    ML, the lag across levels, latent scores; :mod:`bayeslong.workflow.measurement_section`), the
    comparison with a plain-language reading, posterior predictive checks, lag
    sensitivity, a methods and a results paragraph for a manuscript, identification,
    software versions and seeds, and a caution. A step that did not run says so and why.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    doc = _Doc()
    _section_header(doc, results)
    _section_data(doc, results)
    _section_models(doc, results)
    add_measurement_section(doc, results, _draw)
    _section_comparison(doc, results)
    _section_checks(doc, results)
    _section_sensitivity(doc, results)
    add_manuscript_text(doc, results)
    _section_identification(doc, results)
    _section_reproducibility(doc, results)
    _section_caution(doc)
    html_path = folder / "report.html"
    html_path.write_text(_html(doc, results.study.title), encoding="utf-8")
    figures = folder / "report_figures"
    md, _ = _markdown(doc, figures)
    md_path = folder / "report.md"
    md_path.write_text(md, encoding="utf-8")
    return {"html": html_path, "markdown": md_path, "figures": figures}
