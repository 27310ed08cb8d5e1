"""Shared helpers of the data-layer tests: invented polariton maps and file writers.

Every data set made here is invented (simulated with a known truth), not measured.
"""

from __future__ import annotations

import numpy as np

from polkit.constants import HBARC_EV_UM

# invented sample parameters (GaAs-like ranges, value from memory)
E_X = 1.480  # exciton energy, eV
E_C0 = 1.475  # cavity energy at normal incidence, eV
N_EFF = 3.5  # effective index
RABI_EV = 0.010  # Rabi splitting 2g, eV
WIDTH_EV = 0.0012  # FWHM of both branches, eV


def branches(angle_deg, *, center_deg: float = 0.0):
    """Lower and upper polariton energies (eV) of the invented cavity at each angle.

    E_C = E_C0 / sqrt(1 - sin^2(theta)/n_eff^2); E = (E_C + E_X)/2 -/+ sqrt(delta^2 + 4 g^2)/2.
    """
    s = np.sin(np.radians(np.asarray(angle_deg, dtype=float) - center_deg))
    e_c = E_C0 / np.sqrt(1.0 - s**2 / N_EFF**2)
    mean = 0.5 * (e_c + E_X)
    half = 0.5 * np.sqrt((e_c - E_X) ** 2 + RABI_EV**2)
    return mean - half, mean + half


def lorentzian(x, x0, fwhm):
    """Unit-height Lorentzian."""
    return 1.0 / (1.0 + ((x - x0) / (0.5 * fwhm)) ** 2)


def polariton_map(
    angle_deg,
    energy_ev,
    *,
    amplitude: float = 2000.0,
    background: float = 100.0,
    center_deg: float = 0.0,
    width_ev: float = WIDTH_EV,
    rng: np.random.Generator | None = None,
    read_noise: float = 5.0,
    gain: float = 1.0,
) -> np.ndarray:
    """An invented emission map (angle x energy) in counts, noiseless when ``rng`` is None."""
    a = np.asarray(angle_deg, dtype=float)[:, None]
    e = np.asarray(energy_ev, dtype=float)[None, :]
    lp, up = branches(a, center_deg=center_deg)
    # the upper branch is dimmer; both fade a little towards large angles
    fade = np.exp(-(((a - center_deg) / 25.0) ** 2))
    mean = background + amplitude * fade * (
        lorentzian(e, lp, width_ev) + 0.3 * lorentzian(e, up, width_ev)
    )
    if rng is None:
        return mean
    electrons = rng.poisson(mean * gain)
    return electrons / gain + rng.normal(0.0, read_noise, size=mean.shape)


def fourier_image(
    n_pixel: int,
    energy_ev,
    *,
    na: float,
    k0_pixel: float,
    pupil_radius_px: float,
    blur_px: float = 1.2,
    rng: np.random.Generator | None = None,
) -> np.ndarray:
    """An invented Fourier-plane image (pixel x energy) with a pupil of known centre and radius.

    Inside the pupil the map is the polariton map at the angle each pixel sees (Abbe sine
    condition); outside it only a dark level; the edge is blurred by a Gaussian of
    ``blur_px`` pixels (an error-function step).
    """
    from scipy.special import erf

    p = np.arange(n_pixel, dtype=float)
    s = np.clip(na * (p - k0_pixel) / pupil_radius_px, -0.999, 0.999)
    angle = np.degrees(np.arcsin(s))
    inside = polariton_map(angle, energy_ev, background=300.0)
    r = np.abs(p - k0_pixel)
    aperture = 0.5 * (1.0 - erf((r - pupil_radius_px) / (np.sqrt(2.0) * blur_px)))
    image = 20.0 + aperture[:, None] * inside
    if rng is not None:
        image = rng.poisson(image).astype(float)
    return image


def k_constant() -> float:
    """1 / (hbar c) in 1/(um eV) (5.0677...)."""
    return 1.0 / HBARC_EV_UM


def write_matrix(
    path,
    signal,
    row_axis,
    col_axis,
    *,
    header: str | None = None,
    delimiter: str = " ",
    corner: str = "0",
    newline: str = "\n",
) -> None:
    """Write a text matrix: first row the column axis, first column the row axis."""
    lines = []
    if header:
        lines += [f"# {h}" for h in header.splitlines()]
    lines.append(delimiter.join([corner] + [repr(float(c)) for c in col_axis]))
    for r, row in zip(row_axis, signal, strict=True):
        lines.append(delimiter.join([repr(float(r))] + [repr(float(v)) for v in row]))
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(newline.join(lines) + newline)


def calibration_dict() -> dict:
    """A valid density calibration as a dict (cw drive, invented numbers)."""
    return {
        "drive": "cw",
        "spot_fwhm": {"value": 2.0, "units": "um"},
        "photon_energy": {"value": 1.6, "units": "eV"},
        "coupling_efficiency": {"value": 0.5, "units": "1"},
        "polariton_lifetime": {"value": 10.0, "units": "ps"},
    }
