"""Regenerate the invented demo sample in this folder from polkit's own models.

    python data_examples/make_demo.py          # writes the files beside this script

Everything here is simulated with a fixed seed (ROOT_SEED below): no measured data. The
scenario is invented: "DS-1", a GaAs-like microcavity with quantum wells, measured at 4 K at
two positions of its wafer, plus a pump-power study and a planned device. The truths used are
written to ``truth.json`` so that tests and users can compare fits with them.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import xarray as xr

from polkit.constants import HC_EV_NM
from polkit.models import coherent, reservoir
from polkit.models.dispersion import cavity_energy, two_mode_eigenvalues
from polkit.models.simulate import simulate_map

ROOT_SEED = 20261202
HERE = Path(__file__).resolve().parent
MEV = 1e-3

# Position P1 of the invented wafer: slightly negative detuning.
P1 = dict(e_x=1.5450, e_c0=1.5410, n_eff=3.40, rabi_mev=12.0, gamma_c_mev=0.30, gamma_x_mev=0.80)
# Position P2 (thicker spacer side): slightly positive detuning.
P2 = dict(e_x=1.5450, e_c0=1.5475, n_eff=3.40, rabi_mev=12.0, gamma_c_mev=0.30, gamma_x_mev=0.80)
GAIN = 1.0  # electrons per count
READ_NOISE = 4.0  # counts rms
DARK = 60.0  # counts per pixel


def _occupation(angles, p, t_eff_mev=2.5, upper_ratio=0.12, peak=3.0):
    """Branch occupations (counts x eV): thermal-like lower branch, a dim upper branch."""
    ec = cavity_energy(p["e_c0"], p["n_eff"], angle_deg=angles)
    lo, _ = two_mode_eigenvalues(ec, p["e_x"], 0.5 * p["rabi_mev"] * MEV)
    boltz = np.exp(-(lo.real - lo.real.min()) / (t_eff_mev * MEV))
    lower = peak * (0.35 + 0.65 * boltz)
    return np.stack([lower, upper_ratio * lower], axis=-1)


def _emission(angles, energy, p):
    sim = simulate_map(
        angles,
        energy,
        kind="emission",
        e_c0=p["e_c0"],
        n_eff=p["n_eff"],
        e_x=p["e_x"],
        g=0.5 * p["rabi_mev"] * MEV,
        gamma_c=p["gamma_c_mev"] * MEV,
        gamma_x=p["gamma_x_mev"] * MEV,
        amplitudes=_occupation(angles, p),
        background=DARK,
    )
    return sim.signal


def _counts(rng, mean):
    return rng.poisson(np.clip(mean, 0, None) * GAIN) / GAIN + rng.normal(0, READ_NOISE, mean.shape)


def make_maps(seeds) -> dict:
    truth = {}
    # 1. emission map, angle x energy, netCDF with CF units (position P1)
    rng = np.random.default_rng(seeds[0])
    angles = np.linspace(-24.0, 24.0, 49)
    energy = np.linspace(1.528, 1.562, 340)
    sig = _counts(rng, _emission(angles, energy, P1))
    da = xr.DataArray(
        sig,
        dims=("angle", "energy"),
        coords={
            "angle": ("angle", angles, {"units": "degree", "long_name": "emission angle"}),
            "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"}),
        },
        name="signal",
        attrs={
            "units": "counts",
            "kind": "emission",
            "temperature": 4.0,
            "sample": "DS-1 (invented demo sample)",
            "position": "P1",
            "gain": GAIN,
            "read_noise": READ_NOISE,
            "comment": "simulated by data_examples/make_demo.py; not a measurement",
        },
    )
    da.to_dataset().to_netcdf(HERE / "ds1_p1_emission.nc", engine="h5netcdf")
    truth["ds1_p1_emission.nc"] = P1

    # 2. emission map with a wavelength axis (air), plain-text matrix (position P2)
    rng = np.random.default_rng(seeds[1])
    angles2 = np.linspace(-20.0, 20.0, 41)
    wl_vac = np.linspace(HC_EV_NM / 1.563, HC_EV_NM / 1.530, 300)  # nm, ascending
    n_air = 1.000274  # standard air near 800 nm (value from memory; the loader converts exactly)
    energy2 = HC_EV_NM / wl_vac
    # counts per wavelength bin = density per energy * hc / lambda^2 * bin width; the
    # simulated map is per energy bin of the mean width, hence the normalised Jacobian
    jac2 = HC_EV_NM / wl_vac**2
    sig2 = _counts(rng, (_emission(angles2, energy2, P2) - DARK) * jac2 / jac2.mean() + DARK)
    wl_air = wl_vac / n_air
    lines = [
        "# invented demo sample DS-1, position P2; simulated, not a measurement",
        "# rows: wavelength [nm]; columns: angle [degree]; signal: intensity [counts]",
        "# kind: emission; wavelength_medium: air; temperature: 4; gain: 1.0; read_noise: 4.0",
        "# sample: DS-1 (invented demo sample); position: P2",
    ]
    header = "nan " + " ".join(f"{a:.3f}" for a in angles2)
    rows = [f"{w:.5f} " + " ".join(f"{v:.2f}" for v in sig2[:, i]) for i, w in enumerate(wl_air)]
    (HERE / "ds1_p2_emission_nm.txt").write_text("\n".join(lines + [header] + rows) + "\n")
    truth["ds1_p2_emission_nm.txt"] = P2

    # 3. reflectance map, .npz with named arrays (position P1)
    rng = np.random.default_rng(seeds[2])
    angles3 = np.linspace(0.0, 30.0, 31)
    energy3 = np.linspace(1.528, 1.566, 320)
    kappa_mev = 0.20
    sim = simulate_map(
        angles3,
        energy3,
        kind="reflectance",
        e_c0=P1["e_c0"],
        n_eff=P1["n_eff"],
        e_x=P1["e_x"],
        g=0.5 * P1["rabi_mev"] * MEV,
        gamma_c=P1["gamma_c_mev"] * MEV,
        gamma_x=P1["gamma_x_mev"] * MEV,
        kappa=kappa_mev * MEV,
        amplitudes=0.95,
        background=0.0,
    )
    refl = sim.signal + rng.normal(0, 0.004, sim.signal.shape)
    np.savez(
        HERE / "ds1_p1_reflectance.npz",
        signal=refl,
        angle=angles3,
        energy=energy3,
        units_signal=np.array("1"),
        units_angle=np.array("degree"),
        units_energy=np.array("eV"),
        kind=np.array("reflectance"),
    )
    truth["ds1_p1_reflectance.npz"] = dict(P1, mirror_coupling_mev=kappa_mev)

    # 4. Fourier-plane camera image: pixel x wavelength (vacuum), needs calibration
    rng = np.random.default_rng(seeds[3])
    na, p0, r_na = 0.42, 130.3, 118.0
    pix = np.arange(260, dtype=float)
    wl4 = np.linspace(HC_EV_NM / 1.560, HC_EV_NM / 1.530, 256)
    e4 = HC_EV_NM / wl4
    s = na * (pix - p0) / r_na
    inside = np.abs(s) <= na
    theta = np.degrees(np.arcsin(np.clip(s, -1, 1)))
    img = np.full((pix.size, wl4.size), DARK)
    jac4 = HC_EV_NM / wl4**2
    img[inside] = (_emission(theta[inside], e4, P1) - DARK) * jac4 / jac4.mean() + DARK
    img = _counts(rng, img)
    ds = xr.Dataset(
        {"counts": (("pixel", "wavelength"), img, {"units": "counts"})},
        coords={
            "pixel": ("pixel", pix, {"units": "pixel", "long_name": "camera row"}),
            "wavelength": ("wavelength", wl4, {"units": "nm", "long_name": "vacuum wavelength"}),
        },
        attrs={
            "kind": "emission",
            "na": na,
            "k0_pixel": p0,
            "pupil_radius_px": r_na,
            "wavelength_medium": "vacuum",
            "sample": "DS-1 (invented demo sample)",
            "position": "P1",
            "gain": GAIN,
            "read_noise": READ_NOISE,
            "comment": "simulated Fourier-plane image; not a measurement",
        },
    )
    ds.to_netcdf(HERE / "ds1_p1_fourier.nc", engine="h5netcdf")
    truth["ds1_p1_fourier.nc"] = dict(P1, na=na, k0_pixel=p0, pupil_radius_px=r_na)
    return truth


def make_series(seeds) -> dict:
    truth = {}
    # 5. nonresonant pump, reservoir model: threshold 12 mW, saturation number 400
    rng = np.random.default_rng(seeds[4])
    p_th, n_s, scale = 12.0, 400.0, 50.0
    power = np.geomspace(0.6, 60.0, 28)
    n_c = reservoir.condensate_occupation(power / p_th, n_s)
    frac = reservoir.reservoir_fraction(power / p_th, n_s)
    intensity = scale * n_c * rng.lognormal(0.0, 0.05, power.size)
    blue_c, blue_r = 0.0004, 0.35  # meV per condensate occupation, meV at threshold reservoir
    shift = blue_c * n_c + blue_r * frac
    e_lp = 1.53668  # lower polariton at k = 0 at P1 (dispersion truth)
    peak = e_lp + shift * MEV + rng.normal(0, 0.02 * MEV, power.size)
    # linewidth narrows smoothly with the condensate occupation (0.30 meV far below
    # threshold, 0.12 meV far above, half-way at an occupation of 20)
    w_low, w_high, n_w = 0.30, 0.12, 20.0
    lw = w_high + (w_low - w_high) / (1.0 + n_c / n_w) + rng.normal(0, 0.01, power.size)
    rows = [
        "# invented demo sample DS-1, position P1: nonresonant pump power series (simulated)",
        "# sample: DS-1 (invented demo sample); position: P1",
        "power [mW],intensity [counts],intensity_error [counts],peak_energy [eV],"
        "peak_energy_error [eV],linewidth [meV],linewidth_error [meV]",
    ]
    for i in range(power.size):
        rows.append(
            f"{power[i]:.4f},{intensity[i]:.3f},{0.05 * intensity[i]:.3f},"
            f"{peak[i]:.6f},{0.02 * MEV:.6f},{lw[i]:.4f},0.0100"
        )
    (HERE / "ds1_p1_power_nonresonant.csv").write_text("\n".join(rows) + "\n")
    truth["ds1_p1_power_nonresonant.csv"] = dict(
        threshold_power_mw=p_th, saturation_number=n_s, intensity_scale=scale, e_lp_ev=e_lp,
        linewidth_low_mev=w_low, linewidth_high_mev=w_high, narrowing_occupation=n_w,
    )

    # 6. coherent drive 0.94 meV above the lower polariton at P1 (whose linewidth at k = 0 is
    # 0.47 meV in the dispersion truth above): up and down sweeps
    rng = np.random.default_rng(seeds[5])
    delta, gamma, f_per_mw = 0.94, 0.47, 0.0154  # meV, meV (FWHM), meV^3 per mW
    p_up = np.linspace(0.5, 40.0, 40)
    p_down = p_up[::-1]
    y_up = coherent.steady_state_sweep(delta, gamma, f_per_mw * p_up, "up")
    y_down = coherent.steady_state_sweep(delta, gamma, f_per_mw * p_down, "down")
    counts_per_mev = 5000.0
    rows = [
        "# invented demo sample DS-1, position P1: coherent drive, up then down sweep (simulated)",
        "# sample: DS-1 (invented demo sample); position: P1",
        "# pump 0.94 meV above the lower polariton at k = 0",
        "power [mW],intensity [counts],intensity_error [counts],sweep",
    ]
    for p, y, d in [
        *zip(p_up, y_up, ["up"] * p_up.size, strict=True),
        *zip(p_down, y_down, ["down"] * p_up.size, strict=True),
    ]:
        mean = counts_per_mev * y
        val = mean * rng.lognormal(0.0, 0.03) + rng.normal(0, 5.0)
        err = np.hypot(0.03 * mean, 5.0)
        rows.append(f"{p:.4f},{val:.3f},{err:.3f},{d}")
    (HERE / "ds1_p1_power_coherent.csv").write_text("\n".join(rows) + "\n")
    truth["ds1_p1_power_coherent.csv"] = dict(
        pump_detuning_mev=delta,
        polariton_linewidth_mev=gamma,
        drive_per_mw=f_per_mw,
        counts_per_mev=counts_per_mev,
    )
    return truth


def main() -> None:
    seeds = np.random.SeedSequence(ROOT_SEED).spawn(8)
    truth = {"root_seed": ROOT_SEED, "note": "invented demo sample; every file is simulated"}
    truth.update(make_maps([int(s.generate_state(1)[0]) for s in seeds[:4]]))
    truth.update(make_series([int(s.generate_state(1)[0]) for s in seeds]))
    (HERE / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")


if __name__ == "__main__":
    main()
