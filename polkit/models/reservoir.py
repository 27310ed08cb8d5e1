"""Nonresonant drive: a polariton mode fed by an exciton reservoir (mean-field rate equations).

Wouters and Carusotto, Phys. Rev. Lett. 99, 140402 (2007), with the spontaneous-scattering
term of laser rate equations that smooths the threshold:

    dn_R/dt = P - gamma_R n_R - R n_R (n_C + 1)
    dn_C/dt = R n_R (n_C + 1) - gamma_C n_C

``n_R`` is the reservoir population and ``n_C`` the occupation of the polariton mode
(both dimensionless numbers), ``P`` the rate at which the pump creates reservoir
excitons (1/ps), ``gamma_R`` and ``gamma_C`` the population decay rates (1/ps; a
linewidth FWHM ``gamma`` in meV gives ``gamma / hbar``, see :func:`decay_rate`), and
``R`` the stimulated scattering rate per reservoir exciton (1/ps).

Derived scales: threshold ``P_th = gamma_R gamma_C / R`` and saturation number
``n_s = gamma_R / R``.  Without the ``+1`` the threshold is sharp (the limit
``n_s -> infinity`` of the closed forms below).  Times in ps, rates in 1/ps,
interaction constants in ueV um^2, areas in um^2, blueshifts in meV.
"""

from __future__ import annotations

import functools
import logging
from collections.abc import Callable
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.integrate import solve_ivp

from polkit._checks import real_array
from polkit.constants import HBAR_MEV_PS
from polkit.errors import DataError, FitError

logger = logging.getLogger(__name__)

__all__ = [
    "ReservoirState",
    "ReservoirTrajectory",
    "decay_rate",
    "saturation_number",
    "threshold_power",
    "condensate_occupation",
    "reservoir_fraction",
    "steady_state",
    "blueshift",
    "emission_rate",
    "integrate",
]


class ReservoirState(NamedTuple):
    """Steady-state populations (dimensionless): reservoir ``n_R`` and polariton mode ``n_C``."""

    n_R: NDArray
    n_C: NDArray


class ReservoirTrajectory(NamedTuple):
    """A time integration of the rate equations: times (ps) and populations."""

    t_ps: NDArray
    n_R: NDArray
    n_C: NDArray


_checked = functools.partial(
    real_array,
    positive_text="expected values > 0 (a rate or a scale), found minimum {minimum:g}",
    nonneg_text="expected values >= 0 (a pump rate or a population), found minimum {minimum:g}",
)


def decay_rate(linewidth_meV: ArrayLike) -> NDArray:
    """Population decay rate (1/ps) of a Lorentzian line of FWHM ``linewidth_meV``.

    ``Gamma = gamma / hbar`` (energy-time relation of an exponential decay; hbar from
    CODATA via :mod:`scipy.constants`), e.g. 1 meV -> 1.519 / ps, lifetime 0.658 ps.
    """
    return _checked("linewidth_meV", linewidth_meV, positive=True) / HBAR_MEV_PS


def saturation_number(gamma_R: ArrayLike, R: ArrayLike) -> NDArray:
    """Saturation number ``n_s = gamma_R / R`` (dimensionless).

    Across threshold the slope of ``n_C`` against ``x = P / P_th`` grows from about 1 to
    ``n_s`` (Wouters and Carusotto, PRL 99, 140402, 2007, with the spontaneous term of
    laser rate equations), so the jump of the emission measures ``n_s``.
    """
    return _checked("gamma_R", gamma_R, positive=True) / _checked("R", R, positive=True)


def threshold_power(gamma_R: ArrayLike, gamma_C: ArrayLike, R: ArrayLike) -> NDArray:
    """Threshold pump rate ``P_th = gamma_R gamma_C / R`` in 1/ps.

    Source: Wouters and Carusotto, Phys. Rev. Lett. 99, 140402 (2007).
    """
    g_r = _checked("gamma_R", gamma_R, positive=True)
    g_c = _checked("gamma_C", gamma_C, positive=True)
    return g_r * g_c / _checked("R", R, positive=True)


