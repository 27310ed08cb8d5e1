"""An independent generator of angle-resolved polariton maps as a spectrometer camera records them.

Nothing here imports polkit: the physics is written out again from the published formulas, and
the camera is simulated in its own raw axis (wavelength pixels), so that polkit's loaders, unit
conversion, masking, noise model and fit are all checked against code they did not produce.
Every map made here is invented (simulated with a known truth), not measured.

Physics (written independently of polkit/models):

* cavity photon of a planar cavity, E_C(theta) = E_C0 / sqrt(1 - sin^2(theta) / n_eff^2)
  # Source: Kavokin et al., Microcavities, 2nd ed. (Oxford 2017), ch. 2 (fixed k_z)
* photon Green's function of one (or two) excitons coupled to the photon,
  G_CC(E) = 1 / (E - E_C + i gamma_C/2 - sum_j g_j^2 / (E - E_Xj + i gamma_Xj/2))
  # Source: Hopfield, Phys. Rev. 112, 1555 (1958); Savona et al., Solid State Commun. 93, 733 (1995)
  Its poles E_b (complex branch energies) and residues r_b (photon weights) are found here with
  numpy's polynomial roots; emission is sum_b n_b(theta) * (-1/pi) Im[r_b / (E - E_b)], with a
  free occupation n_b per branch (Boltzmann at the branch energy for room-temperature samples).
* a density per energy becomes a density per wavelength with I_lambda = I_E * hc / lambda^2
  (integrated counts kept); hc from CODATA via scipy.constants.
* air wavelengths: lambda_air = lambda_vac / n_air with the standard-air dispersion formula of
  Ciddor, Appl. Opt. 35, 1566 (1996), eq. (1).
* camera: electrons ~ Poisson(gain * counts), read noise Gaussian in counts, a constant camera
  offset per raw pixel, clipping at the ADC maximum (or a declared full well), cosmic-ray spikes
  of one or two pixels.  # Source: Janesick, Photon Transfer (SPIE Press, 2007), ch. 2-4
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import constants

#: h c in eV nm  # Source: CODATA via scipy.constants
HC_EV_NM = constants.h * constants.c / constants.e * 1e9


@dataclass
class Truth:
    """Parameters of an invented sample (energies in eV, splittings and widths in meV)."""

    e_x: float = 1.545
    e_c0: float = 1.541
    n_eff: float = 3.4
    rabi_mev: float = 6.0
    gamma_c_mev: float = 0.4
    gamma_x_mev: float = 0.8
    #: optional second exciton: (energy eV, Rabi splitting meV, FWHM meV)
    exciton2: tuple[float, float, float] | None = None

    @property
    def detuning_mev(self) -> float:
        return 1e3 * (self.e_c0 - self.e_x)

    def as_dict(self) -> dict:
        return {
            "exciton_energy": self.e_x,
            "cavity_energy": self.e_c0,
            "effective_index": self.n_eff,
            "rabi_splitting": self.rabi_mev,
            "detuning": self.detuning_mev,
            "cavity_linewidth": self.gamma_c_mev,
            "exciton_linewidth": self.gamma_x_mev,
        }


@dataclass
class Camera:
    """What the spectrometer camera adds (counts are raw ADC units)."""

    peak_counts: float = 3000.0  # brightest pixel of the lower branch, above background
    upper_ratio: float = 0.3  # occupation of the upper branch relative to the lower
    boltzmann_kt_mev: float | None = None  # when set, occupations follow exp(-E/kT) instead
    gain: float = 2.0  # electrons per count
    read_noise: float = 4.0  # counts
    offset: float = 0.0  # camera offset per raw pixel, counts
    background: tuple[float, float] = (0.0, 0.0)  # level and slope (counts per nm) in raw pixels
    adc_max: float | None = None  # clipping level (counts), None: no clipping
    n_spikes: int = 0
    spike_counts: tuple[float, float] = (2000.0, 20000.0)
    # (E eV, FWHM meV, counts, min |angle|)
    extra_mode: tuple[float, float, float, float] | None = None
    medium: str = "vacuum"  # wavelengths written as "vacuum" or "air"
    fade_deg: float = 30.0  # occupation fades as exp(-(angle/fade)^2)
    extra: dict = field(default_factory=dict)


def cavity_energy(truth: Truth, angle_deg: np.ndarray) -> np.ndarray:
    s = np.sin(np.radians(angle_deg))
    return truth.e_c0 / np.sqrt(1.0 - s**2 / truth.n_eff**2)


def branches(truth: Truth, angle_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Complex branch energies (eV) and photon residues per angle, ordered by real part.

    The poles of G_CC are the roots of the characteristic polynomial of the non-Hermitian
    coupled-oscillator matrix; the residue of G_CC at a pole is the photon weight of that
    branch.  Shapes (A, n_branch).
    """
    ec = cavity_energy(truth, np.atleast_1d(angle_deg).astype(float))
    osc = [(truth.e_x, truth.rabi_mev, truth.gamma_x_mev)]
    if truth.exciton2 is not None:
        osc.append(truth.exciton2)
    poles, residues = [], []
    for e_c in ec:
        z_c = e_c - 0.5j * truth.gamma_c_mev * 1e-3
        zs = [e - 0.5j * w * 1e-3 for e, _, w in osc]
        gs = [0.5 * r * 1e-3 for _, r, _ in osc]
        # denominator D(E) = (E - z_c) prod(E - z_j) - sum_j g_j^2 prod_{i != j} (E - z_i)
        den = np.poly1d([1.0, -z_c])
        for z in zs:
            den = den * np.poly1d([1.0, -z])
        for j, g in enumerate(gs):
            term = np.poly1d([g**2])
            for i, z in enumerate(zs):
                if i != j:
                    term = term * np.poly1d([1.0, -z])
            den = den - term
        num = np.poly1d([1.0])
        for z in zs:
            num = num * np.poly1d([1.0, -z])
        roots = np.roots(den.coeffs)
        roots = roots[np.argsort(roots.real)]
        dden = den.deriv()
        poles.append(roots)
        residues.append(num(roots) / dden(roots))
    return np.array(poles), np.array(residues)


