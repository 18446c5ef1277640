"""Dimension names, defined once and carried from DataFrame to PyMC coords to ArviZ."""

UNIT = "unit"
WAVE = "wave"
PROCESS = "process"
INDICATOR = "indicator"
PARAMETER = "parameter"
