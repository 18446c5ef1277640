"""The answer first: what a study run found, and how to write it up.

:func:`study_findings` reads a run's :class:`~bayeslong.workflow.results.StudyResults` and
states, in a few sentences and as plain data (for ``bayeslong run --json``):

- which model predicts best by PSIS-LOO and by leave-future-out, read by the two-standard-
  error rule (a difference smaller than two standard errors of the difference is no clear
  preference; common practice, Sivula, Magnusson & Vehtari 2020);
- the lag in that model with its 90% interval (5th to 95th percentile of the draws);
- the lag's range over the sensitivity settings that were run;
- which fits are flagged (non-convergence first);
- the caution: prediction is not causation, and the lag is conditional on its model.

:func:`manuscript_text` writes a methods paragraph and a results paragraph a researcher can
adapt, with the references of the methods that were actually used. Everything is read from
the run (the fits' own draws, chains and sampler, the comparison and sensitivity tables),
not from the study file's wishes: a step that did not run is not described as run.

The report (:mod:`bayeslong.workflow.report`) renders both through :func:`add_findings` and
:func:`add_manuscript_text`, which write to its document (anything with ``heading``,
``para`` and ``items`` methods).
"""

from __future__ import annotations

import math

from bayeslong.evaluate.comparison import SE_RULE
from bayeslong.workflow.results import table_of

__all__ = ["study_findings", "manuscript_text", "add_findings", "add_manuscript_text",
           "REFERENCES"]

#: Interval reported for the lag: the central 90% of the posterior draws.
INTERVAL = (0.05, 0.95)

#: z for a 90% Wald interval of a maximum-likelihood estimate.
Z90 = 1.6448536269514722

CAUTION = ("Prediction is not causation: a model that predicts better has not shown that its "
           "lag is a causal carry-over effect (the lag can stand in for stable differences or "
           "omitted time-varying causes). The lag is conditional on the model it is estimated "
           "in: other models of the same data give other lags.")

#: The published sources of the methods a run can use, by key.
REFERENCES = {
    "nuts": "Hoffman, M. D. & Gelman, A. (2014). The No-U-Turn sampler: adaptively setting path "
            "lengths in Hamiltonian Monte Carlo. Journal of Machine Learning Research 15, "
            "1593-1623.",
    "rhat": "Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. & Bürkner, P.-C. (2021). "
            "Rank-normalization, folding, and localization: an improved R-hat for assessing "
            "convergence of MCMC. Bayesian Analysis 16(2), 667-718. doi:10.1214/20-BA1221",
    "loo": "Vehtari, A., Gelman, A. & Gabry, J. (2017). Practical Bayesian model evaluation using "
           "leave-one-out cross-validation and WAIC. Statistics and Computing 27, 1413-1432. "
           "doi:10.1007/s11222-016-9696-4",
    "waic": "Watanabe, S. (2010). Asymptotic equivalence of Bayes cross validation and widely "
            "applicable information criterion in singular learning theory. Journal of Machine "
            "Learning Research 11, 3571-3594.",
    "stacking": "Yao, Y., Vehtari, A., Simpson, D. & Gelman, A. (2018). Using stacking to average "
                "Bayesian predictive distributions. Bayesian Analysis 13(3), 917-1007. "
                "doi:10.1214/17-BA1091",
    "se_rule": "Sivula, T., Magnusson, M. & Vehtari, A. (2020). Uncertainty in Bayesian "
               "leave-one-out cross-validation based model comparison. arXiv:2008.10296",
    "lfo": "Bürkner, P.-C., Gabry, J. & Vehtari, A. (2020). Approximate leave-future-out "
           "cross-validation for Bayesian time series models. Journal of Statistical Computation "
           "and Simulation 90(14), 2499-2523. doi:10.1080/00949655.2020.1783262",
    "psens": "Kallioinen, N., Paananen, T., Bürkner, P.-C. & Vehtari, A. (2023). Detecting and "
             "diagnosing prior and likelihood sensitivity with power-scaling. Statistics and "
             "Computing 34, 57. doi:10.1007/s11222-023-10366-5",
    "ppc": "Gelman, A., Meng, X.-L. & Stern, H. (1996). Posterior predictive assessment of model "
           "fitness via realized discrepancies. Statistica Sinica 6(4), 733-760.",
    "fiml": "Arbuckle, J. L. (1996). Full information estimation in the presence of incomplete "
            "data. In G. A. Marcoulides & R. E. Schumacker (eds.), Advanced Structural Equation "
            "Modeling, 243-277. Mahwah, NJ: Erlbaum.",
    "latent": "Muthén, B. (1984). A general structural equation model with dichotomous, ordered "
              "categorical, and continuous latent variable indicators. Psychometrika 49(1), "
              "115-132. doi:10.1007/BF02294210",
    "marginal": "Merkle, E. C., Furr, D. & Rabe-Hesketh, S. (2019). Bayesian comparison of "
                "latent variable models: conditional versus marginal likelihoods. Psychometrika "
                "84(3), 802-829. doi:10.1007/s11336-019-09679-0",
    "aic": "Akaike, H. (1974). A new look at the statistical model identification. IEEE "
           "Transactions on Automatic Control 19(6), 716-723. doi:10.1109/TAC.1974.1100705",
    "invariance": "Meredith, W. (1993). Measurement invariance, factor analysis and factorial "
                  "invariance. Psychometrika 58(4), 525-543. doi:10.1007/BF02294825",
    "lr": "Wilks, S. S. (1938). The large-sample distribution of the likelihood ratio for testing "
          "composite hypotheses. Annals of Mathematical Statistics 9(1), 60-62. "
          "doi:10.1214/aoms/1177732360",
}