def condensate_occupation(x: ArrayLike, n_s: ArrayLike) -> NDArray:
    """Steady-state mode occupation ``n_C`` as a function of ``x = P / P_th`` and ``n_s``.

    Derivation.  In steady state ``R n_R (n_C + 1) = gamma_C n_C`` (mode equation); adding
    the reservoir equation gives ``P = gamma_R n_R + gamma_C n_C``, so
    ``n_R = (P - gamma_C n_C) / gamma_R``.  Substituting, dividing by ``gamma_C`` and
    using ``P / gamma_C = x n_s`` (since ``P_th = gamma_C n_s``):

        (x n_s - n_C)(n_C + 1) = n_s n_C
        n_C^2 - b n_C - x n_s = 0,   b = n_s (x - 1) - 1.

    The product of the roots is ``-x n_s <= 0``, so exactly one root is >= 0:

        n_C = [b + sqrt(b^2 + 4 x n_s)] / 2                   (b >= 0)
            = 2 x n_s / [sqrt(b^2 + 4 x n_s) - b]             (b < 0)

    the second form being the same root without cancellation (stable quadratic
    formula).  Limits: below threshold (``n_s >> 1``) ``n_C -> x / (1 - x)``; far above
    ``n_C -> n_s (x - 1)``, i.e. ``(P - P_th) / gamma_C`` (Wouters and Carusotto, PRL 99,
    140402, 2007); at ``x = 1``, ``n_C ~ sqrt(n_s)``.

    Parameters
    ----------
    x
        Pump in units of threshold, ``P / P_th`` >= 0.
    n_s
        Saturation number ``gamma_R / R`` > 0.

    Returns
    -------
    ndarray
        ``n_C`` (dimensionless), broadcast over the inputs.
    """
    x = _checked("x", x, nonneg=True)
    n_s = _checked("n_s", n_s, positive=True)
    b = n_s * (x - 1.0) - 1.0
    c = x * n_s
    root = np.sqrt(b * b + 4.0 * c)
    with np.errstate(divide="ignore", invalid="ignore"):
        small = 2.0 * c / (root - b)
    return np.where(b >= 0, 0.5 * (b + root), np.where(c == 0, 0.0, small))


def reservoir_fraction(x: ArrayLike, n_s: ArrayLike) -> NDArray:
    """Reservoir population over its clamped value: ``n_R / n_R,th``, ``n_R,th = gamma_C / R``.

    From the mode equation ``R n_R (n_C + 1) = gamma_C n_C``:

        n_R / n_R,th = n_C / (n_C + 1),

    with ``n_C`` from :func:`condensate_occupation`.  Below threshold (``n_s >> 1``)
    this is ``x`` (``n_R = P / gamma_R``, linear); far above it tends to 1 (clamping,
    Wouters and Carusotto, PRL 99, 140402, 2007).

    Parameters
    ----------
    x, n_s
        As in :func:`condensate_occupation`.

    Returns
    -------
    ndarray
        ``n_R / n_R,th`` in [0, 1).
    """
    n_c = condensate_occupation(x, n_s)
    return n_c / (n_c + 1.0)


def steady_state(
    P: ArrayLike, gamma_R: ArrayLike, gamma_C: ArrayLike, R: ArrayLike
) -> ReservoirState:
    """Algebraic steady state ``(n_R, n_C)`` of the reservoir rate equations.

    ``n_C`` from :func:`condensate_occupation` with ``x = P / P_th``,
    ``P_th = gamma_R gamma_C / R``, ``n_s = gamma_R / R``; ``n_R = (gamma_C / R)
    n_C / (n_C + 1)`` (Wouters and Carusotto, PRL 99, 140402, 2007, with the spontaneous
    term; derivation in :func:`condensate_occupation`).

    Parameters
    ----------
    P
        Pump rate into the reservoir, 1/ps, >= 0.
    gamma_R, gamma_C
        Reservoir and polariton population decay rates, 1/ps, > 0.
    R
        Stimulated scattering rate, 1/ps, > 0.

    Returns
    -------
    ReservoirState
        ``n_R`` and ``n_C``, broadcast over the inputs.
    """
    p = _checked("P", P, nonneg=True)
    g_r = _checked("gamma_R", gamma_R, positive=True)
    g_c = _checked("gamma_C", gamma_C, positive=True)
    r = _checked("R", R, positive=True)
    n_s = g_r / r
    x = p / (g_c * n_s)
    n_c = condensate_occupation(x, n_s)
    n_r = (g_c / r) * (n_c / (n_c + 1.0))
    return ReservoirState(n_r, n_c)


