"""Coherent (resonant) drive of one polariton mode: the Gross-Pitaevskii steady state.

A single mode with population ``n`` (number of polaritons), blueshift per polariton
``alpha = g_LP / A_eff`` and linewidth ``gamma`` (FWHM), pumped at detuning
``Delta = E_pump - E_LP`` by a laser of power ``P`` coupled with strength ``kappa``, obeys
in the frame rotating at the pump frequency

    i hbar dpsi/dt = (-Delta - i gamma/2 + alpha |psi|^2) psi + sqrt(kappa P),

whose steady states satisfy

    n [(Delta - alpha n)^2 + (gamma/2)^2] = kappa P.

With ``y = alpha n`` (the blueshift, meV) this is a cubic in ``y``,

    y [(Delta - y)^2 + (gamma/2)^2] = alpha kappa P =: F,

with one real root, or three when the mode is bistable (Baas et al., Phys. Rev. A 69,
023809, 2004; Drummond and Walls, J. Phys. A 13, 725, 1980).  Only the combination
``F`` (the *drive*, meV^3) fixes the blueshift, so a blueshift-only fit identifies
``alpha kappa``, not ``alpha`` and ``kappa`` apart.

Units: ``delta``, ``gamma`` and the blueshift in meV, ``drive`` in meV^3, ``alpha`` in meV
per polariton.  Every function broadcasts its arguments against each other: give the
walker parameters a shape ``(W, 1)`` and the drive axis a shape ``(N,)``.
"""

from __future__ import annotations

import functools
import logging
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit._checks import real_array
from polkit.errors import DataError

logger = logging.getLogger(__name__)

__all__ = [
    "TurningPoints",
    "drive_for_blueshift",
    "turning_points",
    "blueshift_roots",
    "steady_state_sweep",
    "transmitted_intensity",
]

#: Bistability threshold of Delta / gamma (Baas et al., Phys. Rev. A 69, 023809, 2004).
BISTABILITY_RATIO: float = float(np.sqrt(3.0) / 2.0)

_NEWTON_STEPS = 4


class TurningPoints(NamedTuple):
    """The two turning points of the S-shaped response; every field is NaN where not bistable.

    Attributes
    ----------
    blueshift_low
        Blueshift (meV) where the lower branch ends: ``(2 Delta - sqrt(Delta^2 - 3 gamma^2/4))/3``.
    blueshift_high
        Blueshift (meV) where the upper branch ends: ``(2 Delta + sqrt(Delta^2 - 3 gamma^2/4))/3``.
    drive_up
        Drive F (meV^3) at ``blueshift_low``: an up sweep jumps to the upper branch above it.
    drive_down
        Drive F (meV^3) at ``blueshift_high``: a down sweep falls to the lower branch below it.
    """

    blueshift_low: NDArray
    blueshift_high: NDArray
    drive_up: NDArray
    drive_down: NDArray


_checked = functools.partial(
    real_array,
    finite_hint="; remove or mask them before calling the model",
    positive_text="expected values > 0, found minimum {minimum:g}; a linewidth is a positive FWHM",
    nonneg_text="expected values >= 0, found minimum {minimum:g}; the drive alpha*kappa*P is a "
    "non-negative power times non-negative constants",
)


def _broadcast(**arrays: NDArray) -> list[NDArray]:
    try:
        return list(np.broadcast_arrays(*arrays.values()))
    except ValueError as exc:
        shapes = ", ".join(f"{k} {np.shape(v)}" for k, v in arrays.items())
        raise DataError(
            f"shapes do not broadcast: {shapes}; give walker parameters a shape (W, 1) "
            "against a drive axis of shape (N,)",
            field=next(iter(arrays)),
        ) from exc


def _cubic(y, delta, gamma, drive):
    """Residual f(y) = y[(Delta - y)^2 + gamma^2/4] - F and its derivative."""
    d = delta - y
    g2 = 0.25 * gamma * gamma
    f = y * (d * d + g2) - drive
    fp = 3.0 * y * y - 4.0 * delta * y + delta * delta + g2
    return f, fp