# --------------------------------------------------------------------------------------------
# reading the run
# --------------------------------------------------------------------------------------------


def _num(x, digits: int = 2) -> str:
    return f"{x:.{digits}f}" if isinstance(x, (int, float)) and math.isfinite(x) else "n/a"


def _ranking(table, diff: str, dse: str, score: str) -> dict | None:
    """Best model and, for each other, its distance in standard errors of the difference."""
    if table is None or score not in table.columns or len(table) < 1:
        return None
    best = str(table[score].idxmax())
    others = []
    for label, row in table.iterrows():
        if str(label) == best:
            continue
        d, se = abs(float(row[diff])), float(row[dse])
        clear = bool(math.isfinite(d) and math.isfinite(se) and d >= SE_RULE * se and d > 0)
        others.append({"model": str(label), "diff": d, "dse": se, "clear": clear})
    return {"model": best, "score": float(table.loc[best, score]), "others": others,
            "clear": bool(others) and all(o["clear"] for o in others)}


def _ranking_text(rank: dict, what: str) -> str:
    if not rank["others"]:
        return f"{rank['model']} is the only model scored {what}."
    clear = [o for o in rank["others"] if o["clear"]]
    unclear = [o for o in rank["others"] if not o["clear"]]

    def listed(items):
        return "; ".join(f"{o['model']} (difference {_num(o['diff'], 1)}, SE {_num(o['dse'], 1)})"
                         for o in items)

    text = f"{rank['model']} predicts best {what}"
    if clear and not unclear:
        return text + f", clearly better than every other model: {listed(clear)}."
    parts = [f"clearly better than {listed(clear)}"] if clear else []
    parts.append(f"not clearly better than {listed(unclear)}")
    return (text + ", " + ", but ".join(parts) + f": a difference smaller than {SE_RULE:g} "
            "standard errors of the difference is no clear preference.")


