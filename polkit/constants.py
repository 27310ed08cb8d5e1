"""Physical constants in the units polkit uses, all from CODATA through :mod:`scipy.constants`."""

from __future__ import annotations

from scipy import constants as _c

#: h c in eV nm (1239.841984... eV nm)
HC_EV_NM: float = _c.h * _c.c / _c.e * 1e9
#: hbar in meV ps (0.6582119569... meV ps)
HBAR_MEV_PS: float = _c.hbar / _c.e * 1e3 * 1e12
#: hbar c in eV um (0.1973269804... eV um); k[1/um] = E[eV] sin(theta) / HBARC_EV_UM
HBARC_EV_UM: float = _c.hbar * _c.c / _c.e * 1e6
#: electron rest mass energy m_e c^2 in eV
ME_C2_EV: float = _c.m_e * _c.c**2 / _c.e
#: Boltzmann constant in meV / K
KB_MEV_K: float = _c.k / _c.e * 1e3