def drive_for_blueshift(blueshift: ArrayLike, delta: ArrayLike, gamma: ArrayLike) -> NDArray:
    """The drive that holds a given blueshift: the inverse (S-shaped) response.

    ``F(y) = y [(Delta - y)^2 + (gamma/2)^2]`` (Baas et al., Phys. Rev. A 69, 023809, 2004).

    Parameters
    ----------
    blueshift
        Blueshift ``y = alpha n`` in meV.
    delta
        Pump detuning ``Delta = E_pump - E_LP`` in meV.
    gamma
        Linewidth (FWHM) in meV.

    Returns
    -------
    ndarray
        Drive ``F = alpha kappa P`` in meV^3, broadcast over the inputs.
    """
    y = _checked("blueshift", blueshift)
    d = _checked("delta", delta)
    g = _checked("gamma", gamma, positive=True)
    y, d, g = _broadcast(blueshift=y, delta=d, gamma=g)
    return y * ((d - y) ** 2 + 0.25 * g * g)


def turning_points(delta: ArrayLike, gamma: ArrayLike) -> TurningPoints:
    """Turning points of the bistable response, NaN where the mode is not bistable.

    ``dF/dy = 3 y^2 - 4 Delta y + Delta^2 + gamma^2/4 = 0`` gives

        y = (2 Delta -/+ sqrt(Delta^2 - 3 gamma^2/4)) / 3,

    real and distinct (bistability) iff ``Delta > (sqrt(3)/2) gamma`` (Baas et al.,
    Phys. Rev. A 69, 023809, 2004).  The drives at these blueshifts follow from
    :func:`drive_for_blueshift`; the lower blueshift has the larger drive.

    Parameters
    ----------
    delta
        Pump detuning ``E_pump - E_LP`` in meV.
    gamma
        Linewidth (FWHM) in meV, > 0.

    Returns
    -------
    TurningPoints
        ``blueshift_low``, ``blueshift_high`` (meV), ``drive_up``, ``drive_down`` (meV^3),
        each NaN where ``Delta <= (sqrt(3)/2) gamma``.
    """
    d = _checked("delta", delta)
    g = _checked("gamma", gamma, positive=True)
    d, g = _broadcast(delta=d, gamma=g)
    disc = d * d - 0.75 * g * g
    bistable = (d > 0) & (disc > 0)
    s = np.sqrt(np.where(bistable, disc, np.nan))
    # 2 Delta - s > Delta > 0 here: no cancellation in the lower turning point.
    y_low = (2.0 * d - s) / 3.0
    y_high = (2.0 * d + s) / 3.0
    g2 = 0.25 * g * g
    f_up = y_low * ((d - y_low) ** 2 + g2)
    f_down = y_high * ((d - y_high) ** 2 + g2)
    return TurningPoints(y_low, y_high, f_up, f_down)


