"""``bl.fit``: one entry point for every panel.

A panel of continuous variables is fitted on its marginal likelihood
(:func:`bayeslong.infer.sampling.fit`); a panel with categorical variables, which has no
closed-form marginal likelihood, with person-level latents
(:func:`bayeslong.infer.categorical.fit_categorical`). Both return a ``Fit`` with the same
groups, so comparisons and summaries read them alike.
"""

from __future__ import annotations

from bayeslong.infer import sampling
from bayeslong.infer.categorical import fit_categorical


def fit(spec, panel, **kwargs):
    """Fit ``spec`` to ``panel`` by NUTS (see :func:`bayeslong.infer.sampling.fit`).

    A panel with categorical variables (``Panel.categories``) goes to
    :func:`~bayeslong.infer.categorical.fit_categorical`, which takes the same arguments
    and a few of its own (``loglik_draws``, ``points``, ``replicates``).
    """
    if getattr(panel, "categories", None):
        return fit_categorical(spec, panel, **kwargs)
    return sampling.fit(spec, panel, **kwargs)
