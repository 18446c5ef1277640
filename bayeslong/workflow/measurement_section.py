"""The report's measurement section, for studies with processes measured by several indicators.

For a single process, first the invariance levels in the unlinked-waves model
(``waves-apart``), where every level is identified and can be tested free of growth and lag.
Then for each candidate: its loadings, intercepts and unique variances by indicator and wave
(posterior means with 90% intervals, or ML estimates when the run made no posterior fits),
the invariance levels compared by maximum likelihood (:func:`bayeslong.compare_invariance`:
likelihood-ratio tests, AIC, BIC), and the lag's ML estimate at each level. Then what the
likelihood-ratio tests can and cannot show, and the latent trajectories of a few units
beside their indicators (:func:`bayeslong.evaluate.plots.plot_latent_scores`).

The ML fits of the invariance levels are made while the report is rendered: they take a
fraction of a second each (docs/engine.md, "Maximum likelihood") and are deterministic, so
a re-rendered report shows the same numbers.
"""

from __future__ import annotations

import math
import warnings

import pandas as pd

from bayeslong.errors import BayeslongError
from bayeslong.evaluate.measurement import PARTS, wave_measurement
from bayeslong.infer.invariance import compare_invariance
from bayeslong.model.measurement import nearest_exact
from bayeslong.model.spec import model
from bayeslong.model.structure import structure_for
from bayeslong.workflow.results import slug

#: Significance level of the plain reading of a likelihood-ratio test (common practice).
ALPHA = 0.05
#: Units whose latent trajectories the report draws.
N_SCORE_UNITS = 3
#: Starts of each ML fit of an invariance level: the data-based start alone. A second,
#: random start cost 35 s more in the reading-motivation example (unlinked waves,
#: configural) and reached the same maxima; call bl.compare_invariance with more starts to
#: check a doubtful level.
STARTS = 1

READING = (
    "Each likelihood-ratio test asks whether the equalities a level adds (equal loadings, "
    "then equal intercepts, then equal unique variances over waves) fit worse than chance "
    "alone would make them; the chi-square reference holds for many units, normal "
    "indicators and a correct less restricted model (Wilks 1938).",
    f"A p-value below {ALPHA:g} says those equalities do not hold exactly in these data. It "
    "does not say how large the differences are: with many units small differences reach "
    "significance, so read the by-wave table and AIC/BIC beside it.",
    "A large p-value does not show invariance: with few units the test has little power, and "
    "a level that passes may still hide differences the data cannot resolve.",
    "The tests judge the measurement part given this model's structural part: a misfit of "
    "the growth or lag part can show up as, or hide, a misfit of the measurement. Levels the "
    "model cannot identify (below scalar invariance a model with growth means) are listed "
    "without a test; compare them in the unlinked model (waves-apart) first.",
    "Latent means are comparable over waves only under scalar invariance (full or partial): "
    "below it the indicators' intercepts absorb any change of the latent's mean.",
    "These tests use maximum likelihood on the same data; they are not part of the Bayesian "
    "fit, and choosing a level by them and then reporting the fit at that level is a data-"
    "dependent choice.",
)


def _cell(mean: float, lower=None, upper=None, fixed: bool = False) -> str:
    if fixed:
        return f"{mean:.3g} (fixed)"
    if lower is None or (isinstance(lower, float) and math.isnan(lower)):
        return f"{mean:.3g}"
    return f"{mean:.3g} [{lower:.3g}, {upper:.3g}]"


def measurement_frame(table: pd.DataFrame) -> pd.DataFrame:
    """One text cell per part: mean with its interval, or "(fixed)"; index indicator, wave."""
    rows = {}
    for _, r in table.iterrows():
        key = (r["indicator"], str(r["wave"]))
        rows[key] = {part: _cell(r[part], r.get(f"{part} lower"), r.get(f"{part} upper"),
                                 bool(r.get(f"{part} fixed", False))) for part in PARTS}
    frame = pd.DataFrame.from_dict(rows, orient="index")
    frame.index = pd.MultiIndex.from_tuples(frame.index, names=["indicator", "wave"])
    return frame.reset_index().set_index("indicator")


def _lag_columns(inv: pd.DataFrame) -> list[str]:
    return [c for c in inv.columns if c.startswith("lag") and not c.endswith(" se")]


def lag_reading(inv: pd.DataFrame) -> list[str]:
    """Plain sentences on how each lag moves between the identified levels."""
    out = []
    for name in _lag_columns(inv):
        est = inv[name].dropna()
        if len(est) < 2:
            continue
        se = inv.loc[est.index, f"{name} se"]
        spread = float(est.max() - est.min())
        levels = ", ".join(f"{lvl} {v:.3f} (SE {s:.3f})" for lvl, v, s in zip(est.index, est, se))
        size = ("less than one standard error: the lag hardly depends on which parts of the "
                "measurement are held equal" if spread < float(se.min()) else
                "one standard error or more: the lag depends on the measurement assumptions, "
                "so report it with the level it was estimated at")
        out.append(f"{name} by level: {levels}. The estimates span {spread:.3f}, {size}.")
    return out