def air_index(lambda_vac_nm: np.ndarray) -> np.ndarray:
    """Refractive index of standard air.  # Source: Ciddor, Appl. Opt. 35, 1566 (1996), eq. (1)"""
    sigma2 = (1e3 / np.asarray(lambda_vac_nm, dtype=float)) ** 2  # (1/um)^2
    return 1.0 + 0.05792105 / (238.0185 - sigma2) + 0.00167917 / (57.362 - sigma2)


def emission_per_energy(truth: Truth, camera: Camera, angle_deg, energy_ev) -> np.ndarray:
    """Noise-free emission density per energy (arbitrary scale), shape (A, E)."""
    a = np.asarray(angle_deg, dtype=float)
    e = np.asarray(energy_ev, dtype=float)[None, :]
    poles, res = branches(truth, a)
    fade = np.exp(-((a / camera.fade_deg) ** 2))[:, None]
    out = np.zeros((a.size, e.shape[1]))
    for b in range(poles.shape[1]):
        if camera.boltzmann_kt_mev is not None:
            occ = np.exp(-(poles[:, b].real - poles[:, 0].real).clip(min=0.0)
                         / (camera.boltzmann_kt_mev * 1e-3))[:, None]
        else:
            occ = np.full((a.size, 1), 1.0 if b == 0 else camera.upper_ratio)
        line = -(res[:, b, None] / (e - poles[:, b, None])).imag / np.pi
        out += fade * occ * line
    return out


@dataclass
class RawMap:
    """A simulated raw camera frame and its truth."""

    angle: np.ndarray  # degree
    wavelength: np.ndarray  # nm, in the medium stated (ascending)
    counts: np.ndarray  # (angle, wavelength) raw counts
    truth: Truth
    camera: Camera
    spikes: np.ndarray  # (n, 2) indices of injected spikes
    clipped: int  # number of clipped pixels
    medium: str

    def write_txt(self, path: str | Path, *, offset_key: str | None = None, note: str = "") -> Path:
        """Write the frame as a plain-text matrix (rows wavelength, columns angle)."""
        path = Path(path)
        cam = self.camera
        meta = ["kind: emission", f"wavelength_medium: {self.medium}",
                f"gain: {cam.gain}", f"read_noise: {cam.read_noise}"]
        if cam.adc_max is not None:
            meta.append(f"saturation: {cam.adc_max}")
        if offset_key is not None:
            meta.append(f"{offset_key}: {cam.offset}")
        for k, v in cam.extra.items():
            meta.append(f"{k}: {v}")
        lines = [
            f"# invented test map, simulated, not a measurement {note}".rstrip(),
            "# rows: wavelength [nm]; columns: angle [degree]; signal: intensity [counts]",
            "# " + "; ".join(meta),
            "nan " + " ".join(f"{x:.4f}" for x in self.angle),
        ]
        for i, lam in enumerate(self.wavelength):
            lines.append(f"{lam:.5f} " + " ".join(f"{v:.2f}" for v in self.counts[:, i]))
        path.write_text("\n".join(lines) + "\n")
        return path


