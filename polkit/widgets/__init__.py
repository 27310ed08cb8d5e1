"""Interactive panels for JupyterLab (ipywidgets), built as functions that return their widgets.

Each panel function returns an object holding every widget it shows, so the same panel
is driven by a person in JupyterLab and by a test from Python (set a slider's ``value``,
call a button's ``click()``, read the overlay data and the summary).  Exported HTML cannot
run widgets offline: each panel offers ``snapshot()``, a static image to show beside it.
"""

from __future__ import annotations

from polkit.widgets.dispersion_panel import DispersionPanel, dispersion_panel
from polkit.widgets.power_panel import PowerPanel, power_panel

__all__ = ["dispersion_panel", "DispersionPanel", "power_panel", "PowerPanel"]