def _lag_of(m, panel) -> dict | None:
    """The lag of one candidate: posterior mean and 90% interval, or the ML estimate."""
    import numpy as np

    from bayeslong.evaluate.sensitivity import lag_parameter

    spec = m.candidate.spec
    name = lag_parameter(spec, panel.outcomes)
    if name is None:
        return None
    off = float(spec.lag_offset)
    shown = name if not off else f"{off:g} + {name}"
    if m.fit is not None and name in m.fit.idata.posterior:
        x = np.asarray(m.fit.idata.posterior[name].values, dtype=float).ravel() + off
        lo, hi = np.quantile(x, INTERVAL)
        return {"model": m.label, "parameter": shown, "mean": float(x.mean()),
                "low": float(lo), "high": float(hi), "kind": "posterior"}
    if m.ml is not None and name in m.ml["table"].index:
        est, se = float(m.ml["table"].loc[name, "estimate"]) + off, float(m.ml["table"].loc[name, "se"])
        return {"model": m.label, "parameter": shown, "mean": est, "low": est - Z90 * se,
                "high": est + Z90 * se, "kind": "maximum likelihood"}
    return None


def _lag_text(lag: dict, leader: str | None = None) -> str:
    what = ("posterior mean" if lag["kind"] == "posterior" else "maximum-likelihood estimate")
    interval = "90% interval" if lag["kind"] == "posterior" else "90% Wald interval"
    where = f"The lag in {lag['model']}"
    if leader and leader != lag["model"]:
        where = (f"{leader}, the best-predicting model, has no constant lag; in "
                 f"{lag['model']}, the next candidate with one, the lag")
    if lag["parameter"] != "lag":  # e.g. lag[y<-y], or 1 + proportional_change
        where += f" ({lag['parameter']})"
    return (f"{where}: {what} {_num(lag['mean'])}, "
            f"{interval} {_num(lag['low'])} to {_num(lag['high'])}.")


def _sensitivity_range(step) -> dict | None:
    table = table_of(step.value) if step.ran else None
    if table is None or "mean" not in table.columns:
        return None
    rows = table[table["axis"] != "power-scaling"]
    if not len(rows):
        return None
    flagged = rows[rows["flag"]] if "flag" in rows else rows.iloc[:0]
    ps = table[table["axis"] == "power-scaling"]
    return {"settings": int(len(rows)), "axes": sorted(set(map(str, rows["axis"]))),
            "low_mean": float(rows["mean"].min()), "high_mean": float(rows["mean"].max()),
            "low": float(rows["q5"].min()), "high": float(rows["q95"].max()),
            "flagged": [f"{a}: {s}" for a, s in zip(flagged["axis"], flagged["setting"])],
            "power_scaling": [f"{s} {float(v):.3f}" + (" (flagged)" if f else "")
                              for s, v, f in zip(ps["setting"], ps["psens"], ps["flag"])],
            "psens_threshold": _psens_threshold(),
            "reference": str(getattr(step.value, "reference", ""))}


def _psens_threshold() -> float:
    from bayeslong.evaluate.sensitivity import PSENS_THRESHOLD

    return float(PSENS_THRESHOLD)


