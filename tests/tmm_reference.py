"""Reference reflectance of an invented planar microcavity, computed with the ``tmm`` library.

The structure (all numbers invented for testing; the indices are GaAs/AlAs-like values
from memory, not a real sample)::

    vacuum | top DBR (H L) x N_top | L-index lambda spacer with a Lorentz quantum well
           at its centre | (H L) x N_bottom | substrate (index n_H)

Each DBR starts with its high-index layer on the cavity side, so the low-index lambda
spacer has field antinodes at its faces and at its centre, where the quantum-well
layer sits.  The well is a thin layer with a Lorentz-oscillator permittivity::

    eps(E) = eps_b + F / (E_X^2 - E^2 - i E gamma_X)

(Zhu et al., Phys. Rev. Lett. 64, 2499, 1990: normal-mode splitting as a linear-optics
result), which makes ``tmm`` (a general transfer-matrix code with no knowledge of
polaritons) an outside reference for polkit's coupled-oscillator model.

Lengths are in nm throughout, energies in eV; ``tmm`` uses ``n = n' + i n''`` with
``n'' > 0`` for absorption, which matches the sign of the Lorentz term above.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import tmm
from scipy import constants
from scipy.optimize import minimize_scalar

#: h c in eV nm from CODATA (kept local: the reference must not lean on polkit)
HC_EV_NM = constants.h * constants.c / constants.e * 1e9


@dataclass(frozen=True)
class Microcavity:
    """Parameters of the invented reference cavity (indices: value from memory)."""

    n_high: float = 3.5  # GaAs-like, value from memory
    n_low: float = 2.95  # AlAs-like, value from memory
    n_incident: float = 1.0
    n_substrate: float = 3.5
    pairs_top: int = 20
    pairs_bottom: int = 24
    design_energy_ev: float = 1.530  # Bragg energy of the mirrors and spacer
    spacer_wavelengths: float = 1.0  # optical thickness of the spacer in units of lambda
    qw_thickness_nm: float = 10.0
    qw_eps_background: float = 2.95**2  # barrier-matched, so the well only adds the exciton
    qw_energy_ev: float = 1.530  # E_X
    qw_gamma_ev: float = 0.0005  # gamma_X, FWHM of the Lorentz oscillator, eV
    qw_strength_ev2: float = 0.0  # F in eV^2 (0: bare cavity)

    @property
    def design_wavelength_nm(self) -> float:
        return HC_EV_NM / self.design_energy_ev


def dbr_layers(n_first: float, n_second: float, pairs: int, wavelength_nm: float):
    """Indices and thicknesses of ``pairs`` quarter-wave pairs (first, second) x pairs."""
    n_list, d_list = [], []
    for _ in range(pairs):
        n_list += [n_first, n_second]
        d_list += [wavelength_nm / (4 * n_first), wavelength_nm / (4 * n_second)]
    return n_list, d_list


def qw_index(cavity: Microcavity, energy_ev: float) -> complex:
    """Complex refractive index of the Lorentz quantum-well layer at ``energy_ev``."""
    e = energy_ev
    eps = cavity.qw_eps_background + cavity.qw_strength_ev2 / (
        cavity.qw_energy_ev**2 - e * e - 1j * e * cavity.qw_gamma_ev
    )
    n = np.sqrt(complex(eps))
    return n if n.imag >= 0 else -n


def stack(cavity: Microcavity, energy_ev: float):
    """``(n_list, d_list)`` of the whole structure at ``energy_ev`` (tmm order, nm)."""
    lam0 = cavity.design_wavelength_nm
    n_top, d_top = dbr_layers(cavity.n_low, cavity.n_high, cavity.pairs_top, lam0)
    # top mirror seen from the vacuum: (L H) pairs ending with H on the spacer side
    n_bot, d_bot = dbr_layers(cavity.n_high, cavity.n_low, cavity.pairs_bottom, lam0)
    spacer = cavity.spacer_wavelengths * lam0 / cavity.n_low
    half = 0.5 * (spacer - cavity.qw_thickness_nm)
    n_qw = qw_index(cavity, energy_ev)
    n_list = ([cavity.n_incident] + n_top + [cavity.n_low, n_qw, cavity.n_low] + n_bot
              + [cavity.n_substrate])
    d_list = [np.inf] + d_top + [half, cavity.qw_thickness_nm, half] + d_bot + [np.inf]
    return n_list, d_list


def reflectance(cavity: Microcavity, angle_deg: float, energy_ev: float, pol: str = "s") -> float:
    """Reflectance of the cavity at one angle of incidence (in vacuum) and energy."""
    n_list, d_list = stack(cavity, energy_ev)
    res = tmm.coh_tmm(pol, n_list, d_list, np.deg2rad(angle_deg), HC_EV_NM / energy_ev)
    return float(res["R"])


def reflectance_map(
    angles_deg,
    energies_ev,
    cavity: Microcavity | None = None,
    *,
    pol: str = "s",
    **overrides,
) -> np.ndarray:
    """Reflectance map ``R[angle, energy]`` of the reference cavity computed with tmm.

    Parameters
    ----------
    angles_deg, energies_ev
        1-D axes (degree, eV).
    cavity
        A :class:`Microcavity`; default the strongly coupled one of
        :func:`strong_coupling_cavity`.  Keyword ``overrides`` replace its fields.
    pol
        ``"s"`` (default) or ``"p"``.

    Returns
    -------
    ndarray, shape (A, E)
        One tmm evaluation per pixel (about 1 ms each for the default 44 pairs): keep
        maps small in tests, e.g. 15 x 200.
    """
    cav = strong_coupling_cavity() if cavity is None else cavity
    if overrides:
        cav = Microcavity(**{**cav.__dict__, **overrides})
    angles = np.atleast_1d(np.asarray(angles_deg, dtype=float))
    energies = np.atleast_1d(np.asarray(energies_ev, dtype=float))
    out = np.empty((angles.size, energies.size))
    for i, a in enumerate(angles):
        for j, e in enumerate(energies):
            out[i, j] = reflectance(cav, a, e, pol)
    return out


def strong_coupling_cavity(**overrides) -> Microcavity:
    """The default strongly coupled reference cavity (invented numbers).

    One 10 nm well with ``F = 0.02 eV^2`` gives a normal-mode splitting of a few meV,
    well above the linewidths (cavity FWHM ~ 0.2 meV for 20/24 pairs).
    """
    base = {"qw_strength_ev2": 0.02}
    base.update(overrides)
    return Microcavity(**base)


# The strongly coupled cavity of the cross-check: Bragg (cavity) energy 4 meV below the
# exciton, so that the anticrossing sits near 13 degrees (invented numbers).
CAVITY = strong_coupling_cavity(qw_strength_ev2=0.4, design_energy_ev=1.526)


def reflectance_dips(cavity: Microcavity, angle: float, lo=1.520, hi=1.540, step=2e-4):
    """Local minima of R(E) at one angle: coarse scan, then a bounded 1-D refinement."""
    energies = np.arange(lo, hi, step)
    r = np.array([reflectance(cavity, angle, e) for e in energies])
    found = []
    for i in range(1, energies.size - 1):
        if r[i] < r[i - 1] and r[i] <= r[i + 1]:
            res = minimize_scalar(lambda e: reflectance(cavity, angle, e),
                                  bounds=(energies[i - 1], energies[i + 1]), method="bounded",
                                  options={"xatol": 1e-9})
            found.append(res.x)
    return np.array(found)
