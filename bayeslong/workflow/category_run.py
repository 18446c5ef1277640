"""What a study run does differently when the panel has categorical variables.

Candidates are fitted with latent responses and thresholds (``bl.fit`` dispatches,
infer/fitting.py) and compared by the per-unit marginal LOO and, when asked, by the
marginal probability of the last wave's categories given the earlier waves
(evaluate/category_forecast.py). The steps that have no categorical version yet are
skipped, or run differently, with the reasons below, which the report shows
(docs/model-family.md, "Categorical indicators"; docs/comparison.md, "Lag sensitivity").
"""

from __future__ import annotations

#: Why no maximum-likelihood fit is made.
NO_ML = ("maximum likelihood is not available for categorical variables yet (their "
         "likelihood integrates over every unit's latents); not fitted by maximum likelihood")
#: How the lag-sensitivity axes run (evaluate/sensitivity.py, docs/comparison.md).
SENSITIVITY_AXES = ("with categorical variables every refit is a categorical fit; the "
                    "specification axis fits only the candidates that the categories identify "
                    "(the report says why any other is skipped), the first-wave axis refits "
                    "the first candidate with a lag, and power-scaling uses the draws that "
                    "carry the marginal log-likelihood (loglik_draws, thinned)")


def is_categorical(panel) -> bool:
    """Whether the panel has a categorical (binary or ordinal) variable."""
    return bool(getattr(panel, "categories", None))