def blueshift(
    n_C: ArrayLike,
    n_R: ArrayLike,
    g_C: ArrayLike,
    g_R: ArrayLike,
    area_um2: ArrayLike,
    area_R_um2: ArrayLike | None = None,
) -> NDArray:
    """Mean-field blueshift of the polariton mode in meV.

    ``Delta E = g_C n_C / A + g_R n_R / A_R`` (Wouters and Carusotto, PRL 99, 140402,
    2007, with populations turned into densities by the mode area ``A`` and reservoir
    area ``A_R``); ``1 ueV um^2 x 1/um^2 = 1e-3 meV``.

    Parameters
    ----------
    n_C, n_R
        Mode and reservoir populations (dimensionless).
    g_C, g_R
        Polariton-polariton and polariton-reservoir interaction constants, ueV um^2.
    area_um2
        Mode area in um^2, > 0.
    area_R_um2
        Reservoir area in um^2 (default: the mode area).

    Returns
    -------
    ndarray
        Blueshift in meV.
    """
    a = _checked("area_um2", area_um2, positive=True)
    a_r = a if area_R_um2 is None else _checked("area_R_um2", area_R_um2, positive=True)
    n_c = _checked("n_C", n_C, nonneg=True)
    n_r = _checked("n_R", n_R, nonneg=True)
    g_c = _checked("g_C", g_C)
    g_r = _checked("g_R", g_R)
    return 1e-3 * (g_c * n_c / a + g_r * n_r / a_r)


def emission_rate(n_C: ArrayLike, gamma_C: ArrayLike) -> NDArray:
    """Rate at which polaritons leave the mode as photons, ``gamma_C n_C`` in 1/ps.

    The detected emission is this times the collection and detection efficiencies
    (Wouters and Carusotto, PRL 99, 140402, 2007: the loss term of the mode equation).
    """
    return _checked("n_C", n_C, nonneg=True) * _checked("gamma_C", gamma_C, positive=True)


def integrate(
    P: float | Callable[[float], float],
    gamma_R: float,
    gamma_C: float,
    R: float,
    *,
    t_end_ps: float,
    t_eval_ps: ArrayLike | None = None,
    initial: tuple[float, float] = (0.0, 0.0),
    method: str = "LSODA",
    rtol: float = 1e-10,
    atol: float = 1e-12,
) -> ReservoirTrajectory:
    """Integrate the reservoir rate equations in time with :func:`scipy.integrate.solve_ivp`.

    The equations are those of the module docstring (Wouters and Carusotto, PRL 99,
    140402, 2007, with the spontaneous term), solved with a stiff-capable method and the
    analytic Jacobian ``[[-gamma_R - R(n_C+1), -R n_R], [R(n_C+1), R n_R - gamma_C]]``.
    Used as the independent check of :func:`steady_state` and to follow a time-dependent
    pump.  Scalar parameters only (one trajectory per call).

    Parameters
    ----------
    P
        Pump rate (1/ps): a number, or a function of time in ps.
    gamma_R, gamma_C, R
        Rates in 1/ps, > 0.
    t_end_ps
        End time in ps, > 0.
    t_eval_ps
        Times at which to report (default: the solver's own steps).
    initial
        ``(n_R, n_C)`` at t = 0.
    method
        A stiff-capable :func:`scipy.integrate.solve_ivp` method: ``"LSODA"``, ``"Radau"``
        or ``"BDF"``.
    rtol, atol
        Solver tolerances.

    Returns
    -------
    ReservoirTrajectory
        ``t_ps``, ``n_R``, ``n_C``.

    Raises
    ------
    FitError
        If the solver reports a failure.
    """
    if method not in ("LSODA", "Radau", "BDF"):
        raise DataError(
            f"expected a stiff-capable method 'LSODA', 'Radau' or 'BDF', found {method!r}",
            field="method",
        )
    g_r = float(_checked("gamma_R", gamma_R, positive=True))
    g_c = float(_checked("gamma_C", gamma_C, positive=True))
    r = float(_checked("R", R, positive=True))
    t_end = float(_checked("t_end_ps", t_end_ps, positive=True))
    n0 = _checked("initial", initial, nonneg=True)
    if n0.shape != (2,):
        raise DataError(f"expected (n_R, n_C), found shape {n0.shape}", field="initial")
    if callable(P):
        pump = P
    else:
        p_const = float(_checked("P", P, nonneg=True))

        def pump(t: float) -> float:
            return p_const

    def rhs(t, n):
        scatter = r * n[0] * (n[1] + 1.0)
        return [pump(t) - g_r * n[0] - scatter, scatter - g_c * n[1]]

    def jac(t, n):
        return [[-g_r - r * (n[1] + 1.0), -r * n[0]], [r * (n[1] + 1.0), r * n[0] - g_c]]

    t_eval = None if t_eval_ps is None else np.asarray(t_eval_ps, dtype=float)
    sol = solve_ivp(
        rhs, (0.0, t_end), n0, method=method, t_eval=t_eval, jac=jac, rtol=rtol, atol=atol
    )
    if not sol.success:
        raise FitError(f"reservoir rate equations: solve_ivp ({method}) failed: {sol.message}")
    logger.debug("reservoir integration: %d steps, %d evaluations", sol.t.size, sol.nfev)
    return ReservoirTrajectory(sol.t, sol.y[0], sol.y[1])