def invariance_reading(inv: pd.DataFrame) -> list[str]:
    """Plain sentences on the tests and information criteria of one comparison."""
    out = []
    tested = inv[inv["p_value"].notna()]
    for level, r in tested.iterrows():
        before = inv.index[inv.index.get_loc(level) - 1]
        verdict = ("worse than chance: these equalities do not hold exactly" if r["p_value"] < ALPHA
                   else "no worse than chance allows (which does not prove them)")
        out.append(f"{level} against {before}: LR {r['lr']:.2f} on {int(r['df'])} df, p = "
                   f"{r['p_value']:.3g}; the added equalities fit {verdict}.")
    fitted = inv[inv["aic"].notna()]
    if len(fitted) >= 2:
        out.append(f"Lowest AIC: {fitted['aic'].idxmin()}; lowest BIC: {fitted['bic'].idxmin()} "
                   "(BIC favours the more restricted level more strongly as N grows).")
    unidentified = [str(level) for level, note in inv["note"].items() if note.startswith("not identified")]
    if unidentified:
        out.append(f"{', '.join(unidentified)}: not identified with this model's structural "
                   "part (the note column names the parameters), so not tested here.")
    return out


def add_measurement_section(doc, results, draw) -> None:
    """Add the measurement section to ``doc`` when some process has several indicators.

    ``draw(doc, name, make, file, caption)`` adds a figure (the report's figure helper).
    """
    panel = results.panel
    if not panel.has_indicators:
        return
    doc.heading("Measurement", 2, "measurement")
    doc.para("Processes measured by several indicators: " + "; ".join(
        f"{p}: {', '.join(map(str, g))}" for p, g in panel.indicators.items() if g != (p,))
        + ". Each is a latent variable per wave; its first listed indicator (or the one named "
        "by `marker`) sets its unit (loading 1) and its origin (intercept 0 at the first wave), "
        "or with `scale = \"effects\"` the indicators' average does. In the within-person form "
        "(ri-clpm) the latent is the within part, whose zero mean at the first wave is the "
        "origin, and each indicator has a random intercept of its own.")
    if len(panel.outcomes) == 1:
        doc.heading("The measurement alone: unlinked waves", 3)
        doc.para("The same indicators in a model with a mean and a variance of its own at every "
                 "wave and nothing linking the waves (waves-apart): every invariance level is "
                 "identified there, so every level can be tested, free of any growth or lag "
                 "structure.")
        _comparison(doc, model("waves-apart"), "unlinked waves", panel,
                    results.study.sampling["seed"])
    shown = False
    for m in results.models:
        spec = m.candidate.spec
        doc.heading(f"{m.label}: measurement", 3)
        table = _table_of(m, panel)
        if table is not None and len(table):
            what = ("posterior mean [90% interval]" if m.fit is not None
                    else "maximum-likelihood estimate")
            level = f"'{spec.measurement['invariance']}'"
            if m.fit is None and nearest_exact(spec)[1]:
                level = f"'scalar' (the nearest exact level to {level})"
            doc.table(measurement_frame(table), f"{m.label}: loadings, intercepts and unique "
                      f"variances by indicator and wave, {what}; invariance {level}")
        _comparison(doc, spec, m.label, panel, results.study.sampling["seed"])
        if m.fit is not None and not shown:
            shown = True
            fit = m.fit
            units = list(panel.units[:N_SCORE_UNITS])
            draw(doc, "latent scores",
                 lambda plots: plots.plot_latent_scores(fit, units, draws=100,
                                                        seed=results.study.sampling["seed"]),
                 f"scores-{slug(m.label)}",
                 f"{m.label}: latent trajectories of {len(units)} units (posterior mean, 90% "
                 "interval) beside their indicators put on the marker's scale, (y - intercept) "
                 "/ loading at the posterior mean")
    doc.para("Reading the invariance tests:", "note")
    doc.items(READING, "note")


def _comparison(doc, spec, label: str, panel, seed) -> None:
    """The invariance comparison of one model, its reading, warnings and the lag by level."""
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            inv = compare_invariance(spec, panel, starts=STARTS, seed=seed)
    except BayeslongError as err:
        doc.para(f"Invariance levels not compared: {err}.", "note")
        return
    cols = ["n_params", "loglik", "aic", "bic", "lr", "df", "p_value", "note"]
    doc.table(inv[cols], f"{label}: invariance levels by maximum likelihood (from the "
              "data-based start), each tested against the level before it")
    doc.items(invariance_reading(inv))
    said = list(dict.fromkeys(str(w.message) for w in caught))
    if said:
        doc.para("Maximum likelihood at some level warned (each warning once):", "warn")
        doc.items(said, "warn")
    if any(inv["note"].str.contains("did not converge")):
        doc.para("A level's maximum-likelihood fit DID NOT CONVERGE: its row and the tests "
                 "next to it are not trustworthy.", "bad")
    lags = _lag_columns(inv)
    if lags:
        frame = inv[[c for name in lags for c in (name, f"{name} se")]].dropna(how="all")
        doc.table(frame, f"{label}: the lag's maximum-likelihood estimate and standard error "
                  "at each invariance level")
        doc.items(lag_reading(inv))


def _table_of(m, panel):
    """The measurement table of a candidate: from its posterior draws, else its ML estimate."""
    structure = structure_for(m.candidate.spec, panel)
    if m.fit is not None:
        return wave_measurement(structure, panel, m.fit.theta_draws())
    if m.ml is not None:  # fitted at the nearest exact invariance level (model/measurement.py)
        structure = structure_for(nearest_exact(m.candidate.spec)[0], panel)
        estimate = m.ml["table"]["estimate"]
        return wave_measurement(structure, panel, estimate.reindex(structure.names).to_numpy())
    return None