def study_findings(results) -> dict:
    """What the run found, as plain data (JSON safe) with the sentences under ``"text"``.

    Keys: ``best_loo`` and ``best_lfo`` (the best model, its score and each other model's
    difference, SE of the difference and whether it is clear; None when not run),
    ``best_aic`` (maximum-likelihood runs), ``lag`` (model, parameter, mean, low, high),
    ``lag_range`` (over the sensitivity settings), ``flagged`` (model -> problems),
    ``measured`` (process -> indicators, for processes measured by several),
    ``caution`` and ``text`` (the sentences, in reading order).
    """
    comp = table_of(results.comparison.value) if results.comparison.ran else None
    bayes = results.method == "bayes"
    best_loo = _ranking(comp, "elpd_diff", "dse", "elpd_loo") if bayes else None
    lfo = table_of(results.future.value) if results.future.ran else None
    best_lfo = _ranking(lfo, "lfo_diff", "lfo_dse", "elpd_lfo") if bayes else None
    best_aic = None
    if not bayes and comp is not None and "aic" in comp.columns:
        neg = comp.assign(neg_aic=-comp["aic"])
        best_aic = _ranking(neg, "d_aic", "d_aic", "neg_aic")
        best_aic["others"] = [{**o, "clear": o["diff"] >= 2.0} for o in best_aic["others"]]
    text = []
    if best_loo is not None:
        text.append(_ranking_text(best_loo, "a new unit's trajectory (PSIS-LOO)"))
    elif best_aic is not None:
        text.append(f"{best_aic['model']} has the lowest AIC (maximum likelihood only; no "
                    "posterior comparison was made).")
    else:
        text.append("No comparison of the candidates: " + (results.comparison.reason or
                                                            "fewer than two fitted models") + ".")
    if best_lfo is not None:
        text.append(_ranking_text(best_lfo, "the last wave from the earlier ones "
                                            "(leave-future-out)"))
    by_label = {m.label: m for m in results.models}
    leader = (best_loo or best_aic or {}).get("model")
    order = ([leader] if leader else []) + [m.label for m in results.models if m.label != leader]
    lag = None
    for label in order:
        lag = _lag_of(by_label[label], results.panel) if label in by_label else None
        if lag is not None:
            break
    if lag is not None:
        text.append(_lag_text(lag, leader))
    else:
        text.append("No fitted candidate has a constant lag to report.")
    measured = {str(p): [str(n) for n in g] for p, g in results.panel.indicators.items()
                if g != (p,)}
    if measured:
        level = by_label[lag["model"]].candidate.spec.measurement["invariance"] if lag else None
        text.append("Latent outcomes: " + "; ".join(f"{p} measured by {', '.join(g)}"
                                                   for p, g in measured.items())
                    + (f". The lag is the latent's, at {level} invariance" if level else "")
                    + ". The Measurement section tests the invariance levels by maximum "
                    "likelihood and shows the lag at each level (ML tests beside the posterior, "
                    "not part of it).")
    spread = _sensitivity_range(results.sensitivity)
    if spread is not None:
        line = (f"Over the {spread['settings']} sensitivity settings ({', '.join(spread['axes'])}; "
                f"around {spread['reference']}) the lag's posterior mean ranges from "
                f"{_num(spread['low_mean'])} to {_num(spread['high_mean'])}, its 90% intervals "
                f"from {_num(spread['low'])} to {_num(spread['high'])}")
        line += (f"; {len(spread['flagged'])} setting(s) move it materially: "
                 + "; ".join(spread["flagged"]) + "." if spread["flagged"]
                 else "; no setting moves it materially.")
        if spread["power_scaling"]:
            line += (f" Power-scaling sensitivity of the lag (flagged at "
                     f"{spread['psens_threshold']:g} or more): "
                     + ", ".join(spread["power_scaling"]) + ".")
        text.append(line)
    elif results.sensitivity.reason:
        text.append(f"Lag sensitivity not run: {results.sensitivity.reason}.")
    flagged = {m.label: list(m.problems) for m in results.models if m.problems}
    lfo_problems = dict(comp.attrs.get("lfo_problems", {})) if comp is not None else {}
    failed = [m.label for m in results.models if bayes and m.fit is None]
    if flagged:
        text.append("NOT CONVERGED: " + ", ".join(flagged) + " did not converge by the stated "
                    "criteria; do not interpret these models until that is resolved (see the "
                    "model sections).")
    if lfo_problems:
        text.append("The leave-future-out refit(s) of " + ", ".join(lfo_problems)
                    + " did not converge; their leave-future-out scores are uncertain.")
    if failed:
        text.append("No posterior for: " + ", ".join(failed) + ".")
    if not (flagged or lfo_problems or failed) and results.models:
        text.append("No fit is flagged: every fit passed the convergence checks.")
    return {"best_loo": best_loo, "best_lfo": best_lfo, "best_aic": best_aic, "lag": lag,
            "lag_range": spread, "flagged": flagged, "lfo_flagged": lfo_problems,
            "no_posterior": failed, "measured": measured, "caution": CAUTION, "text": text}