def simulate(
    truth: Truth,
    camera: Camera,
    *,
    angles: np.ndarray,
    energy_range: tuple[float, float],
    n_pixels: int = 300,
    seed: int = 0,
) -> RawMap:
    """A raw camera frame (angle x wavelength pixels) of the invented sample.

    The wavelength pixels are uniform in wavelength (a grating spectrometer); the emission
    density per energy is converted to a density per wavelength (I_lambda = I_E hc/lambda^2)
    and integrated over each pixel's width; then the camera adds background, offset, shot and
    read noise, spikes and clipping, in raw counts.
    """
    rng = np.random.default_rng(seed)
    lam_vac = np.linspace(HC_EV_NM / energy_range[1], HC_EV_NM / energy_range[0], n_pixels)
    dlam = lam_vac[1] - lam_vac[0]
    e = HC_EV_NM / lam_vac
    dens_e = emission_per_energy(truth, camera, angles, e)
    dens_lam = dens_e * HC_EV_NM / lam_vac[None, :] ** 2  # per nm
    signal = dens_lam * dlam
    signal *= camera.peak_counts / np.max(signal)
    if camera.extra_mode is not None:  # a line that is not a polariton, in counts per pixel
        e0, w_mev, amp, min_angle = camera.extra_mode
        shape = 1.0 / (1.0 + ((e - e0) / (0.5 * w_mev * 1e-3)) ** 2)
        on = (np.abs(np.asarray(angles)) >= min_angle)[:, None]
        signal = signal + on * amp * shape[None, :]
    bg = camera.background[0] + camera.background[1] * (lam_vac - lam_vac.mean())
    mean = signal + bg[None, :]
    electrons = rng.poisson(np.clip(mean, 0.0, None) * camera.gain)
    counts = electrons / camera.gain + rng.normal(0.0, camera.read_noise, mean.shape)
    counts = counts + camera.offset
    spikes = np.zeros((0, 2), dtype=int)
    if camera.n_spikes:
        ia = rng.integers(0, counts.shape[0], camera.n_spikes)
        ie = rng.integers(1, counts.shape[1] - 2, camera.n_spikes)
        hits = rng.uniform(*camera.spike_counts, camera.n_spikes)
        for a_i, e_i, h in zip(ia, ie, hits, strict=True):
            counts[a_i, e_i] += h
            if rng.uniform() < 0.3:  # some spikes cover two pixels
                counts[a_i, e_i + 1] += 0.5 * h
        spikes = np.stack([ia, ie], axis=1)
    clipped = 0
    if camera.adc_max is not None:
        clipped = int(np.sum(counts >= camera.adc_max))
        counts = np.minimum(counts, camera.adc_max)
    lam = lam_vac if camera.medium == "vacuum" else lam_vac / air_index(lam_vac)
    return RawMap(np.asarray(angles, dtype=float), lam, counts, truth, camera, spikes, clipped,
                  camera.medium)


# --------------------------------------------------------------------------------------
# the maps the issues describe
# --------------------------------------------------------------------------------------
def messy_4k(seed: int = 0, **camera_changes) -> RawMap:
    """A 4 K GaAs-like map (2g = 6 meV) with spikes, clipped pixels, a sloped background, a
    weak uncoupled mode above 20 degrees, in air wavelengths."""
    truth = Truth(e_x=1.545, e_c0=1.542, n_eff=3.4, rabi_mev=6.0, gamma_c_mev=0.4,
                  gamma_x_mev=0.8)
    cam = dict(peak_counts=3000.0, upper_ratio=0.3, gain=2.0, read_noise=4.0, offset=0.0,
               background=(40.0, 3.0), adc_max=3050.0, n_spikes=10,
               extra_mode=(1.556, 1.0, 60.0, 20.0), medium="air")
    cam.update(camera_changes)
    return simulate(truth, Camera(**cam), angles=np.arange(-25.0, 25.5, 1.0),
                    energy_range=(1.528, 1.562), n_pixels=300, seed=seed)


