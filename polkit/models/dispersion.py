"""Linear polariton physics: cavity dispersion, coupled oscillators, Hopfield fractions.

Pure functions, arrays in and arrays out, broadcasting over any leading batch axes
(for example a walker axis ``(W, 1)`` against an angle grid ``(A,)``).

Units
-----
Every energy argument of this module is in **eV**, including the coupling ``g`` and
the linewidths ``gamma_*`` (a parameter named ``rabi_meV`` in a fit is divided by
1000 by the workflow before it gets here).  The only exceptions carry their unit in
their name: :func:`lifetime_ps` and :func:`quality_factor` take ``gamma_mev``.
Angles are in degrees, in-plane wavevectors in 1/um, masses in electron masses.

Conventions
-----------
* Every ``gamma`` is a full width at half maximum (FWHM); a mode with FWHM ``gamma``
  has the complex energy ``E - i gamma / 2``.
* ``g`` is the coupling matrix element; the Rabi splitting is ``2 g``.
* Detuning is ``delta = E_C - E_X`` (at normal incidence ``E_C0 - E_X``).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit.constants import HBAR_MEV_PS, HBARC_EV_UM, ME_C2_EV
from polkit.errors import DataError

__all__ = [
    "cavity_energy",
    "cavity_energy_parabolic",
    "photon_mass",
    "angle_to_k",
    "k_to_angle",
    "two_mode_eigenvalues",
    "hopfield_fractions",
    "CoupledModes",
    "coupled_modes",
    "lp_effective_mass",
    "lifetime_ps",
    "quality_factor",
]

logger = logging.getLogger(__name__)

#: default in-plane exciton mass in electron masses (GaAs quantum-well heavy-hole
#: exciton, order of magnitude; value from memory).  It changes the polariton mass
#: by about one part in 10^4, so the choice is not critical.
DEFAULT_EXCITON_MASS_ME: float = 0.5


def _one_of(angle_deg, k, where: str):
    if (angle_deg is None) == (k is None):
        raise DataError(
            "expected exactly one of angle_deg= (degree) or k= (1/um); "
            f"found {'both' if angle_deg is not None else 'neither'}. Pass one axis.",
            field=where,
        )


def _sin2_over_n2(angle_deg: ArrayLike, n_eff: ArrayLike) -> NDArray:
    s = np.sin(np.deg2rad(np.asarray(angle_deg, dtype=float)))
    return (s * s) / np.square(np.asarray(n_eff, dtype=float))


def cavity_energy(
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    *,
    angle_deg: ArrayLike | None = None,
    k: ArrayLike | None = None,
) -> NDArray:
    """Energy of the planar-cavity photon mode versus angle or in-plane wavevector.

    With the angle (fixed normal wavevector in a planar cavity)::

        E_C(theta) = E_C0 / sqrt(1 - sin^2(theta) / n_eff^2)

    and, equivalently, with the in-plane wavevector ``k`` (1/um)::

        E_C(k) = sqrt(E_C0^2 + (hbar c k / n_eff)^2)

    The two agree through ``k = E_C sin(theta) / (hbar c)``.  Source: the photon in a
    planar Fabry-Perot resonator has ``|q|^2 = q_z^2 + k^2`` with ``q_z`` fixed by the
    spacer, e.g. Kavokin et al., *Microcavities* (Oxford, 2007), ch. 2.

    Parameters
    ----------
    e_c0
        Cavity energy at normal incidence, eV.
    n_eff
        Effective refractive index of the cavity mode (dimensionless; larger than the
        spacer index is impossible, smaller is usual because the field enters the
        mirrors).
    angle_deg
        External emission angle in degrees (keyword only; give this or ``k``).
    k
        In-plane wavevector in 1/um (keyword only; give this or ``angle_deg``).

    Returns
    -------
    ndarray
        E_C in eV, broadcast over all arguments.
    """
    _one_of(angle_deg, k, "cavity_energy")
    e_c0 = np.asarray(e_c0, dtype=float)
    if angle_deg is not None:
        return e_c0 / np.sqrt(1.0 - _sin2_over_n2(angle_deg, n_eff))
    q = HBARC_EV_UM * np.asarray(k, dtype=float) / np.asarray(n_eff, dtype=float)
    return np.sqrt(e_c0 * e_c0 + q * q)


def cavity_energy_parabolic(
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    *,
    angle_deg: ArrayLike | None = None,
    k: ArrayLike | None = None,
) -> NDArray:
    """Parabolic (effective-mass) limit of :func:`cavity_energy`.

    In ``k``: ``E_C = E_C0 + (hbar k)^2 / (2 m_C)`` with ``m_C c^2 = E_C0 n_eff^2``,
    i.e. ``E_C0 + (hbar c k)^2 / (2 E_C0 n_eff^2)``.  In angle: the first order of the
    exact form in ``sin^2(theta)``, ``E_C0 (1 + sin^2(theta) / (2 n_eff^2))``.  Both are
    the leading terms of the exact expressions; they differ from them at order
    ``k^4`` (resp. ``sin^4``).

    Parameters
    ----------
    e_c0, n_eff, angle_deg, k
        As in :func:`cavity_energy` (eV, dimensionless, degree, 1/um).

    Returns
    -------
    ndarray
        E_C in eV.
    """
    _one_of(angle_deg, k, "cavity_energy_parabolic")
    e_c0 = np.asarray(e_c0, dtype=float)
    if angle_deg is not None:
        return e_c0 * (1.0 + 0.5 * _sin2_over_n2(angle_deg, n_eff))
    q = HBARC_EV_UM * np.asarray(k, dtype=float) / np.asarray(n_eff, dtype=float)
    return e_c0 + 0.5 * q * q / e_c0


def photon_mass(e_c0: ArrayLike, n_eff: ArrayLike) -> NDArray:
    """Effective mass of the cavity photon, in electron masses.

    ``m_C = E_C0 n_eff^2 / c^2`` (curvature of :func:`cavity_energy` at ``k = 0``), so
    ``m_C / m_e = E_C0 n_eff^2 / (m_e c^2)`` with ``m_e c^2`` from CODATA.

    Parameters
    ----------
    e_c0
        Cavity energy at normal incidence, eV.
    n_eff
        Effective index (dimensionless).

    Returns
    -------
    ndarray
        m_C in units of the electron rest mass (typically a few 1e-5).
    """
    return np.asarray(e_c0, dtype=float) * np.square(np.asarray(n_eff, dtype=float)) / ME_C2_EV


def angle_to_k(angle_deg: ArrayLike, energy_ev: ArrayLike) -> NDArray:
    """In-plane wavevector of light leaving at ``angle_deg`` with photon energy ``energy_ev``.

    ``k = E sin(theta) / (hbar c)``; with E in eV and k in 1/um,
    ``k = 5.0677... E sin(theta)`` (hbar c from CODATA).

    Parameters
    ----------
    angle_deg
        External angle, degree.
    energy_ev
        Photon energy, eV.

    Returns
    -------
    ndarray
        k in 1/um.
    """
    s = np.sin(np.deg2rad(np.asarray(angle_deg, dtype=float)))
    return np.asarray(energy_ev, dtype=float) * s / HBARC_EV_UM


def k_to_angle(k: ArrayLike, energy_ev: ArrayLike) -> NDArray:
    """External angle (degree) at which a photon of energy ``energy_ev`` has in-plane ``k``.

    ``theta = arcsin(hbar c k / E)``, the inverse of :func:`angle_to_k`.

    Parameters
    ----------
    k
        In-plane wavevector, 1/um.
    energy_ev
        Photon energy, eV.

    Returns
    -------
    ndarray
        Angle in degrees.

    Raises
    ------
    DataError
        If ``|hbar c k / E| > 1`` anywhere (light of that energy cannot carry that
        in-plane wavevector in vacuum).
    """
    s = HBARC_EV_UM * np.asarray(k, dtype=float) / np.asarray(energy_ev, dtype=float)
    bad = ~(np.abs(s) <= 1.0)
    if np.any(bad):
        worst = np.abs(s[bad]).max() if s.ndim else abs(float(s))
        raise DataError(
            "expected |hbar c k / E| <= 1 (a propagating photon), found "
            f"{np.count_nonzero(bad)} value(s), the largest {worst:.4g}. Check that k is in "
            "1/um and the energy in eV, or crop the k axis to the light cone.",
            field="k",
        )
    return np.rad2deg(np.arcsin(s))


def two_mode_eigenvalues(
    e_c: ArrayLike,
    e_x: ArrayLike,
    g: ArrayLike,
    gamma_c: ArrayLike = 0.0,
    gamma_x: ArrayLike = 0.0,
) -> tuple[NDArray, NDArray]:
    """Complex energies of the lower and upper polariton (closed form, 2x2).

    Eigenvalues of ``H = [[E_C - i gamma_C/2, g], [g, E_X - i gamma_X/2]]``::

        E = (E_C + E_X)/2 - i (gamma_C + gamma_X)/4
            -/+ sqrt(g^2 + (delta - i (gamma_C - gamma_X)/2)^2 / 4),  delta = E_C - E_X

    The principal square root (real part >= 0) is taken, so the lower branch has
    the smaller real part everywhere and both real parts are continuous in every
    parameter (the cut of the principal root lies where its real part vanishes).
    Below the exceptional point, ``g < |gamma_C - gamma_X|/4`` at ``delta = 0``, the two
    real parts coincide and the labels then follow the real part, as required.
    Source: Savona et al., Solid State Commun. 93, 733 (1995); Hermitian limit in
    Hopfield, Phys. Rev. 112, 1555 (1958).

    Parameters
    ----------
    e_c, e_x
        Cavity and exciton energies, eV (``e_c`` usually already angle-dependent).
    g
        Coupling, eV (Rabi splitting ``2 g``).
    gamma_c, gamma_x
        FWHM linewidths of the bare modes, eV.

    Returns
    -------
    lower, upper : ndarray of complex
        ``Re`` is the branch energy (eV), ``-2 Im`` its FWHM (eV).
    """
    e_c = np.asarray(e_c, dtype=float)
    e_x = np.asarray(e_x, dtype=float)
    g = np.asarray(g, dtype=float)
    gamma_c = np.asarray(gamma_c, dtype=float)
    gamma_x = np.asarray(gamma_x, dtype=float)
    mean = 0.5 * (e_c + e_x) - 0.25j * (gamma_c + gamma_x)
    half = 0.5 * ((e_c - e_x) - 0.5j * (gamma_c - gamma_x))
    root = np.sqrt(g * g + half * half)
    return mean - root, mean + root


def hopfield_fractions(
    e_c: ArrayLike, e_x: ArrayLike, g: ArrayLike, *, branch: str = "lower"
) -> tuple[NDArray, NDArray]:
    """Exciton and photon fractions (Hopfield coefficients squared) of a polariton branch.

    For the lower polariton, with ``delta = E_C - E_X``::

        |X|^2 = (1 + delta / sqrt(delta^2 + 4 g^2)) / 2,    |C|^2 = 1 - |X|^2

    and for the upper polariton the two swap.  Source: Hopfield, Phys. Rev. 112,
    1555 (1958).  At ``g = 0`` and ``delta = 0`` the fractions are undefined; 1/2 is
    returned there (the limit ``g -> 0`` at resonance).

    Parameters
    ----------
    e_c, e_x
        Cavity and exciton energies, eV.
    g
        Coupling, eV.
    branch
        ``"lower"`` (default) or ``"upper"``.

    Returns
    -------
    exciton_fraction, photon_fraction : ndarray
        ``|X|^2`` and ``|C|^2`` of the requested branch, in [0, 1], summing to 1.
    """
    if branch not in ("lower", "upper"):
        raise DataError(f"expected 'lower' or 'upper', found {branch!r}.", field="branch")
    delta = np.asarray(e_c, dtype=float) - np.asarray(e_x, dtype=float)
    root = np.hypot(delta, 2.0 * np.asarray(g, dtype=float))
    ratio = np.divide(delta, root, out=np.zeros(np.broadcast(delta, root).shape), where=root > 0)
    x2 = 0.5 * (1.0 + ratio)
    c2 = 0.5 * (1.0 - ratio)
    return (x2, c2) if branch == "lower" else (c2, x2)


@dataclass(frozen=True)
class CoupledModes:
    """Eigen-solution of one photon coupled to N excitons, branches sorted by real part.

    Attributes
    ----------
    energies
        Complex branch energies, shape ``(..., N+1)``, eV; ``-2 Im`` is the FWHM.
    photon_fraction
        Photon weight of each branch, shape ``(..., N+1)``.
    exciton_fraction
        Weight of each exciton in each branch, shape ``(..., N, N+1)`` (exciton, branch).
    residues
        Photon residues ``r_b = V[0, b] Vinv[b, 0]``, shape ``(..., N+1)``, complex, so that
        ``G_CC(E) = sum_b r_b / (E - energies_b)``; they sum to 1.
    """

    energies: NDArray
    photon_fraction: NDArray
    exciton_fraction: NDArray
    residues: NDArray


def _as_modes(value) -> list:
    if isinstance(value, (list, tuple)):
        return list(value)
    return [value]


def coupled_modes(
    e_c: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike = 0.0,
    gamma_x: ArrayLike | Sequence[ArrayLike] = 0.0,
) -> CoupledModes:
    """Batched eigen-solution of one cavity photon coupled to N excitons (N >= 1).

    Hamiltonian (excitons couple only to the photon, not to each other)::

        H = [[E_C - i gamma_C/2, g_1,                ..., g_N               ],
             [g_1,               E_X1 - i gamma_X1/2,  0,  ...              ],
             ...
             [g_N,               0,                  ..., E_XN - i gamma_XN/2]]

    solved with :func:`numpy.linalg.eig` on a ``(..., N+1, N+1)`` stack and sorted by the
    real part of the eigenvalues.  Source: the N-oscillator generalisation of
    Hopfield, Phys. Rev. 112, 1555 (1958).

    Fractions in the non-Hermitian case: each right eigenvector ``v_b`` is scaled to
    unit Euclidean norm and the fractions are ``|v_b[i]|^2`` (they sum to 1 per branch
    and reduce to the Hopfield coefficients at zero linewidth).  The photon residues
    use the right and left eigenvectors, ``r_b = V[0, b] (V^-1)[b, 0]``, and do not
    depend on that scaling; they are complex when the linewidths differ.  At an
    exceptional point ``V`` is singular and the residues diverge (the Green's function
    then has a double pole).

    Parameters
    ----------
    e_c
        Cavity energy, eV.
    e_x
        Exciton energy, eV: one array, or a list/tuple of N arrays (one per exciton).
    g
        Coupling of each exciton to the photon, eV: like ``e_x``.
    gamma_c
        Cavity FWHM, eV.
    gamma_x
        Exciton FWHM(s), eV: one array (shared by all excitons) or a list of N.

    Returns
    -------
    CoupledModes
        Branch energies, fractions and photon residues with batch shape broadcast
        from all arguments.
    """
    ex = _as_modes(e_x)
    gs = _as_modes(g)
    gx = _as_modes(gamma_x)
    n = len(ex)
    if len(gx) == 1 and n > 1:
        gx = gx * n
    if len(gs) != n or len(gx) != n:
        raise DataError(
            f"expected one coupling and one linewidth per exciton ({n} excitons), found "
            f"{len(gs)} coupling(s) and {len(gx)} linewidth(s). Pass lists of equal length.",
            field="g",
        )
    arrays = [np.asarray(a, dtype=float) for a in (e_c, gamma_c, *ex, *gs, *gx)]
    shape = np.broadcast_shapes(*(a.shape for a in arrays))
    h = np.zeros(shape + (n + 1, n + 1), dtype=complex)
    h[..., 0, 0] = np.asarray(e_c, dtype=float) - 0.5j * np.asarray(gamma_c, dtype=float)
    for j in range(n):
        h[..., j + 1, j + 1] = np.asarray(ex[j], float) - 0.5j * np.asarray(gx[j], float)
        h[..., 0, j + 1] = gs[j]
        h[..., j + 1, 0] = gs[j]
    vals, vecs = np.linalg.eig(h)
    order = np.argsort(vals.real, axis=-1, kind="stable")
    vals = np.take_along_axis(vals, order, axis=-1)
    vecs = np.take_along_axis(vecs, order[..., None, :], axis=-1)
    inv = np.linalg.inv(vecs)
    residues = vecs[..., 0, :] * inv[..., :, 0]
    weight = np.abs(vecs) ** 2
    weight /= weight.sum(axis=-2, keepdims=True)
    return CoupledModes(
        energies=vals,
        photon_fraction=weight[..., 0, :],
        exciton_fraction=weight[..., 1:, :],
        residues=residues,
    )


def lp_effective_mass(
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    e_x: ArrayLike,
    g: ArrayLike,
    *,
    m_x: ArrayLike = DEFAULT_EXCITON_MASS_ME,
    branch: str = "lower",
) -> NDArray:
    """Polariton effective mass at ``k = 0``, in electron masses.

    ``1/m_LP = |C|^2 / m_C + |X|^2 / m_X`` with the Hopfield fractions at ``k = 0``
    (detuning ``E_C0 - E_X``) and ``m_C = E_C0 n_eff^2 / c^2`` (:func:`photon_mass`).  For
    the Hermitian two-mode model this is the exact curvature of the branch at
    ``k = 0`` (the mixing angle is stationary there).  Source: e.g. Deng, Haug and
    Yamamoto, Rev. Mod. Phys. 82, 1489 (2010) [from memory].

    Parameters
    ----------
    e_c0, n_eff, e_x, g
        Cavity energy at normal incidence (eV), effective index, exciton energy (eV),
        coupling (eV).
    m_x
        In-plane exciton mass in electron masses; default 0.5 (GaAs order of
        magnitude, value from memory).  ``numpy.inf`` drops the exciton term; the
        difference is about 1e-4 relative for GaAs.
    branch
        ``"lower"`` (default) or ``"upper"`` (the same formula with the fractions of
        the upper branch, which is again the exact Hermitian curvature at ``k = 0``).

    Returns
    -------
    ndarray
        Polariton mass in electron masses.
    """
    x2, c2 = hopfield_fractions(e_c0, e_x, g, branch=branch)
    m_c = photon_mass(e_c0, n_eff)
    return 1.0 / (c2 / m_c + x2 / np.asarray(m_x, dtype=float))


def lifetime_ps(gamma_mev: ArrayLike) -> NDArray:
    """Lifetime (ps) of a mode with energy FWHM ``gamma_mev`` (meV): ``tau = hbar / gamma``.

    With CODATA hbar = 0.6582119569 meV ps, 1 meV corresponds to 0.658 ps.  This is
    the decay time of the population (``|psi|^2 ~ exp(-gamma t / hbar)``).

    Parameters
    ----------
    gamma_mev
        FWHM linewidth in meV.

    Returns
    -------
    ndarray
        Lifetime in ps.
    """
    return HBAR_MEV_PS / np.asarray(gamma_mev, dtype=float)


def quality_factor(energy_ev: ArrayLike, gamma_mev: ArrayLike) -> NDArray:
    """Quality factor ``Q = E / gamma`` of a mode at ``energy_ev`` (eV), FWHM ``gamma_mev`` (meV).

    For the cavity, ``Q = E_C0 / gamma_C``.  Source: definition of Q for a resonance.

    Parameters
    ----------
    energy_ev
        Mode energy, eV.
    gamma_mev
        FWHM linewidth, meV.

    Returns
    -------
    ndarray
        Dimensionless Q.
    """
    return 1e3 * np.asarray(energy_ev, dtype=float) / np.asarray(gamma_mev, dtype=float)
