"""The report's parts for categorical variables: categories, thresholds, share checks,
and the draws power-scaling of the lag sensitivity ran on.

:mod:`bayeslong.workflow.report` calls these for a study whose panel has binary or ordinal
variables (docs/model-family.md, "Categorical indicators"); each adds blocks to the report's
document through its ``heading``, ``para``, ``table`` and ``figure`` methods.
"""

from __future__ import annotations

import pandas as pd

from bayeslong.workflow.results import slug


def add_categories(doc, panel) -> None:
    """The categorical variables, their categories in order and their shares over all waves."""
    rows = []
    names = list(panel.observed_names)
    for v, cats in panel.categories.items():
        y = panel.y[:, :, names.index(v)]
        seen = y[~pd.isna(y)]
        shares = [float((seen == c).mean()) for c in range(len(cats))]
        rows.append({"variable": v, "kind": "binary" if len(cats) == 2 else "ordinal",
                     "categories, lowest first": ", ".join(map(str, cats)),
                     "share of each (all waves)": ", ".join(f"{s:.2f}" for s in shares)})
    doc.table(pd.DataFrame(rows).set_index("variable"),
              "Categorical variables. The trajectory figure above shows their categories as "
              "positions 0, 1, ... in this order; the models treat each as a latent response "
              "cut at thresholds (docs/model-family.md, 'Categorical indicators')")


def threshold_table(fit) -> pd.DataFrame:
    """Posterior of each threshold beside the categories it separates (fixed cuts included)."""
    cat, panel = fit.categorical, fit.panel
    summary = fit.summary()
    rows = []
    for v in cat.variables:
        labels = list(panel.categories[v])
        table = cat.cuts[v]  # (T, C-1): position in cat.thresholds, or -1 for the fixed 0
        seen = set()
        for c in range(table.shape[1]):
            for t in range(table.shape[0]):
                k = int(table[t, c])
                name = cat.thresholds[k] if k >= 0 else f"threshold[{v},1]"
                if name in seen:
                    continue
                seen.add(name)
                row = {"threshold": name, "variable": v,
                       "between": f"{labels[c]} | {labels[c + 1]}",
                       "waves": "all" if (table[:, c] == k).all() else str(panel.waves[t])}
                if k < 0:
                    row.update({"mean": 0.0, "sd": 0.0, "note": "fixed at 0 (location)"})
                else:
                    s = summary.loc[name]
                    row.update({"mean": s["mean"], "sd": s["sd"],
                                **{c_: s[c_] for c_ in summary.columns if c_.startswith("hdi_")},
                                "r_hat": s.get("r_hat"), "note": s.get("flag", "") or ""})
                rows.append(row)
    frame = pd.DataFrame(rows).set_index("threshold")
    last = [c for c in ("r_hat", "note") if c in frame.columns]
    return frame[[c for c in frame.columns if c not in last] + last]


def add_thresholds(doc, fit) -> None:
    """The threshold table of a categorical fit, with how to read it."""
    try:
        table = threshold_table(fit)
    except Exception as err:  # a display helper must not stop the report; say what happened
        doc.para(f"Threshold table not shown: {type(err).__name__}: {err}.", "warn")
        return
    link = fit.categorical.link
    doc.table(table, f"Thresholds on the latent response scale ({link} link: the response's "
              f"error has variance {fit.categorical.error_variance:.3g}). A category is observed "
              "when the latent response lies between the thresholds around it; the first cut of "
              "each variable is fixed at 0 and sets the origin")


def add_category_checks(doc, label: str, value: dict) -> None:
    """Category shares per wave (figure and flags) and flagged transitions of one candidate."""
    shares, moves = value.get("shares"), value.get("transitions")
    if shares is not None and len(shares):
        try:
            from bayeslong.evaluate.plots import plot_category_shares

            doc.figure(plot_category_shares(shares), f"category-shares-{slug(label)}",
                       f"{label}: each category's share of the units observed at each wave "
                       "against its replicated 50% and 90% bands")
        except Exception as err:  # a figure must not stop the report; say what happened
            doc.para(f"Figure not drawn (category shares): {type(err).__name__}: {err}.", "warn")
    for table, what in ((shares, "category shares per wave"),
                        (moves, "transition counts between consecutive waves")):  # flags
        if table is None or not len(table):
            continue
        flagged = table[table["flag"]]
        if len(flagged):
            doc.para(f"{len(flagged)} of {len(table)} {what} fall in the outer 5% tails of "
                     "their replicated distribution (two-sided, so about a tenth of many "
                     "cells would by chance alone even under a true model):", "warn")
            doc.table(flagged.set_index("variable"), f"Flagged {what}")
        else:
            doc.para(f"None of the {len(table)} {what} falls in the outer 5% tails. That is "
                     "no proof of fit: predictive p-values are conservative.")
    stayed = value.get("stayed")
    if stayed is not None and len(stayed):
        doc.table(stayed.set_index("variable"), "Units that stayed in their category from the "
                  "previous wave: observed count against its replicated distribution")


def add_power_scaling_note(doc, sensitivity) -> None:
    """On how many draws power-scaling of a categorical fit ran: those that carry the
    marginal log-likelihood (docs/comparison.md, "Lag sensitivity with categorical
    variables"); nothing when power-scaling did not run."""
    ps = getattr(sensitivity, "power_scaling", None)
    if ps is not None and len(ps) and "draws" in ps.attrs:
        doc.para(f"Power-scaling of the default fit is computed on its {ps.attrs['draws']} "
                 "draws that carry the marginal log-likelihood (loglik_draws, thinned evenly "
                 "within each chain), not on every draw.", "note")