def low_counts(seed: int = 0) -> RawMap:
    """The same sample with about 15 counts per pixel at the branch peak."""
    truth = Truth(e_x=1.545, e_c0=1.542, n_eff=3.4, rabi_mev=6.0, gamma_c_mev=0.4,
                  gamma_x_mev=0.8)
    cam = Camera(peak_counts=15.0, upper_ratio=0.5, gain=1.0, read_noise=1.5, offset=0.0,
                 background=(1.0, 0.0), medium="vacuum")
    return simulate(truth, cam, angles=np.arange(-20.0, 20.5, 1.0),
                    energy_range=(1.530, 1.560), n_pixels=200, seed=seed)


def broad_room_temperature(seed: int = 0, offset: float = 600.0) -> RawMap:
    """A room-temperature broad-line map (2g = 80 meV, exciton FWHM 40 meV) with a camera
    offset of ``offset`` counts per raw pixel."""
    truth = Truth(e_x=2.40, e_c0=2.37, n_eff=1.9, rabi_mev=80.0, gamma_c_mev=15.0,
                  gamma_x_mev=40.0)
    cam = Camera(peak_counts=4000.0, upper_ratio=0.4, gain=1.0, read_noise=6.0, offset=offset,
                 background=(0.0, 0.0), medium="vacuum", fade_deg=45.0)
    return simulate(truth, cam, angles=np.arange(-30.0, 31.0, 2.0),
                    energy_range=(2.20, 2.60), n_pixels=300, seed=seed)


def hidden_upper_branch(seed: int = 0) -> RawMap:
    """A room-temperature map (2g = 90 meV, detuning -100 meV, exciton FWHM 30 meV) whose upper
    branch is Boltzmann-dim (about 1/200 of the lower one at normal incidence)."""
    truth = Truth(e_x=2.40, e_c0=2.30, n_eff=1.9, rabi_mev=90.0, gamma_c_mev=12.0,
                  gamma_x_mev=30.0)
    cam = Camera(peak_counts=5000.0, boltzmann_kt_mev=25.85, gain=1.0, read_noise=5.0,
                 medium="vacuum", fade_deg=60.0)
    return simulate(truth, cam, angles=np.arange(-30.0, 31.0, 2.0),
                    energy_range=(2.15, 2.55), n_pixels=300, seed=seed)


def second_exciton(seed: int = 0) -> RawMap:
    """A 4 K map with a second exciton (light-hole-like, 8 meV above) coupled to the photon."""
    truth = Truth(e_x=1.545, e_c0=1.546, n_eff=3.4, rabi_mev=6.0, gamma_c_mev=0.4,
                  gamma_x_mev=0.8, exciton2=(1.553, 4.0, 0.8))
    cam = Camera(peak_counts=3000.0, upper_ratio=0.4, gain=2.0, read_noise=4.0,
                 medium="vacuum")
    return simulate(truth, cam, angles=np.arange(-25.0, 25.5, 1.0),
                    energy_range=(1.530, 1.565), n_pixels=300, seed=seed)


def clean_4k(seed: int = 0) -> RawMap:
    """The 4 K sample with nothing but shot and read noise (vacuum wavelengths)."""
    truth = Truth(e_x=1.545, e_c0=1.542, n_eff=3.4, rabi_mev=6.0, gamma_c_mev=0.4,
                  gamma_x_mev=0.8)
    cam = Camera(peak_counts=3000.0, upper_ratio=0.3, gain=2.0, read_noise=4.0,
                 background=(40.0, 0.0), medium="vacuum")
    return simulate(truth, cam, angles=np.arange(-25.0, 25.5, 1.0),
                    energy_range=(1.528, 1.562), n_pixels=300, seed=seed)