def blueshift_roots(delta: ArrayLike, gamma: ArrayLike, drive: ArrayLike) -> NDArray:
    """All real steady-state blueshifts of a coherently driven mode, sorted, NaN-padded.

    Solves ``y [(Delta - y)^2 + (gamma/2)^2] = F`` (Baas et al., Phys. Rev. A 69, 023809,
    2004), i.e. ``y^3 - 2 Delta y^2 + (Delta^2 + gamma^2/4) y - F = 0``.  With
    ``y = t + 2 Delta/3`` the cubic becomes ``t^3 + p t + q = 0``,
    ``p = gamma^2/4 - Delta^2/3``, ``q = 2 Delta^3/27 + Delta gamma^2/6 - F``.

    * Three real roots (``drive_down <= F <= drive_up`` of :func:`turning_points`):
      Viete's trigonometric form
      ``t_k = 2 sqrt(-p/3) cos(arccos(3q/(2p) sqrt(-3/p))/3 - 2 pi k/3)``.
    * One real root: Cardano's formula in its cancellation-free form
      ``u = cbrt(-q/2 - sign(q) sqrt(q^2/4 + p^3/27))``, ``t = u - p/(3u)``.

    Each root is then polished by safeguarded Newton steps on the unshifted cubic, which
    restores full relative precision where ``y << Delta`` (drive -> 0, where
    ``y -> F / (Delta^2 + gamma^2/4)``).  The root count is decided from the turning
    drives, so it changes exactly there; at a turning drive the double root is returned
    twice.

    Parameters
    ----------
    delta, gamma
        As in :func:`turning_points` (meV).
    drive
        ``F = alpha kappa P`` in meV^3, >= 0.

    Returns
    -------
    ndarray, shape ``broadcast(delta, gamma, drive).shape + (3,)``
        The real roots in meV, ascending; where only one exists it sits in ``[..., 0]``
        and ``[..., 1:]`` are NaN.
    """
    d = _checked("delta", delta)
    g = _checked("gamma", gamma, positive=True)
    f = _checked("drive", drive, nonneg=True)
    d, g, f = _broadcast(delta=d, gamma=g, drive=f)
    tp = turning_points(d, g)
    with np.errstate(invalid="ignore"):
        three = (f >= tp.drive_down) & (f <= tp.drive_up)

    g2 = 0.25 * g * g
    p = g2 - d * d / 3.0
    q = 2.0 * d**3 / 27.0 + d * g2 / 1.5 - f
    shift = 2.0 * d / 3.0

    # Three real roots: p < 0 wherever `three` holds (bistability needs Delta^2 > 3 gamma^2/4).
    p3 = np.where(three, p, -1.0)
    amp = 2.0 * np.sqrt(-p3 / 3.0)
    arg = np.clip(1.5 * q / p3 * np.sqrt(-3.0 / p3), -1.0, 1.0)
    theta = np.arccos(arg) / 3.0
    k = np.arange(3) * (2.0 * np.pi / 3.0)
    t3 = amp[..., None] * np.cos(theta[..., None] - k)
    y3 = np.sort(t3 + shift[..., None], axis=-1)

    # One real root: stable Cardano.
    disc = np.maximum(0.25 * q * q + p**3 / 27.0, 0.0)
    u = np.cbrt(np.where(q >= 0, -0.5 * q - np.sqrt(disc), -0.5 * q + np.sqrt(disc)))
    safe_u = np.where(u == 0, 1.0, u)
    t1 = np.where(u == 0, 0.0, u - p / (3.0 * safe_u))
    y1 = t1 + shift

    roots = np.where(three[..., None], y3, np.stack([y1, y1, y1], axis=-1))
    roots = _polish(roots, d[..., None], g[..., None], f[..., None], three[..., None])
    roots = np.sort(roots, axis=-1)
    roots[..., 1:] = np.where(three[..., None], roots[..., 1:], np.nan)
    return roots


def _polish(roots, delta, gamma, drive, three):
    """Safeguarded Newton steps on the unshifted cubic.

    A step is kept only if it lowers |f|, and (for three roots) it is clipped to a quarter
    of the gap to the nearest other root so that two nearby roots cannot merge.
    """
    y = roots.copy()
    if y.size == 0:
        return y
    gaps = np.full(y.shape, np.inf)
    a, b, c = y[..., 0], y[..., 1], y[..., 2]
    gaps3 = np.stack([np.abs(b - a), np.minimum(np.abs(b - a), np.abs(c - b)), np.abs(c - b)], -1)
    gaps = np.where(three, 0.25 * gaps3, gaps)
    f, fp = _cubic(y, delta, gamma, drive)
    for _ in range(_NEWTON_STEPS):
        with np.errstate(divide="ignore", invalid="ignore"):
            step = np.where(fp != 0, f / fp, 0.0)
        step = np.clip(step, -gaps, gaps)
        y_new = y - step
        f_new, fp_new = _cubic(y_new, delta, gamma, drive)
        better = np.abs(f_new) < np.abs(f)
        y = np.where(better, y_new, y)
        f = np.where(better, f_new, f)
        fp = np.where(better, fp_new, fp)
        if not np.any(better):
            break
    return y


