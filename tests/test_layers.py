"""The layering of polkit's packages: the pure floors never load figures, panels, jobs or
settings-file readers.

The floors are the data model and readers (``polkit.data``), the physics (``polkit.models``),
the numerics (``polkit.numerics``), line fitting (``polkit.linefit``), the inference engine
(``polkit.inference``), ``polkit.units`` and ``polkit.files``.  They may be used without
matplotlib, ipywidgets or any job; settings files are read by ``polkit.config``, above them.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "polkit"
FLOORS = ["data", "models", "numerics", "linefit", "inference", "units.py", "files.py"]
ABOVE = ("polkit.plotting", "polkit.widgets", "polkit.jobs", "polkit.config", "polkit.cli",
         "polkit.report", "polkit.demo")


def _imports(path: Path) -> list[tuple[int, str]]:
    """Every module a file imports, at any depth (function-local imports included)."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.append((node.lineno, node.module))
            found += [(node.lineno, f"{node.module}.{a.name}") for a in node.names]
    return found


def _floor_files() -> list[Path]:
    files = []
    for floor in FLOORS:
        target = PACKAGE / floor
        files += sorted(target.rglob("*.py")) if target.is_dir() else [target]
    return files


@pytest.mark.parametrize("path", _floor_files(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_a_floor_module_imports_nothing_above_it(path):
    # common practice, no published source: the layering rule of polkit's packages
    # (DEVELOPERS.md, "Layout and layering"), read from the source so that an import inside
    # a function counts too
    bad = [f"line {line}: {name}" for line, name in _imports(path)
           if name == "matplotlib" or name.startswith(("matplotlib.", "ipywidgets"))
           or name.startswith(ABOVE)]
    assert bad == [], f"{path.relative_to(PACKAGE)} imports above its floor: {bad}"


def test_importing_the_floors_loads_no_figures_panels_jobs_or_settings_readers():
    # common practice, no published source: the same rule at run time, in a fresh interpreter
    # so that modules loaded by other tests do not count
    code = (
        "import sys\n"
        "import polkit.data, polkit.models, polkit.numerics, polkit.linefit, polkit.inference\n"
        "import polkit.units, polkit.files\n"
        f"bad = sorted(m for m in sys.modules if m == 'matplotlib' or m.startswith({ABOVE!r}))\n"
        "print(','.join(bad))\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == ""
