"""``bl.fit``: one entry point for every panel.

A panel of continuous variables is fitted on its marginal likelihood
(:func:`bayeslong.infer.sampling.fit`); a panel with categorical variables, which has no
closed-form marginal likelihood, with latent responses or person-level latents
(:func:`bayeslong.infer.categorical.fit_categorical`). Both return a ``Fit`` with the same
groups, so comparisons and summaries read them alike.
"""

from __future__ import annotations

from bayeslong.infer import sampling
from bayeslong.infer.categorical import categorical_fit_from_file, fit_categorical
from bayeslong.infer.sampling import SAMPLERS

__all__ = ["SAMPLERS", "fit", "load_fit"]


def fit(spec, panel, **kwargs):
    """Fit ``spec`` to ``panel`` by NUTS (see :func:`bayeslong.infer.sampling.fit`).

    A panel with categorical variables (``Panel.categories``) goes to
    :func:`~bayeslong.infer.categorical.fit_categorical`, which takes the same arguments
    and a few of its own (``loglik_draws``, ``points``, ``replicates``).
    """
    if getattr(panel, "categories", None):
        return fit_categorical(spec, panel, **kwargs)
    return sampling.fit(spec, panel, **kwargs)


def load_fit(path):
    """Read a fit written by ``Fit.save`` (see :func:`bayeslong.infer.sampling.load_fit`).

    A fit with categorical variables comes back as a
    :class:`~bayeslong.infer.categorical.CategoricalFit`, with its panel's categories, its
    thresholds and the priors of their gaps.
    """
    idata, attrs, spec, panel = sampling.read_fit_file(path)
    if getattr(panel, "categories", None):
        return categorical_fit_from_file(idata, attrs, spec, panel, path)
    return sampling.fit_from_file(idata, attrs, spec, panel, path)