# --------------------------------------------------------------------------------------------
# methods and results text
# --------------------------------------------------------------------------------------------


def prior_text(prior) -> str:
    """A prior override as the report writes it: family(arguments), or the pooling's tau."""
    family, *args = prior
    if not isinstance(family, str) or (family == "off" and not args):  # residual_pooling
        return f"tau {family:g}" if not isinstance(family, str) else "off"
    return f"{family}({', '.join(f'{a:g}' for a in args)})"


def _sampling_facts(results) -> dict | None:
    """Chains, draws, samplers and worst diagnostics of the run's fits, read from the fits."""
    fits = [m.fit for m in results.models if m.fit is not None]
    if not fits:
        return None
    rhat, ess, div, thresholds = 0.0, math.inf, 0, {}
    # a re-run fit has more draws per chain than asked for (infer/sampling.py, the careful
    # re-run): the draws asked for are read from a fit that was not re-run
    again = [f for f in fits if getattr(f, "rerun", "")]
    first = [f for f in fits if not getattr(f, "rerun", "")]
    plain = first or fits
    for f in fits:
        try:
            d = f.diagnostics()
        except Exception:  # a stand-in fit without draws: say nothing about it
            continue
        rhat = max(rhat, float(d["r_hat"].max()))
        ess = min(ess, float(d[["ess_bulk", "ess_tail"]].min().min()))
        div += int(d.attrs.get("divergences", 0) or 0)
        thresholds = d.attrs.get("thresholds", {})
    post = plain[0].idata.posterior
    return {"chains": int(post.sizes["chain"]), "draws": int(post.sizes["draw"]),
            "rerun_draws": int(again[0].idata.posterior.sizes["draw"]) if again else None,
            "samplers": sorted({str(getattr(f, "sampler", "") or "") for f in fits} - {""}),
            "accepts": sorted({float(a) for a in (getattr(f, "target_accept", None) for f in first)
                               if a is not None}),
            "max_rhat": rhat, "min_ess": ess, "divergences": div,
            "thresholds": thresholds, "fits": len(fits), "reruns": len(again)}


