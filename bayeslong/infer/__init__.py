"""The inference layer: the likelihood and its sampler node, transforms, maximum likelihood,
priors, the PyMC model, sampling and batch runs (see docs/architecture.md).
"""
