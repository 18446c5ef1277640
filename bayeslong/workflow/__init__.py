"""The workflow layer: the study file, running a study, the report and the command line
(see docs/architecture.md).
"""