def manuscript_text(results, findings: dict | None = None) -> dict:
    """A methods paragraph, a results paragraph and the references they cite.

    Returns ``{"methods": str, "results": str, "references": [str]}``, written from what
    the run did (models, priors, sampler settings and diagnostics, comparison, sensitivity).
    """
    f = findings or study_findings(results)
    study, panel = results.study, results.panel
    cites: list[str] = []

    def cite(key: str, short: str) -> str:
        if key not in cites:
            cites.append(key)
        return short

    labels = "; ".join(
        (f"{m.label} ({m.candidate.spec.name}: " if m.label != m.candidate.spec.name
         else f"{m.label} (") + m.candidate.spec.description.rstrip(".") + ")"
        for m in results.models)
    m = [f"We analysed {panel.n_units} units over {panel.n_waves} equally spaced waves "
         f"(outcome{'s' if len(panel.outcomes) > 1 else ''} {', '.join(map(str, panel.outcomes))}"
         + (f"; time-varying covariates {', '.join(map(str, panel.time_varying))}"
            if panel.time_varying else "")
         + (f"; time-invariant covariates {', '.join(map(str, panel.time_invariant))}"
            if panel.time_invariant else "") + ")."]
    m.append(f"We compared {len(results.models)} candidate model(s): {labels}.")
    if f.get("measured"):
        levels = sorted({x.candidate.spec.measurement["invariance"] for x in results.models})
        scales = {x.candidate.spec.measurement["scale"] for x in results.models}
        scaled = {frozenset({"marker"}): "its marker indicator (loading 1, intercept 0 at the "
                                         "first wave)",
                  frozenset({"effects"}): "effects coding (loadings averaging 1, intercepts "
                                          "summing to 0)"}.get(frozenset(scales),
                                                               "its marker indicator or by "
                                                               "effects coding, by model")
        m.append("Each of " + "; ".join(f"{p} (indicators {', '.join(g)})"
                                       for p, g in f["measured"].items())
                 + f" was a latent variable at every wave, scaled by {scaled}, with "
                 + " or ".join(levels)
                 + " invariance over waves " + cite("invariance", "(Meredith 1993)")
                 + "; the invariance levels were compared by maximum-likelihood ratio tests "
                 + cite("lr", "(Wilks 1938)") + " with AIC and BIC beside them.")
    categories = getattr(panel, "categories", None) or {}
    if categories:
        kinds = ", ".join(f"{v} ({'binary' if len(c) == 2 else f'ordinal, {len(c)} categories'})"
                          for v, c in categories.items())
        m.append(f"Categorical variables, {kinds}, were modelled as latent responses cut at "
                 "thresholds " + cite("latent", "(Muthén 1984)") + ", with every unit's latent "
                 "variables sampled; model comparison used each unit's marginal likelihood, "
                 "the latents integrated out " + cite("marginal", "(Merkle, Furr & "
                                                      "Rabe-Hesketh 2019)") + ".")
    m.append("Missing outcomes entered through the full-information likelihood under missing at "
             "random " + cite("fiml", "(Arbuckle 1996)") + ", with covariates treated as fixed.")
    facts = _sampling_facts(results) if results.method == "bayes" else None
    if facts is not None:
        over = "; ".join(f"{k} ~ {prior_text(v)}" for k, v in study.priors.items())
        m.append("Every parameter had a weakly informative default prior scaled to the data "
                 "(listed per model in the supplementary report)"
                 + (f", except the prior(s) set for this study: {over}" if over else "") + ".")
        samplers = " and ".join(
            {"nutpie": f"nutpie {results.versions.get('nutpie', '')}".strip(),
             "pymc": f"PyMC {results.versions.get('pymc', '')}".strip()}.get(s, s)
            for s in facts["samplers"]) or "NUTS"
        t = facts["thresholds"]
        m.append("Posteriors were sampled with the No-U-Turn sampler "
                 + cite("nuts", "(Hoffman & Gelman 2014)") + f" in {samplers}: "
                 f"{facts['chains']} chains of {facts['draws']} draws after "
                 f"{study.sampling['tune']} warm-up iterations each (seed {study.sampling['seed']}"
                 + (f", target acceptance rate {' and '.join(f'{a:g}' for a in facts['accepts'])}"
                    if facts["accepts"] else "") + "). "
                 "Convergence was judged by rank-normalised R-hat below "
                 f"{t.get('r_hat', 1.01)} and bulk and tail effective sample sizes above "
                 f"{t.get('ess_bulk', 400)} " + cite("rhat", "(Vehtari et al. 2021)")
                 + ", no divergent transitions and E-BFMI above " f"{t.get('ebfmi', 0.3)}.")
        if facts["reruns"]:
            m.append(f"The sampler's target acceptance rate was 0.8; {facts['reruns']} of the "
                     f"{facts['fits']} candidate fits failed a convergence check at 0.8 and were "
                     f"sampled again at 0.95 with {facts['rerun_draws']} draws per chain, and "
                     "that second run is the one reported.")
    elif results.method != "bayes":
        m.append("The models were fitted by maximum likelihood only (no posterior sampling).")
    if f["best_loo"] is not None:
        m.append("Models were compared by the expected log predictive density of a left-out "
                 "unit, estimated by Pareto-smoothed importance sampling leave-one-out "
                 "cross-validation (PSIS-LOO) " + cite("loo", "(Vehtari, Gelman & Gabry 2017)")
                 + ", with WAIC " + cite("waic", "(Watanabe 2010)") + " and stacking weights "
                 + cite("stacking", "(Yao et al. 2018)") + f" beside it; a difference smaller "
                 f"than {SE_RULE:g} standard errors of the difference was read as no clear "
                 "preference " + cite("se_rule", "(Sivula, Magnusson & Vehtari 2020)") + ".")
    elif f["best_aic"] is not None:
        m.append("Models were compared by AIC " + cite("aic", "(Akaike 1974)") + ".")
    if f["best_lfo"] is not None:
        m.append("Each model was also refitted on all waves but the last and scored on its "
                 "prediction of each unit's last wave from the earlier ones (exact one-step "
                 "leave-future-out, " + cite("lfo", "Bürkner, Gabry & Vehtari 2020") + ").")
    checks = [x for x in results.models if x.check.ran]
    if checks:
        m.append("Posterior predictive checks compared "
                 + ("the categories' shares per wave and the transitions between consecutive "
                    "waves" if categories else "wave means, SDs and lag-1 correlations")
                 + " of the data with replicated data " + cite("ppc", "(Gelman, Meng & Stern 1996)")
                 + ".")
    spread = f["lag_range"]
    if spread is not None:
        axes = [a for a in spread["axes"] if a != "default"]
        m.append(f"The sensitivity of the lag was assessed over {spread['settings']} settings "
                 f"around {spread['reference']} ({', '.join(axes) or 'the default only'}; a "
                 "setting equal to a candidate's fit read from it, the others refitted), each "
                 "starting from the study's priors")
        if spread["power_scaling"]:
            m[-1] += (", and by prior and likelihood power-scaling "
                      + cite("psens", "(Kallioinen et al. 2023)"))
        m[-1] += "."
    r = [line for line in f["text"] if not line.startswith(("No fit is flagged", "NOT CONVERGED"))]
    if f["flagged"]:
        r.append("The fit(s) of " + ", ".join(f["flagged"]) + " did not meet these convergence "
                 "criteria (" + "; ".join(p for ps in f["flagged"].values() for p in ps)
                 + "), so their estimates are not interpreted.")
    if facts is not None:
        r.append(f"Across the fits the largest R-hat was {_num(facts['max_rhat'], 3)} and the "
                 f"smallest effective sample size {_num(facts['min_ess'], 0)}, with "
                 f"{facts['divergences']} divergent transition(s) after warm-up.")
    r.append(CAUTION)
    return {"methods": " ".join(m), "results": " ".join(r),
            "references": sorted(REFERENCES[k] for k in cites)}


