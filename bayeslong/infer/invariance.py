"""Measurement invariance over waves by maximum likelihood: nested levels and their tests.

The levels configural, metric, scalar and strict (Meredith 1993; Widaman & Reise 1997) add
equalities over waves one part at a time (loadings, intercepts, unique variances; see
docs/model-family.md), so each is nested in the one before it. :func:`compare_invariance`
fits the same model at each level and tests each against the less restricted one before it
by the likelihood ratio, with AIC and BIC beside it.

The likelihood-ratio statistic 2 (loglik_less - loglik_more) has a chi-square reference
with as many degrees of freedom as the restrictions added, when the less restricted model
holds and no parameter sits on its boundary (Wilks 1938). Equalities of loadings,
intercepts and unique variances are interior restrictions, so the reference applies;
with large N small misfits reach significance, which is why AIC and BIC stand beside it.

References
----------
Meredith, W. (1993). Measurement invariance, factor analysis and factorial invariance.
Psychometrika 58(4), 525-543. doi:10.1007/BF02294825
Widaman, K. F. & Reise, S. P. (1997). Exploring the measurement invariance of psychological
instruments. In K. J. Bryant et al. (eds.), The Science of Prevention, 281-324. APA.
Wilks, S. S. (1938). The large-sample distribution of the likelihood ratio for testing
composite hypotheses. Annals of Mathematical Statistics 9(1), 60-62.
doi:10.1214/aoms/1177732360
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from bayeslong.data.panel import check_panel
from bayeslong.errors import SpecError
from bayeslong.infer.ml import fit_ml
from bayeslong.model.identification import identify
from bayeslong.model.spec import INVARIANCE_LEVELS, check_spec
from bayeslong.model.structure import structure_for


def compare_invariance(spec, panel, *, levels=INVARIANCE_LEVELS, starts: int = 4,
                       seed: int = 0) -> pd.DataFrame:
    """Fit ``spec`` at nested invariance levels and test each against the one before it.

    Parameters
    ----------
    spec : Spec
        The model; its ``invariance`` option is replaced by each level in turn (its
        ``release``, ``marker`` and ``unique_covariance`` are kept).
    panel : Panel
        A panel with at least one process measured by several indicators.
    levels : sequence of str, default all four
        Levels to fit, from configural, metric, scalar, strict; they are put in that order.
    starts, seed : int
        Passed to :func:`bayeslong.fit_ml`.

    Returns
    -------
    pandas.DataFrame
        One row per level (index ``invariance``): ``n_params``, ``loglik``, ``aic``,
        ``bic``, and against the previous fitted level ``lr`` (twice the log-likelihood
        difference), ``df`` (restrictions added) and ``p_value`` (chi-square); ``note``
        names the parameters of a level that is not identified with this model's
        structural part (its other columns are then empty; below scalar invariance a model
        with growth means is such a case: compare the levels with ``waves-apart`` first).
        A level whose maximum sits on the boundary (a variance at zero) says so in ``note``
        and names the parameters. Then, for a model with lags, each lag parameter's ML estimate at that level and its
        standard error (columns ``lag`` and ``lag se``, ``lag[y<-x]`` and ``lag[y<-x] se``
        ...): how the lag moves with the measurement assumptions.

    Raises
    ------
    SpecError
        An unknown level, or a panel whose processes each have a single indicator.
    """
    spec, panel = check_spec(spec), check_panel(panel)
    if not panel.has_indicators or all(len(g) == 1 for g in panel.indicators.values()):
        raise SpecError("compare_invariance needs a process measured by several indicators; build "
                        "the panel with outcomes={'process': ['item1', 'item2', 'item3']}")
    levels = [levels] if isinstance(levels, str) else list(levels)
    for level in levels:
        if level not in INVARIANCE_LEVELS:
            raise SpecError(f"`levels` holds {level!r}; levels are {', '.join(INVARIANCE_LEVELS)}")
    rows, previous = [], None
    for level in [lv for lv in INVARIANCE_LEVELS if lv in levels]:
        s = spec.replace(invariance=level)
        row = {"invariance": level, "n_params": np.nan, "loglik": np.nan, "aic": np.nan,
               "bic": np.nan, "lr": np.nan, "df": np.nan, "p_value": np.nan, "note": ""}
        ident = identify(s, panel)
        if not ident.identified:
            row["note"] = "not identified: " + ", ".join(ident.deficient)
            rows.append(row)
            continue
        fit = fit_ml(s, panel, starts=starts, seed=seed, check=False)
        row.update(n_params=fit.n_params, loglik=fit.loglik, aic=fit.aic, bic=fit.bic)
        structure = structure_for(s, panel)
        kinds = dict(zip(structure.names, structure.kinds))
        for name in (n for n in fit.params.index if kinds.get(n) == "lag"):
            row[name], row[f"{name} se"] = float(fit.params[name]), float(fit.se[name])
        if not fit.converged:
            row["note"] = "did not converge"
        if fit.boundary:
            row["note"] = "; ".join(filter(None, [row["note"], "on the boundary (no valid SE): "
                                                  + ", ".join(fit.boundary)]))
        if previous is not None:
            lr = 2.0 * (previous.loglik - fit.loglik)
            df = previous.n_params - fit.n_params
            row.update(lr=lr, df=df, p_value=float(stats.chi2.sf(max(lr, 0.0), df)) if df > 0
                       else np.nan)
        previous = fit
        rows.append(row)
    return pd.DataFrame(rows).set_index("invariance")
