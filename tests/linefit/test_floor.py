"""polkit.linefit is a pure floor: fitting spectra loads no figures, panels or jobs."""

from __future__ import annotations

import subprocess
import sys


def test_line_fitting_loads_no_figures_panels_or_jobs():
    # common practice, no published source: the layering rule of polkit's packages, checked
    # in a fresh interpreter so that modules loaded by other tests do not count
    code = (
        "import sys, polkit.linefit\n"
        "bad = sorted(m for m in sys.modules if m == 'matplotlib'"
        " or m.startswith(('polkit.plotting', 'polkit.widgets', 'polkit.jobs')))\n"
        "print(','.join(bad))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == ""