# --------------------------------------------------------------------------------------------
# into the report
# --------------------------------------------------------------------------------------------


def add_findings(doc, results, findings: dict | None = None) -> dict:
    """The report's first section: the answer, flags said loudly, then the caution."""
    f = findings or study_findings(results)
    doc.heading("Findings", 2, "findings")
    problems = [(label, p) for label, ps in f["flagged"].items() for p in ps]
    if problems:
        doc.para("Convergence problems: do not interpret the affected models until they are "
                 "resolved (more tuning or draws, stronger priors, or a simpler model).", "bad")
        doc.items([f"{label}: {p}" for label, p in problems], "bad")
    for line in f["text"]:
        if problems and line.startswith("NOT CONVERGED"):
            continue  # the banner above says it, with each problem
        loud = line.startswith("NOT CONVERGED") or line.startswith("No posterior")
        doc.para(line, "bad" if loud else ("warn" if "did not converge" in line else ""))
    doc.para(f["caution"], "note")
    return f


def add_manuscript_text(doc, results, findings: dict | None = None) -> None:
    """Methods and results paragraphs to adapt for a manuscript, with their references."""
    text = manuscript_text(results, findings)
    doc.heading("Methods and results text", 2, "manuscript")
    doc.para("Written from what this run did; adapt it to your manuscript and check every "
             "number against the sections above.", "note")
    doc.heading("Methods", 3)
    doc.para(text["methods"])
    doc.heading("Results", 3)
    doc.para(text["results"])
    if text["references"]:
        doc.heading("References", 3)
        doc.items(text["references"])
