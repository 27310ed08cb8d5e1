"""Invented coherent-drive hysteresis loops made without polkit's models.

The single-mode steady state n[(Delta - alpha n)^2 + (gamma/2)^2] = kappa P is solved here
as a cubic in the blueshift y = alpha n by the eigenvalues of its companion matrix
(numpy), and each sweep follows the branch its history selects by a rule written out
independently of polkit: a mode stays on its branch while the branch exists, and where
only one root is left it takes that root (Source: Baas et al., Phys. Rev. A 69, 023809
(2004)).  A Gaussian spot exp(-2 r^2 / w^2) is integrated over the radius on a fine grid
(trapezoid rule), every radius following its own history.  Every number is invented; no
measured data.
"""

from __future__ import annotations

import numpy as np

from polkit.data import make_series


def cubic_roots(delta: float, gamma: float, drive: np.ndarray) -> np.ndarray:
    """Real roots of y^3 - 2 Delta y^2 + (Delta^2 + gamma^2/4) y - F, sorted, NaN-padded."""
    drive = np.asarray(drive, dtype=float)
    flat = drive.reshape(-1)
    comp = np.zeros((flat.size, 3, 3))
    comp[:, 0, 0] = 2.0 * delta
    comp[:, 0, 1] = -(delta * delta + 0.25 * gamma * gamma)
    comp[:, 0, 2] = flat
    comp[:, 1, 0] = 1.0
    comp[:, 2, 1] = 1.0
    ev = np.linalg.eigvals(comp)
    real = np.abs(ev.imag) < 1e-7 * np.maximum(1.0, np.abs(ev.real))
    roots = np.where(real, ev.real, np.nan)
    roots = np.sort(roots, axis=-1)  # NaNs last
    return roots.reshape(drive.shape + (3,))


def follow_history(delta: float, gamma: float, drives: np.ndarray) -> np.ndarray:
    """Blueshift along a drive history (last axis), starting from an empty mode.

    Each element of the leading axes has its own history (e.g. one per radius).
    """
    roots = cubic_roots(delta, gamma, drives)
    n_real = np.sum(np.isfinite(roots), axis=-1)
    lowest = roots[..., 0]
    highest = np.nanmax(roots, axis=-1)
    upper = np.zeros(drives.shape[:-1], dtype=bool)
    out = np.empty(drives.shape)
    for i in range(drives.shape[-1]):
        one = n_real[..., i] < 3
        # one root left: take it; on which branch it lies follows from its size
        upper = np.where(one, lowest[..., i] > 2.0 * delta / 3.0, upper)
        out[..., i] = np.where(upper, highest[..., i], lowest[..., i])
    return out


def loop_powers(p_min: float, p_max: float, n: int) -> np.ndarray:
    up = np.linspace(p_min, p_max, n)
    return np.concatenate([up, up[::-1]])


def point_loop(delta, gamma, drive_per_power, powers):
    """Blueshift (meV) of one mode along the power history (up then down)."""
    return follow_history(delta, gamma, drive_per_power * np.asarray(powers))


def gaussian_loop(delta, gamma, drive_per_power, powers, n_r=6000, r_max=3.5):
    """Spot-integrated blueshift in units of pi w^2 / 2 (w = 1) along the power history."""
    r = np.linspace(0.0, r_max, n_r)
    f = np.exp(-2.0 * r * r)
    drives = drive_per_power * f[:, None] * np.asarray(powers)[None, :]
    y = follow_history(delta, gamma, drives)           # (radius, power)
    area = 2.0 * np.pi * r[:, None] * y
    return np.trapezoid(area, r, axis=0) / (np.pi / 2.0)


def centre_thresholds(delta, gamma, drive_per_power):
    """Up and down switching powers of one mode: drives at the turning points of F(y).

    dF/dy = 3 y^2 - 4 Delta y + Delta^2 + gamma^2/4 = 0 (Source: Baas et al. 2004).
    """
    s = np.sqrt(delta * delta - 0.75 * gamma * gamma)
    y_lo, y_hi = (2 * delta - s) / 3, (2 * delta + s) / 3
    drive = lambda y: y * ((delta - y) ** 2 + 0.25 * gamma * gamma)  # noqa: E731
    return drive(y_lo) / drive_per_power, drive(y_hi) / drive_per_power


def noisy_series(powers, blueshift, *, scale, seed, rel=0.03, floor=3.0, errors=True,
                 power_jitter=0.003, sample="invented coherent loop"):
    """Counts = scale * blueshift with 3 % noise plus a floor, pump powers jittered.

    The recorded powers carry a small random error (the power meter), as measured loops
    do; with ``errors`` the table quotes the intensity standard deviation.
    """
    rng = np.random.default_rng(seed)
    n = len(powers) // 2
    mean = scale * np.asarray(blueshift)
    err = np.hypot(rel * mean, floor)
    obs = mean + err * rng.standard_normal(mean.size)
    p = np.asarray(powers) * (1.0 + power_jitter * rng.standard_normal(mean.size))
    p[:n] = np.maximum.accumulate(p[:n])
    p[n:] = np.minimum.accumulate(p[n:])
    kwargs = {"intensity_error": err} if errors else {}
    return make_series(p, obs, units="counts", sweep=["up"] * n + ["down"] * n,
                       sample=sample, **kwargs)
