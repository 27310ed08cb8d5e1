"""Units of the axes and columns polkit reads, and their conversion to polkit's units.

polkit's units: photon energy in eV, emission angle in degree, in-plane wavevector in
1/um, pump power in mW, linewidth in meV.  Every accepted spelling is listed in the
tables below; anything else is refused with a :class:`~polkit.errors.DataError` that
lists the accepted spellings.  Units are matched case-sensitively because ``meV`` and
``MeV`` (or ``mW`` and ``MW``) are different things.

Wavelengths
-----------
A wavelength axis is converted with E = hc / lambda_vacuum (hc from
:data:`polkit.constants.HC_EV_NM`).  Spectrometers calibrated in air report air
wavelengths; these are first turned into vacuum wavelengths with the refractive index
of standard air (dry air, 15 degC, 101 325 Pa, 450 ppm CO2) from

    (n - 1) * 1e8 = k1 / (k0 - s^2) + k3 / (k2 - s^2),  s = 1 / lambda_vacuum [1/um],
    k0 = 238.0185, k1 = 5 792 105, k2 = 57.362, k3 = 167 917   [um^-2]

(Ciddor, Appl. Opt. 35, 1566 (1996), Eq. 1), valid from 300 nm to 1690 nm.
"""

from __future__ import annotations

import logging
import math
import warnings

import numpy as np

from polkit.constants import HC_EV_NM
from polkit.errors import DataError, DataWarning

__all__ = [
    "ENERGY_UNITS",
    "WAVELENGTH_UNITS",
    "WAVENUMBER_UNITS",
    "ANGLE_UNITS",
    "PIXEL_UNITS",
    "WAVEVECTOR_UNITS",
    "POWER_UNITS",
    "LINEWIDTH_UNITS",
    "LENGTH_UNITS",
    "AREA_UNITS",
    "WAFER_LENGTH_UNITS",
    "TIME_UNITS",
    "FREQUENCY_UNITS",
    "DEVICE_ENERGY_UNITS",
    "subset",
    "EV_PER_INV_CM",
    "energy_axis_quantity",
    "parse_units",
    "accepted",
    "refractive_index_air",
    "air_to_vacuum_nm",
    "vacuum_to_air_nm",
    "axis_to_ev",
    "wavelength_jacobian",
    "angle_to_degree",
    "wavevector_to_inv_um",
    "power_to_mw",
    "width_to_mev",
]

logger = logging.getLogger(__name__)

