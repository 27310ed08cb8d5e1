"""Green's function of the cavity photon coupled to one or several excitons.

The photon element ``G_CC(E)`` of the resolvent of the coupled-oscillator Hamiltonian,
the exciton propagator (optionally averaged over a Gaussian disorder of exciton
energies) and the photon spectral function ``A_C = -Im G_CC / pi``.  The whole-map bases
of :mod:`polkit.models.spectral` are built from them.

All energies, couplings and linewidths are in **eV** (``gamma`` always a FWHM).  A Python
*list or tuple* given for ``e_x``, ``g``, ``gamma_x`` or ``sigma_x`` means *several
excitons* (one entry each); a walker batch is an ndarray.  Everything broadcasts: the
caller lines up the axes.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import wofz

from polkit.errors import DataError

__all__ = [
    "exciton_propagator",
    "photon_green",
    "photon_spectral_function",
]

_SQRT_HALF_PI = np.sqrt(0.5 * np.pi)
_SQRT2 = np.sqrt(2.0)


def _modes(value) -> list:
    return list(value) if isinstance(value, (list, tuple)) else [value]


def _exciton_lists(e_x, g, gamma_x, sigma_x):
    ex, gs, gx = _modes(e_x), _modes(g), _modes(gamma_x)
    sx = [None] if sigma_x is None else _modes(sigma_x)
    n = len(ex)
    if len(gx) == 1:
        gx = gx * n
    if len(sx) == 1:
        sx = sx * n
    if not (len(gs) == len(gx) == len(sx) == n):
        raise DataError(
            f"expected one value per exciton ({n} exciton energies), found {len(gs)} "
            f"coupling(s), {len(gx)} linewidth(s) and {len(sx)} disorder width(s). "
            "Pass lists of equal length (or a single shared linewidth/disorder).",
            field="g",
        )
    return ex, gs, gx, sx


def exciton_propagator(
    energy_ev: ArrayLike,
    e_x: ArrayLike,
    gamma_x: ArrayLike,
    sigma_x: ArrayLike | None = None,
) -> NDArray:
    """Exciton propagator, optionally averaged over a Gaussian distribution of exciton energies.

    Without disorder, ``S(E) = 1 / (E - E_X + i gamma_X / 2)``.  With a Gaussian
    inhomogeneous distribution ``N(x; E_X, sigma)`` of exciton energies::

        S(E) = int N(x; E_X, sigma) / (E - x + i gamma_X/2) dx
             = -i sqrt(pi/2) / sigma * w((E - E_X + i gamma_X/2) / (sqrt(2) sigma))

    with ``w`` the Faddeeva function (:func:`scipy.special.wofz`).  Source: the
    integral representation ``w(z) = (i/pi) int exp(-t^2) / (z - t) dt`` for
    ``Im z > 0`` (Abramowitz and Stegun 7.1.4); the same construction underlies the
    Voigt profile.  Where ``sigma_x == 0`` the Lorentzian form is used.

    Parameters
    ----------
    energy_ev
        Energy, eV.
    e_x
        Mean exciton energy, eV.
    gamma_x
        Homogeneous exciton FWHM, eV.
    sigma_x
        Standard deviation of the Gaussian exciton-energy disorder, eV (``None`` or 0:
        no disorder).

    Returns
    -------
    ndarray of complex
        ``S(E)`` in 1/eV, broadcast over the arguments.
    """
    z = (np.asarray(energy_ev, float) - np.asarray(e_x, float)) + 0.5j * np.asarray(gamma_x, float)
    if sigma_x is None:
        return 1.0 / z
    sigma = np.asarray(sigma_x, float)
    if np.any(sigma < 0):
        raise DataError(f"expected sigma_x >= 0 eV, found min {sigma.min():.3g}.", field="sigma_x")
    positive = sigma > 0
    if np.all(positive):
        return (-1j * _SQRT_HALF_PI / sigma) * wofz(z / (_SQRT2 * sigma))
    safe = np.where(positive, sigma, 1.0)
    averaged = (-1j * _SQRT_HALF_PI / safe) * wofz(z / (_SQRT2 * safe))
    return np.where(positive, averaged, 1.0 / z)


def photon_green(
    energy_ev: ArrayLike,
    e_c: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    *,
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
) -> NDArray:
    """Photon-photon element ``G_CC(E)`` of the resolvent of the coupled-oscillator Hamiltonian.

    One photon coupled to N excitons that couple only to the photon::

        G_CC(E) = 1 / (E - E_C + i gamma_C/2 - sum_j g_j^2 S_j(E))

    with ``S_j`` from :func:`exciton_propagator`.  For one Lorentzian exciton this is
    evaluated in the closed form ``(E - E_X + i gamma_X/2) /
    ((E - E_C + i gamma_C/2)(E - E_X + i gamma_X/2) - g^2)`` (the photon element of the resolvent
    ``(E - H)^-1`` of the coupled-oscillator matrix, by Cramer's rule).
    Source: resolvent of the two-level (N-level) Hamiltonian by the Schur complement,
    e.g. Savona et al., Solid State Commun. 93, 733 (1995).

    Pure broadcasting: the caller lines up the axes (e.g. ``energy_ev`` of shape ``(E,)``
    and parameters of shape ``(W, A, 1)``).

    Parameters
    ----------
    energy_ev
        Energy, eV.
    e_c
        Cavity energy (angle-dependent if wanted), eV.
    e_x, g, gamma_x
        Exciton energy, coupling and FWHM, eV; a list/tuple of arrays for several
        excitons (a single ``gamma_x`` is shared).
    gamma_c
        Cavity FWHM, eV.
    sigma_x
        Gaussian exciton-energy disorder (standard deviation, eV), one shared or a list.

    Returns
    -------
    ndarray of complex
        ``G_CC`` in 1/eV.
    """
    ex, gs, gx, sx = _exciton_lists(e_x, g, gamma_x, sigma_x)
    energy = np.asarray(energy_ev, float)
    cav = energy - np.asarray(e_c, float) + 0.5j * np.asarray(gamma_c, float)
    if len(ex) == 1 and sx[0] is None:
        xt = energy - np.asarray(ex[0], float) + 0.5j * np.asarray(gx[0], float)
        return xt / (cav * xt - np.square(np.asarray(gs[0], float)))
    total = cav
    for e, c, w, s in zip(ex, gs, gx, sx, strict=True):
        total = total - np.square(np.asarray(c, float)) * exciton_propagator(energy, e, w, s)
    return 1.0 / total


def photon_spectral_function(
    energy_ev: ArrayLike,
    e_c: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    *,
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
) -> NDArray:
    """Photon spectral function ``A_C(E) = -Im G_CC(E) / pi`` (1/eV).

    It carries the photon-fraction weight of each branch and integrates to 1 over
    energy (sum rule).  Arguments as in :func:`photon_green`.

    Returns
    -------
    ndarray
        ``A_C`` in 1/eV.
    """
    return -photon_green(energy_ev, e_c, e_x, g, gamma_c, gamma_x, sigma_x=sigma_x).imag / np.pi