def steady_state_sweep(
    delta: ArrayLike,
    gamma: ArrayLike,
    drive: ArrayLike,
    direction: Literal["up", "down"] = "up",
    *,
    check_order: bool = True,
) -> NDArray:
    """The blueshift along a power sweep, following the branch the sweep history selects.

    The last axis of ``broadcast(delta, gamma, drive)`` is the sweep, in the order the
    drives were applied.  The rule (Baas et al., Phys. Rev. A 69, 023809, 2004): the
    system stays on the branch it is on while that branch exists; the lower branch ends
    above ``drive_up`` (the system jumps to the upper one), the upper branch ends below
    ``drive_down`` (it falls to the lower one).  Where three roots exist the lower branch
    is the lowest root and the upper branch the highest; the middle root is unstable and
    never selected.  ``direction`` sets the branch at the first drive: ``"up"`` starts on
    the lower branch (the mode was empty before), ``"down"`` on the upper one (the drive
    came from above ``drive_up``).  For a monotonic up sweep the result is the lowest
    root at every drive, for a monotonic down sweep the highest.

    Parameters
    ----------
    delta, gamma
        As in :func:`turning_points` (meV; e.g. shape ``(W, 1)``).
    drive
        ``F = alpha kappa P`` in meV^3, >= 0, in acquisition order along the last axis.
    direction
        ``"up"`` (drive non-decreasing) or ``"down"`` (drive non-increasing).
    check_order
        If true (default) refuse drives that are not monotonic in ``direction``, which
        catches a down sweep passed in ascending order.  Set false to follow an arbitrary
        history (a loop up then down, for example); ``direction`` then only names the
        starting branch.

    Returns
    -------
    ndarray
        Blueshift in meV, shape ``broadcast(delta, gamma, drive).shape``.
    """
    if direction not in ("up", "down"):
        raise DataError(
            f"expected direction 'up' or 'down', found {direction!r}", field="direction"
        )
    d = _checked("delta", delta)
    g = _checked("gamma", gamma, positive=True)
    f = _checked("drive", drive, nonneg=True)
    d, g, f = _broadcast(delta=d, gamma=g, drive=f)
    if f.ndim == 0:
        raise DataError(
            "expected a drive axis (the sweep) as the last axis, found a scalar; "
            "use blueshift_roots for a single drive",
            field="drive",
        )
    if check_order and f.shape[-1] > 1:
        steps = np.diff(f, axis=-1)
        wrong = steps < 0 if direction == "up" else steps > 0
        if np.any(wrong):
            raise DataError(
                f"expected drives in acquisition order of a {direction} sweep "
                f"({'non-decreasing' if direction == 'up' else 'non-increasing'}), found "
                f"{int(wrong.sum())} step(s) the other way; reverse the axis for a down sweep, "
                "or pass check_order=False for an arbitrary history",
                field="drive",
            )
    roots = blueshift_roots(d, g, f)
    tp = turning_points(d, g)
    lowest = roots[..., 0]
    highest = np.where(np.isnan(roots[..., 2]), roots[..., 0], roots[..., 2])
    upper = np.full(f.shape[:-1], direction == "down")
    out = np.empty(f.shape)
    with np.errstate(invalid="ignore"):
        for i in range(f.shape[-1]):
            fi = f[..., i]
            upper = np.where(fi > tp.drive_up[..., i], True, upper)
            upper = np.where(fi < tp.drive_down[..., i], False, upper)
            out[..., i] = np.where(upper, highest[..., i], lowest[..., i])
    return out


def transmitted_intensity(
    delta: ArrayLike,
    gamma: ArrayLike,
    drive: ArrayLike,
    alpha: ArrayLike,
    direction: Literal["up", "down"] = "up",
    *,
    check_order: bool = True,
) -> NDArray:
    """Mode population along a sweep, ``n = y / alpha``, to which transmission is proportional.

    The transmitted (or emitted) intensity is ``gamma_out n`` times a collection factor;
    this returns ``n`` (polaritons in the mode) so that a fit multiplies by its own
    scale (counts per polariton).  ``y`` is :func:`steady_state_sweep`.

    Parameters
    ----------
    delta, gamma, drive, direction, check_order
        As in :func:`steady_state_sweep` (meV, meV, meV^3).
    alpha
        Blueshift per polariton ``g_LP / A_eff`` in meV, > 0.

    Returns
    -------
    ndarray
        Population ``n`` (dimensionless), shape of the broadcast inputs.
    """
    a = _checked("alpha", alpha, positive=True)
    y = steady_state_sweep(delta, gamma, drive, direction, check_order=check_order)
    return y / a