#: photon energy spellings -> factor to eV
ENERGY_UNITS: dict[str, float] = {
    "eV": 1.0,
    "electronvolt": 1.0,
    "electronvolts": 1.0,
    "electron_volt": 1.0,
    "meV": 1e-3,
    "millielectronvolt": 1e-3,
    "ueV": 1e-6,
    "µeV": 1e-6,
    "μeV": 1e-6,
}
#: wavelength spellings -> factor to nm
WAVELENGTH_UNITS: dict[str, float] = {
    "nm": 1.0,
    "nanometer": 1.0,
    "nanometers": 1.0,
    "nanometre": 1.0,
    "nanometres": 1.0,
    "um": 1e3,
    "µm": 1e3,
    "μm": 1e3,
    "micrometer": 1e3,
    "micrometre": 1e3,
    "micron": 1e3,
    "microns": 1e3,
    "angstrom": 0.1,
    "Å": 0.1,
}
#: vacuum wavenumber spellings -> factor to 1/cm
WAVENUMBER_UNITS: dict[str, float] = {
    "1/cm": 1.0,
    "cm-1": 1.0,
    "cm^-1": 1.0,
    "cm**-1": 1.0,
    "/cm": 1.0,
}
#: angle spellings -> factor to degree
ANGLE_UNITS: dict[str, float] = {
    "degree": 1.0,
    "degrees": 1.0,
    "deg": 1.0,
    "°": 1.0,
    "rad": 180.0 / math.pi,
    "radian": 180.0 / math.pi,
    "radians": 180.0 / math.pi,
    "mrad": 0.18 / math.pi,
}
#: camera-pixel spellings (an uncalibrated Fourier-plane axis)
PIXEL_UNITS: dict[str, float] = {"pixel": 1.0, "pixels": 1.0, "px": 1.0, "pix": 1.0}
#: in-plane wavevector spellings -> factor to 1/um
WAVEVECTOR_UNITS: dict[str, float] = {
    "1/um": 1.0,
    "um-1": 1.0,
    "um^-1": 1.0,
    "1/µm": 1.0,
    "µm-1": 1.0,
    "µm^-1": 1.0,
    "1/μm": 1.0,
    "μm-1": 1.0,
    "μm^-1": 1.0,
    "1/micron": 1.0,
    "rad/um": 1.0,
    "1/nm": 1e3,
    "nm-1": 1e3,
    "1/m": 1e-6,
    "m-1": 1e-6,
}
#: pump power spellings -> factor to mW
POWER_UNITS: dict[str, float] = {
    "W": 1e3,
    "watt": 1e3,
    "mW": 1.0,
    "milliwatt": 1.0,
    "uW": 1e-3,
    "µW": 1e-3,
    "μW": 1e-3,
    "microwatt": 1e-3,
    "nW": 1e-6,
    "nanowatt": 1e-6,
}
#: linewidth spellings given as an energy -> factor to meV
LINEWIDTH_UNITS: dict[str, float] = {k: v * 1e3 for k, v in ENERGY_UNITS.items()}
#: lengths on a sample (spots, nodes) -> factor to um
LENGTH_UNITS: dict[str, float] = {"um": 1.0, "µm": 1.0, "nm": 1e-3, "mm": 1e3}
#: areas on a sample -> factor to um^2
AREA_UNITS: dict[str, float] = {"um2": 1.0, "um^2": 1.0, "µm2": 1.0, "µm^2": 1.0}
#: positions on a wafer -> factor to mm
WAFER_LENGTH_UNITS: dict[str, float] = {
    "mm": 1.0,
    "millimetre": 1.0,
    "millimeter": 1.0,
    "um": 1e-3,
    "µm": 1e-3,
    "μm": 1e-3,
    "micron": 1e-3,
    "cm": 10.0,
    "m": 1e3,
}
#: times (lifetimes, windows, pulses) -> factor to ps
TIME_UNITS: dict[str, float] = {"ps": 1.0, "fs": 1e-3, "ns": 1e3, "us": 1e6, "µs": 1e6}
#: repetition rates -> factor to MHz
FREQUENCY_UNITS: dict[str, float] = {"MHz": 1.0, "Hz": 1e-6, "kHz": 1e-3, "GHz": 1e3}
#: switching energies of a device -> factor to fJ
DEVICE_ENERGY_UNITS: dict[str, float] = {"fJ": 1.0, "aJ": 1e-3, "pJ": 1e3, "nJ": 1e6, "J": 1e15}


def subset(table: dict[str, float], names) -> dict[str, float]:
    """The entries ``names`` of a unit table, in that order (a file kind's accepted units)."""
    return {u: table[u] for u in names}

#: 1/cm expressed in eV: E[eV] = wavenumber[1/cm] * EV_PER_INV_CM
EV_PER_INV_CM: float = HC_EV_NM * 1e-7

# Ciddor (1996) standard-air dispersion constants, um^-2
_K0, _K1, _K2, _K3 = 238.0185, 5792105.0, 57.362, 167917.0
_CIDDOR_RANGE_NM = (300.0, 1690.0)


def accepted(table: dict[str, float]) -> str:
    """The accepted spellings of a unit table, for error messages."""
    return ", ".join(repr(k) for k in table)


