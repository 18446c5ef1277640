"""The evaluation layer: comparison (LOO, WAIC, stacking, leave-future-out), predictive checks,
lag sensitivity, planning and plots (see docs/architecture.md).
"""
