"""The model layer: catalog specs, parameter structure, implied moments, identification,
simulation from the structural equations. Imports only from bayeslong.data and the ground
modules; never PyMC (see docs/architecture.md).
"""