def parse_units(
    units, table: dict[str, float], *, what: str, field: str, path=None, fix: str | None = None
) -> float:
    """Look ``units`` up in ``table`` and return its conversion factor.

    Parameters
    ----------
    units
        The units string found in the file (``None`` when the file gave none).
    table
        One of the unit tables of this module.
    what
        What the quantity is, for the message (``"an angle"``).
    field, path
        Where the units were found, for the message.
    fix
        How to supply the units when they are missing.

    Raises
    ------
    DataError
        When ``units`` is missing or not in ``table``.
    """
    if units is None or (isinstance(units, str) and not units.strip()):
        hint = fix or "add a 'units' attribute"
        raise DataError(
            f"expected units for {what} (one of {accepted(table)}); found none. Fix: {hint}",
            path=path,
            field=field,
        )
    text = str(units).strip()
    if text not in table:
        raise DataError(
            f"expected units for {what}, one of {accepted(table)}; found {text!r}. "
            "Fix: write the units with one of the accepted spellings",
            path=path,
            field=field,
        )
    return table[text]


def energy_axis_quantity(units) -> tuple[str, float] | None:
    """Classify units of a spectral axis: ``("energy"|"wavelength"|"wavenumber", factor)``.

    The factor converts to eV, nm or 1/cm respectively.  Returns ``None`` for units
    that are not spectral.
    """
    if not isinstance(units, str):
        return None
    text = units.strip()
    for quantity, table in (
        ("energy", ENERGY_UNITS),
        ("wavelength", WAVELENGTH_UNITS),
        ("wavenumber", WAVENUMBER_UNITS),
    ):
        if text in table:
            return quantity, table[text]
    return None


def _check_ciddor_range(wavelength_nm: np.ndarray) -> None:
    lo, hi = _CIDDOR_RANGE_NM
    finite = wavelength_nm[np.isfinite(wavelength_nm)]
    if finite.size and (finite.min() < lo or finite.max() > hi):
        warnings.warn(
            f"air-to-vacuum conversion used outside the validity of the standard-air index "
            f"({lo:.0f}-{hi:.0f} nm): wavelengths {finite.min():.1f}-{finite.max():.1f} nm",
            DataWarning,
            stacklevel=3,
        )


def _ciddor_terms(wavelength_vac_nm):
    sigma2 = (1e3 / np.asarray(wavelength_vac_nm, dtype=float)) ** 2  # (1/um)^2
    return sigma2, _K0 - sigma2, _K2 - sigma2


def refractive_index_air(wavelength_vac_nm) -> np.ndarray:
    """Refractive index of standard air at a vacuum wavelength.

    Standard air: dry, 15 degC, 101 325 Pa, 450 ppm CO2.

    Parameters
    ----------
    wavelength_vac_nm
        Vacuum wavelength(s) in nm (300-1690 nm).

    Returns
    -------
    numpy.ndarray
        n (dimensionless), about 1.000275 near 850 nm.

    Notes
    -----
    (n - 1) 1e8 = k1/(k0 - s^2) + k3/(k2 - s^2) with s the vacuum wavenumber in 1/um
    (Ciddor, Appl. Opt. 35, 1566 (1996), Eq. 1).
    """
    _, d0, d2 = _ciddor_terms(wavelength_vac_nm)
    return 1.0 + 1e-8 * (_K1 / d0 + _K3 / d2)


def _dn_dlambda(wavelength_vac_nm) -> np.ndarray:
    """d n / d lambda_vacuum of standard air, per nm (derivative of Ciddor's Eq. 1)."""
    lam = np.asarray(wavelength_vac_nm, dtype=float)
    sigma2, d0, d2 = _ciddor_terms(lam)
    dn_dsigma2 = 1e-8 * (_K1 / d0**2 + _K3 / d2**2)
    return dn_dsigma2 * (-2.0 * sigma2 / lam)


def vacuum_to_air_nm(wavelength_vac_nm) -> np.ndarray:
    """Air wavelength (nm) of light with the given vacuum wavelength (nm): lambda / n(lambda)."""
    lam = np.asarray(wavelength_vac_nm, dtype=float)
    return lam / refractive_index_air(lam)


def air_to_vacuum_nm(wavelength_air_nm) -> np.ndarray:
    """Vacuum wavelength (nm) of light with the given wavelength in standard air (nm).

    Solves lambda_vac = lambda_air * n(lambda_vac) by fixed-point iteration (the
    index varies so slowly that four steps reach machine precision).
    """
    lam_air = np.asarray(wavelength_air_nm, dtype=float)
    lam = lam_air * 1.00027
    for _ in range(6):
        lam = lam_air * refractive_index_air(lam)
    return lam


