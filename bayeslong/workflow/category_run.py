"""What a study run does differently when the panel has categorical variables.

Candidates are fitted with person-level latents and thresholds (``bl.fit`` dispatches,
infer/fitting.py) and compared by the per-unit marginal LOO and, when asked, by the
marginal probability of the last wave's categories given the earlier waves
(evaluate/category_forecast.py). The steps that have no categorical version yet are
skipped, or run in part, with the reasons below, which the report shows
(docs/model-family.md, "Categorical indicators"; docs/comparison.md, "Lag sensitivity").
"""

from __future__ import annotations

#: Why no maximum-likelihood fit is made.
NO_ML = ("maximum likelihood is not available for categorical variables yet (their "
         "likelihood integrates over every unit's latents); not fitted by maximum likelihood")
#: Which lag-sensitivity axes run (evaluate/sensitivity.py, docs/comparison.md).
SENSITIVITY_AXES = ("with categorical variables only the prior and first-wave axes run, on the "
                    "first candidate with a lag; the specification axis and power-scaling are "
                    "not available for them yet (the report says why)")


def is_categorical(panel) -> bool:
    """Whether the panel has a categorical (binary or ordinal) variable."""
    return bool(getattr(panel, "categories", None))

