"""The safety note polkit shows wherever the work happens (CLI help, notebooks, reports, demo).

polkit analyses data; it controls no hardware and gives no safety advice.  The measurements
it analyses are made with lasers of class 3B and 4 and with cryogens, so every place a user
starts work repeats the usual cautions and defers to local rules and licensed practice.
"""

from __future__ import annotations

__all__ = ["SAFETY_NOTE", "SAFETY_LINE", "POWER_NOTE", "safety_markdown"]

#: one line for command-line output
SAFETY_LINE = (
    "Safety: the measurements analysed here use class 3B/4 lasers and cryogens; follow your "
    "laser-safety officer and local rules. polkit gives no safety advice."
)

#: the full note (plain text)
SAFETY_NOTE = (
    "Safety. The measurements polkit analyses are made with class 3B and class 4 lasers "
    "(eye and skin hazards, including from stray and scattered beams) and with cryogens "
    "(liquid helium and nitrogen: cold burns, oxygen displacement in closed rooms; cryostats "
    "under vacuum). Follow your local laser-safety officer, the laser-safety standards that "
    "apply to you (such as IEC 60825-1 and ANSI Z136.1) and your local cryogen-handling "
    "rules. polkit controls no hardware and gives no safety advice."
)

#: extra note for the pump-power commands (where a user plans laser powers)
POWER_NOTE = (
    "Pump powers: the powers in a power series are laser powers. Planning a measurement from "
    "a fitted threshold does not change the laser's class; the eyewear, interlocks and beam "
    "enclosure your local rules require still apply."
)


def safety_markdown() -> str:
    """The note as Markdown (notebooks and HTML reports)."""
    return "> **" + SAFETY_NOTE.replace("Safety. ", "Safety.** ", 1)