def axis_to_ev(
    values, quantity: str, factor: float, *, medium: str = "vacuum", path=None, field=None
) -> np.ndarray:
    """Convert a spectral axis to photon energy in eV.

    Parameters
    ----------
    values
        Axis values in the file's units.
    quantity, factor
        From :func:`energy_axis_quantity`.
    medium
        ``"vacuum"`` or ``"air"``: the medium a wavelength axis refers to (ignored
        for energy and wavenumber axes, which are medium-free).
    """
    x = np.asarray(values, dtype=float) * factor
    if quantity == "energy":
        return x
    if quantity == "wavenumber":
        return x * EV_PER_INV_CM
    if quantity != "wavelength":  # pragma: no cover - internal misuse
        raise ValueError(f"unknown spectral quantity {quantity!r}")
    with np.errstate(divide="ignore", invalid="ignore"):
        if np.any(x <= 0):
            raise DataError(
                "expected positive wavelengths; found values <= 0. "
                "Fix: check the axis and its units",
                path=path,
                field=field,
            )
        if medium == "air":
            _check_ciddor_range(x)
            x = air_to_vacuum_nm(x)
        elif medium != "vacuum":
            raise DataError(
                f"expected wavelength_medium 'vacuum' or 'air'; found {medium!r}",
                path=path,
                field="wavelength_medium",
            )
        return HC_EV_NM / x


def wavelength_jacobian(energy_ev, factor: float, *, medium: str = "vacuum") -> np.ndarray:
    """|d lambda_file / d E| for a wavelength axis, in file units per eV.

    A spectral density per unit of the file's wavelength axis becomes a density per
    eV by I_E = I_lambda |d lambda / d E|, which keeps the integral of the signal
    over the axis.  In vacuum |d lambda / d E| = lambda^2 / (hc); for air
    wavelengths the factor d lambda_air / d lambda_vac = (n - lambda n') / n^2 is
    included.

    Parameters
    ----------
    energy_ev
        Photon energies (eV) of the converted axis.
    factor
        nm per file unit (1 for nm, 1000 for um).
    medium
        ``"vacuum"`` or ``"air"``.
    """
    e = np.asarray(energy_ev, dtype=float)
    lam_vac = HC_EV_NM / e
    jac_nm = lam_vac**2 / HC_EV_NM
    if medium == "air":
        n = refractive_index_air(lam_vac)
        jac_nm = jac_nm * (n - lam_vac * _dn_dlambda(lam_vac)) / n**2
    return jac_nm / factor


def angle_to_degree(values, units, *, path=None, field="angle") -> np.ndarray:
    """Convert an angle axis (degree, radian) to degree."""
    factor = parse_units(units, ANGLE_UNITS, what="an angle", field=field, path=path)
    return np.asarray(values, dtype=float) * factor


def wavevector_to_inv_um(values, units, *, path=None, field="k") -> np.ndarray:
    """Convert an in-plane wavevector axis to 1/um."""
    factor = parse_units(units, WAVEVECTOR_UNITS, what="a wavevector", field=field, path=path)
    return np.asarray(values, dtype=float) * factor


def power_to_mw(values, units, *, path=None, field="power") -> np.ndarray:
    """Convert pump powers (W, mW, uW, nW) to mW."""
    factor = parse_units(
        units,
        POWER_UNITS,
        what="a pump power",
        field=field,
        path=path,
        fix="write the column header as 'power [mW]' (or set a 'units' attribute)",
    )
    return np.asarray(values, dtype=float) * factor


def width_to_mev(values, units, *, path=None, field="linewidth") -> np.ndarray:
    """Convert a linewidth given as an energy (eV, meV, ueV) to meV."""
    factor = parse_units(units, LINEWIDTH_UNITS, what="a linewidth", field=field, path=path)
    return np.asarray(values, dtype=float) * factor
