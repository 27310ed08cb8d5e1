"""The laser and cryogen cautions appear where the work happens: CLI help, notebooks, demo."""

from __future__ import annotations

from pathlib import Path

import nbformat

from polkit.cli import build_parser
from polkit.safety import SAFETY_NOTE

ROOT = Path(__file__).resolve().parents[1]


def _help(*args: str) -> str:
    parser = build_parser()
    if not args:
        return parser.format_help()
    sub = next(a for a in parser._actions if a.dest == "command")
    return sub.choices[args[0]].format_help()


def test_top_level_and_power_help_carry_the_safety_note():
    # common practice, no published source: cautions shown where the work starts
    assert "class 3B and class 4" in " ".join(_help().split())
    power = " ".join(_help("power").split())
    assert "class 3B and class 4" in power and "Pump powers" in power
    assert "IEC 60825-1" in SAFETY_NOTE and "no safety advice" in SAFETY_NOTE


def test_every_notebook_has_a_safety_cell_before_its_code():
    # common practice, no published source
    books = sorted((ROOT / "notebooks").glob("*.ipynb"))
    assert books
    for path in books:
        nb = nbformat.read(path, as_version=4)
        first_code = next(i for i, c in enumerate(nb.cells) if c.cell_type == "code")
        safety = [i for i, c in enumerate(nb.cells)
                  if c.cell_type == "markdown" and "no safety advice" in c.source]
        assert safety and safety[0] < first_code, f"{path.name}: no safety cell up front"
