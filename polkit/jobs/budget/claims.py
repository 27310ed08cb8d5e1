"""Claims about a budget quantity, such as ``"energy_per_operation < 10 fJ"``.

A claim is parsed with a regular expression (never evaluated as code) into a
:class:`Claim`, whose threshold is converted into the quantity's own units; the budget
answers it with the fraction of draws for which it holds.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from scipy import constants as _c

from polkit.errors import ConfigError
from polkit.units import ENERGY_UNITS

__all__ = ["Claim", "parse_claim", "CLAIM_UNITS"]

#: unit -> (dimension, factor to the dimension's base unit)
CLAIM_UNITS: dict[str, tuple[str, float]] = {
    **{u: ("energy", f) for u, f in (("zJ", 1e-21), ("aJ", 1e-18), ("fJ", 1e-15),
                                     ("pJ", 1e-12), ("nJ", 1e-9), ("uJ", 1e-6), ("µJ", 1e-6),
                                     ("mJ", 1e-3), ("J", 1.0))},
    **{u: ("energy", ENERGY_UNITS[u] * _c.e) for u in ("ueV", "µeV", "meV", "eV")},
    **{u: ("frequency", f) for u, f in (("Hz", 1.0), ("kHz", 1e3), ("MHz", 1e6), ("GHz", 1e9),
                                        ("THz", 1e12))},
    **{u: ("power", f) for u, f in (("nW", 1e-9), ("uW", 1e-6), ("µW", 1e-6), ("mW", 1e-3),
                                    ("W", 1.0))},
    **{u: ("time", f) for u, f in (("fs", 1e-15), ("ps", 1e-12), ("ns", 1e-9), ("us", 1e-6),
                                   ("µs", 1e-6), ("s", 1.0))},
    **{u: ("length", f) for u, f in (("nm", 1e-3), ("um", 1.0), ("µm", 1.0), ("mm", 1e3))},
    **{u: ("area", 1.0) for u in ("um2", "um^2", "µm2", "µm^2")},
    **{u: ("interaction", f) for u, f in (("ueV um^2", 1.0), ("ueV um2", 1.0),
                                          ("µeV µm^2", 1.0), ("µeV µm2", 1.0),
                                          ("meV um^2", 1e3), ("meV um2", 1e3))},
    "K": ("temperature", 1.0),
    "rad": ("phase", 1.0),
    "1": ("dimensionless", 1.0),
    "": ("dimensionless", 1.0),
}
_NUMBER = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
_CLAIM_RE = re.compile(
    rf"^\s*(?P<name>[A-Za-z_][A-Za-z0-9_]*)\s*(?P<op><=|>=|<|>)\s*(?P<num>{_NUMBER})"
    r"\s*(?P<units>[^\s].*?)?\s*$"
)
_OPS = {"<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal}


@dataclass(frozen=True)
class Claim:
    """A parsed claim ``quantity op threshold units``.

    Attributes
    ----------
    text
        The claim as written.
    quantity
        Name of a budget quantity.
    op
        One of ``<``, ``<=``, ``>``, ``>=``.
    threshold
        The number as written, in ``units``.
    units
        The units as written (``""`` for a dimensionless quantity).
    threshold_native
        The threshold converted to the quantity's own units.
    native_units
        The quantity's units.
    """

    text: str
    quantity: str
    op: str
    threshold: float
    units: str
    threshold_native: float
    native_units: str

    def probability(self, values: np.ndarray) -> float:
        """Fraction of ``values`` (draws in the quantity's units) for which the claim holds."""
        return float(np.mean(_OPS[self.op](np.asarray(values, dtype=float),
                                           self.threshold_native)))


def parse_claim(text: str, quantities: Mapping[str, str]) -> Claim:
    """Parse ``"name op number units"`` against the known quantities and their units.

    The text is matched with a regular expression; nothing is evaluated.  Units convert
    within their dimension (aJ, fJ, pJ, nJ, J and eV for energies; Hz to THz; nW to W;
    ...).

    Parameters
    ----------
    text
        For example ``"energy_per_operation < 10 fJ"`` or ``"operation_rate >= 20 GHz"``.
    quantities
        ``{name: units}`` of the quantities a claim may name.

    Returns
    -------
    Claim

    Raises
    ------
    ConfigError
        Unparseable text, an unknown quantity, unknown units or units of another dimension;
        the key is ``claim 'TEXT'``.
    """
    key = f"claim {text!r}"
    if not isinstance(text, str):
        raise ConfigError(f"expected text, found {type(text).__name__}", key=key)
    m = _CLAIM_RE.match(text)
    if m is None:
        raise ConfigError(
            "expected 'QUANTITY OP NUMBER UNITS' with OP one of <, <=, >, >=, e.g. "
            "'energy_per_operation < 10 fJ'",
            key=key,
        )
    name, op, num, units = m["name"], m["op"], float(m["num"]), (m["units"] or "").strip()
    if name not in quantities:
        raise ConfigError(
            f"unknown quantity {name!r}; expected one of {', '.join(sorted(quantities))}",
            key=key,
        )
    native = quantities[name]
    factor, native_factor = _factors(name, native, units, key)
    return Claim(text=text, quantity=name, op=op, threshold=num, units=units,
                 threshold_native=num * factor / native_factor, native_units=native)


def _factors(name: str, native: str, units: str, key: str) -> tuple[float, float]:
    """The factors of ``units`` and of the quantity's ``native`` units to their base unit."""
    if native not in CLAIM_UNITS:  # pragma: no cover - every budget quantity is listed
        raise ConfigError(f"quantity {name!r} has units {native!r} that claims cannot convert",
                          key=key)
    dim, native_factor = CLAIM_UNITS[native]
    same_dim = [u for u, (d, _) in CLAIM_UNITS.items() if d == dim and u]
    if units not in CLAIM_UNITS:
        raise ConfigError(
            f"unknown units {units!r} for {name} (units {native!r}); expected one of "
            f"{', '.join(same_dim)}",
            key=key,
        )
    udim, factor = CLAIM_UNITS[units]
    if udim != dim:
        raise ConfigError(
            f"units {units or 'none'!r} are {udim}, but {name} is {dim} (units {native!r}); "
            f"expected one of {', '.join(same_dim)}",
            key=key,
        )
    return factor, native_factor
