"""The panel: long and wide intake and their checks, missing-data patterns (the lowest layer).

Imports nothing from the other layers (see docs/architecture.md).
"""

from bayeslong.data.panel import Panel, Patterns, check_panel

__all__ = ["Panel", "Patterns", "check_panel"]
