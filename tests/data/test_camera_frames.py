"""What a spectrometer camera records: offset, detector noise, saturation, spikes, faint lines.

Every frame here is invented and built in the test by its own formulas (coupled-oscillator
branches, Lorentzian lines, Poisson electrons plus Gaussian read noise); nothing is measured
and no polkit model is imported to make the data.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr
from data_helpers import write_matrix

from polkit.cli import main
from polkit.data import (
    CameraOptions,
    detector_variance_terms,
    find_spikes,
    load_map,
    mask_spikes,
    mask_windows,
    parse_exclude,
    prepare_camera_map,
    validate_map,
)
from polkit.errors import ConfigError, ConvergenceWarning, DataError, DataWarning
from polkit.linefit import peak_table

HC_EV_NM = sc.h * sc.c / sc.e * 1e9  # Source: CODATA via scipy.constants
HEADER = "rows: wavelength [nm]; columns: angle [degree]; signal: counts"


def _lorentz(x, x0, fwhm):
    return 1.0 / (1.0 + ((x - x0) / (0.5 * fwhm)) ** 2)


def _branches(angle_deg, *, ex, ec0, n_eff, g):
    """Lower and upper polariton energies of two coupled oscillators (eV).

    # Source: Kavokin, Baumberg, Malpuech, Laussy, Microcavities (Oxford, 2007):
    # E_C = E_C0 / sqrt(1 - sin^2(theta)/n_eff^2); E = (E_C + E_X)/2 -+ sqrt(g^2 + (E_C - E_X)^2/4)
    """
    s = np.sin(np.radians(angle_deg))
    ec = ec0 / np.sqrt(1.0 - (s / n_eff) ** 2)
    mid, half = 0.5 * (ec + ex), np.sqrt(g**2 + 0.25 * (ec - ex) ** 2)
    return mid - half, mid + half


def _map(values, angle, energy, **attrs):
    base = {"units": "counts", "kind": "emission", "source": "invented-frame"}
    return validate_map(xr.DataArray(
        values, dims=("angle", "energy"),
        coords={"angle": ("angle", angle, {"units": "degree"}),
                "energy": ("energy", energy, {"units": "eV"})},
        attrs={**base, **attrs}))


def _steep_map(seed, *, gain=True, fwhm=0.0015):
    """A bright map whose upper branch disperses up to 10 energy pixels per angle row."""
    rng = np.random.default_rng(seed)
    angle = np.linspace(-30.0, 30.0, 61)
    energy = np.linspace(1.45, 1.55, 200)  # 0.5 meV pixels: the lines are 3 pixels wide
    lp, up = _branches(angle, ex=1.50, ec0=1.49, n_eff=1.6, g=0.004)
    mean = 50.0 + 3000.0 * _lorentz(energy[None], lp[:, None], fwhm) \
        + 1500.0 * _lorentz(energy[None], up[:, None], fwhm)
    counts = rng.poisson(mean) + rng.normal(0.0, 3.0, mean.shape)  # gain 1 e-/count
    attrs = {"gain": 1.0, "read_noise": 3.0} if gain else {}
    return _map(counts, angle, energy, **attrs), up


def _inject(da, seed, n=10):
    """n cosmic-ray spikes (1000-5000 counts; some two pixels wide) at random places."""
    rng = np.random.default_rng(seed)
    x = da.values.copy()
    truth = np.zeros(x.shape, dtype=bool)
    main_pixels = []
    while len(main_pixels) < n:
        i, j = int(rng.integers(1, x.shape[0] - 2)), int(rng.integers(3, x.shape[1] - 4))
        if any(abs(i - a) < 3 and abs(j - b) < 15 for a, b in main_pixels):
            continue
        main_pixels.append((i, j))
        h = float(rng.uniform(1000.0, 5000.0))
        kind = len(main_pixels) % 4
        extra = [(i, j + 1)] if kind == 1 else [(i + 1, j)] if kind == 2 else []
        x[i, j] += h
        truth[i, j] = True
        for a, b in extra:
            x[a, b] += 0.6 * h
            truth[a, b] = True
    return da.copy(data=x), truth, main_pixels


# ----------------------------------------------------------------------------- offset
def _wavelength_frame():
    lam = np.linspace(780.0, 800.0, 120)  # nm, ascending: energy descending
    angle = np.linspace(-10.0, 10.0, 9)
    photons = 2000.0 * _lorentz(lam[:, None], 790.0 + 0.05 * angle[None], 0.6)
    photons[np.abs(lam - 790.0) > 6.0] = 0.0  # a dark region off the line
    return lam, angle, photons


def test_offset_subtracted_before_the_jacobian_leaves_no_sloped_background(tmp_path):
    lam, angle, photons = _wavelength_frame()
    raw = photons + 500.0
    path = tmp_path / "offset.txt"
    write_matrix(path, raw, lam, angle, header=f"{HEADER}\ncamera_offset: 500")
    m = load_map(path)
    jac = lam**2 / HC_EV_NM  # |d lambda/d E| in nm/eV; Source: E = hc/lambda, CODATA
    want = (photons * jac[:, None]).T[:, ::-1]  # (angle, energy ascending)
    np.testing.assert_allclose(m.values, want, rtol=1e-12, atol=1e-9)
    dark_region = (np.abs(lam - 790.0) > 6.0)[::-1]
    assert np.all(m.values[:, dark_region] == 0.0)  # flat: no offset x Jacobian slope left
    assert m.attrs["offset_subtracted"] == 500.0
    assert "camera_offset" in json.loads(m.attrs["preprocessing"])["offset"]["what"]
    # without the declared offset, one level subtracted after the conversion leaves a slope
    # common practice, no published source: J varies by 5 % over 780-800 nm
    plain = tmp_path / "plain.txt"
    write_matrix(plain, raw, lam, angle, header=HEADER)
    late = load_map(plain).values[:, dark_region]
    late = late - np.median(late)
    assert np.ptp(late) > 0.04 * 500.0 * jac.min()


def test_dark_frame_and_level_options_subtract_in_raw_counts(tmp_path):
    lam, angle, photons = _wavelength_frame()
    rng = np.random.default_rng(5)
    dark = np.round(480.0 + 40.0 * rng.random(photons.shape))
    write_matrix(tmp_path / "map.txt", photons + dark, lam, angle, header=HEADER)
    write_matrix(tmp_path / "dark.txt", dark, lam, angle, header=HEADER)
    jac = lam**2 / HC_EV_NM  # Source: CODATA via scipy.constants
    m = load_map(tmp_path / "map.txt", dark=tmp_path / "dark.txt")
    np.testing.assert_allclose(m.values, (photons * jac[:, None]).T[:, ::-1], atol=1e-7)
    m2 = load_map(tmp_path / "map.txt", dark=500.0)
    np.testing.assert_allclose(m2.values, ((photons + dark - 500.0) * jac[:, None]).T[:, ::-1],
                               rtol=1e-12)
    write_matrix(tmp_path / "short.txt", dark[:-1], lam[:-1], angle, header=HEADER)
    with pytest.raises(DataError, match="dark frame"):
        load_map(tmp_path / "map.txt", dark=tmp_path / "short.txt")


def test_saturation_is_judged_on_raw_counts_before_the_offset(tmp_path):
    # common practice, no published source: the full well is a level of the raw counts
    lam, angle, photons = _wavelength_frame()
    raw = np.minimum(photons * 40.0 + 100.0, 60000.0)  # declared full well 60000 counts
    path = tmp_path / "sat.txt"
    write_matrix(path, raw, lam, angle,
                 header=f"{HEADER}\ncamera_offset: 100; saturation: 60000")
    m = load_map(path, mask_saturated=True)
    assert int(np.isnan(m.values).sum()) == int((raw >= 60000.0).sum()) > 0
    assert m.attrs["masked"] == 1
    rec = json.loads(m.attrs["preprocessing"])
    assert rec["saturated"]["pixels"] == int((raw >= 60000.0).sum())


def test_full_scale_and_flat_tops_are_masked(tmp_path):
    # Source: an n-bit converter saturates at 2**n - 1 (value from memory for 16 bits: 65535)
    lam, angle, photons = _wavelength_frame()
    adc = np.minimum(np.round(photons * 50.0 + 200.0), 65535.0)  # 16-bit converter
    write_matrix(tmp_path / "adc.txt", adc, lam, angle, header=HEADER)
    m = load_map(tmp_path / "adc.txt", mask_saturated=True)
    assert int(np.isnan(m.values).sum()) == int((adc == 65535.0).sum()) > 0
    flat = np.minimum(photons * 30.0 + 10.5, 41234.5)  # clipped by some other stage
    write_matrix(tmp_path / "flat.txt", flat, lam, angle, header=HEADER)
    m = load_map(tmp_path / "flat.txt", mask_saturated=True)
    assert int(np.isnan(m.values).sum()) == int((flat == 41234.5).sum()) > 0
    assert json.loads(m.attrs["preprocessing"])["saturated"]["reasons"]["flat_top"] > 0
    # low integer counts tie by chance: no flat top there (common practice)
    low = np.random.default_rng(2).poisson(5.0 + 15.0 * photons / 2000.0).astype(float)
    write_matrix(tmp_path / "low.txt", low, lam, angle, header=HEADER)
    assert not np.isnan(load_map(tmp_path / "low.txt", mask_saturated=True).values).any()


# ----------------------------------------------------------------------------- noise terms
def test_variance_terms_follow_the_ccd_model_through_the_jacobian(tmp_path):
    # Source: the CCD noise model, Janesick, Photon Transfer (SPIE, 2007): a raw count c
    # has var(c) = c/gain + read_noise^2, and s = J c has var(s) = J s/gain + (J rn)^2
    rng = np.random.default_rng(11)
    lam = np.linspace(840.0, 860.0, 30)
    n_angle = 3000
    gain, rn = 2.0, 4.0
    level = 300.0 + 100.0 * np.linspace(0.0, 1.0, lam.size)[:, None]
    counts = rng.poisson(level * gain * np.ones((1, n_angle))) / gain
    counts = counts + rng.normal(0.0, rn, counts.shape)
    path = tmp_path / "noise.txt"
    write_matrix(path, counts, lam, np.linspace(-30, 30, n_angle),
                 header=f"{HEADER}\ngain: {gain}; read_noise: {rn}")
    m = load_map(path)
    jac = (lam**2 / HC_EV_NM)[::-1]  # energy ascending
    a, b = detector_variance_terms(m)
    assert a.shape == (1, lam.size) and b.shape == (1, lam.size)
    np.testing.assert_allclose(a.ravel(), jac / gain, rtol=1e-12)
    np.testing.assert_allclose(b.ravel(), (jac * rn) ** 2, rtol=1e-12)
    measured = m.var("angle").values
    model = (a * m.mean("angle").values + b).ravel()
    # 3000 samples per column: the sample variance scatters by sqrt(2/3000) ~ 2.6 %
    assert measured == pytest.approx(model, rel=0.12)
    assert np.mean(measured / model) == pytest.approx(1.0, abs=0.015)


def test_variance_terms_of_raw_counts_and_where_they_do_not_apply():
    angle, energy = np.linspace(-5, 5, 5), np.linspace(1.5, 1.6, 20)
    ones = np.ones((5, 20))
    a, b = detector_variance_terms(_map(ones, angle, energy, gain=4.0, read_noise=3.0))
    np.testing.assert_array_equal(a, np.full((1, 20), 0.25))  # Source: Janesick (2007)
    np.testing.assert_array_equal(b, np.full((1, 20), 9.0))
    assert detector_variance_terms(_map(ones, angle, energy)) is None  # no gain
    assert detector_variance_terms(_map(ones, angle, energy, gain=2.0, units="counts/s")) \
        is None
    refl = _map(0.5 * ones, angle, energy, gain=2.0, kind="reflectance", units="1")
    assert detector_variance_terms(refl) is None


# ----------------------------------------------------------------------------- spikes
@pytest.mark.parametrize("gain", [True, False])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_spike_finder_leaves_a_steep_narrow_branch_alone(seed, gain):
    # common practice, no published source: a line 3 pixels wide that moves up to 10
    # pixels from one angle row to the next is not a cosmic ray
    da, up = _steep_map(seed, gain=gain)
    assert np.max(np.abs(np.diff(up))) / 0.0005 > 9.0  # the branch really is steep
    spikes, _ = find_spikes(da)
    assert int(spikes.sum()) == 0


@pytest.mark.parametrize("gain", [True, False])
@pytest.mark.parametrize("seed", [1, 5])
def test_spike_finder_masks_ten_injected_spikes(seed, gain):
    # common practice, no published source: a cosmic ray lights one or two pixels
    clean, _ = _steep_map(seed, gain=gain)
    da, truth, main_pixels = _inject(clean, seed + 10)
    spikes, _ = find_spikes(da)
    # a spike must rise three times above anything near it in the neighbouring rows (so the
    # peak of an undersampled line is never taken for one); a spike that lands next to a
    # brighter branch is then left to the likelihood's outlier mask: at most 2 of 10 here
    found = [spikes[i, j] for i, j in main_pixels]
    assert sum(found) >= 8
    assert not (spikes & ~truth).any()
    out = mask_spikes(da)
    masked = np.isnan(out.values)
    hit = np.zeros_like(truth)
    for (i, j), f in zip(main_pixels, found, strict=True):
        if f:
            hit[max(i - 1, 0):i + 2, max(j - 1, 0):j + 2] = True
    assert masked[truth & hit].all()  # the second pixels fall inside the one-pixel margin
    assert out.attrs["masked"] == 1
    rec = json.loads(out.attrs["preprocessing"])["spikes"]
    assert rec["spikes"] == int(spikes.sum()) and rec["pixels"] == int(masked.sum())
    # masked, never replaced: every other pixel keeps its value
    np.testing.assert_array_equal(out.values[~masked], da.values[~masked])


# ----------------------------------------------------------------------------- faint lines
def _faint_map(seed, peak=15.0):
    rng = np.random.default_rng(seed)
    angle = np.linspace(-20.0, 20.0, 41)
    energy = np.linspace(1.55, 1.65, 200)
    lp, up = _branches(angle, ex=1.600, ec0=1.590, n_eff=3.5, g=0.006)
    mean = 3.0 + peak * _lorentz(energy[None], lp[:, None], 0.003) \
        + 0.6 * peak * _lorentz(energy[None], up[:, None], 0.003)
    return _map(rng.poisson(mean).astype(float), angle, energy, gain=1.0, read_noise=0.5), lp


@pytest.mark.parametrize("seed", [3, 4])
def test_fifteen_counts_at_the_branch_peak_give_a_peak_table(seed):
    da, lp = _faint_map(seed)
    table = peak_table(da, n_peaks=2)
    found = table["found"].values[:, 0] == 1
    assert found.sum() >= 30  # of 41 angles
    z = (table["energy"].values[found, 0] - lp[found]) / table["energy_error"].values[found, 0]
    # never confidently wrong: the errors cover the truth (Gaussian: 95 % within 2 sigma)
    assert np.mean(np.abs(z) < 3.0) >= 0.9
    with pytest.raises(DataError, match="--min-snr"):
        peak_table(da, n_peaks=2, min_snr=500.0)


@pytest.mark.parametrize("gain", [True, False])
def test_counting_noise_alone_gives_no_peak_table(gain):
    # never confidently wrong: 3 counts of Poisson background and no line at all must be
    # refused, not turned into a branch (common practice, no published source)
    angle, energy = np.linspace(-20.0, 20.0, 41), np.linspace(1.55, 1.65, 200)
    for seed in range(5):
        counts = np.random.default_rng(seed).poisson(3.0, (41, 200)).astype(float)
        attrs = {"gain": 1.0, "read_noise": 0.5} if gain else {}
        with pytest.raises(DataError, match="no branch visible"):
            peak_table(_map(counts, angle, energy, **attrs), n_peaks=2)


# ----------------------------------------------------------------------------- windows
def test_exclude_windows_parse_and_mask():
    # common practice, no published source: the window's pixels are counted here directly
    w = parse_exclude("1.60:1.62@-5:5")
    assert w.energy == (1.60, 1.62) and w.angle == (-5.0, 5.0)
    assert parse_exclude("1.6:1.61").angle is None
    for bad in ("1.62:1.60", "1.6", "a:b", "1.6:1.7@3"):
        with pytest.raises(ConfigError, match="--exclude"):
            parse_exclude(bad)
    da, _ = _faint_map(3)
    out = mask_windows(da, ["1.60:1.62@-5:5", "1.56:1.57"])
    e, a = da["energy"].values, da["angle"].values
    want = (((e >= 1.60) & (e <= 1.62))[None] & (np.abs(a) <= 5)[:, None]) \
        | ((e >= 1.56) & (e <= 1.57))[None]
    np.testing.assert_array_equal(np.isnan(out.values), want)
    assert json.loads(out.attrs["preprocessing"])["excluded"]["pixels"] == int(want.sum())
    with pytest.warns(DataWarning, match="covers no pixel"):
        mask_windows(da, ["2.0:2.1"])


def test_camera_options_in_one_object():
    # common practice, no published source
    da, _ = _faint_map(4)
    out = prepare_camera_map(da, CameraOptions(mask_spikes=False, exclude=("1.56:1.57",)))
    rec = json.loads(out.attrs["preprocessing"])
    assert rec["spikes_off"] is True and rec["excluded"]["pixels"] > 0
    assert rec["saturated"]["pixels"] == 0
    with pytest.raises(ConfigError, match="positive"):
        CameraOptions(min_snr=0)
    assert CameraOptions.from_text("120").dark == 120.0
    assert CameraOptions.from_text("dark.txt").dark == "dark.txt"


# ----------------------------------------------------------------------------- the CLI
def test_inspect_prints_what_the_camera_steps_masked(tmp_path, capsys):
    # common practice, no published source: the counts printed are those injected here
    clean, _ = _steep_map(1)
    da, truth, main_pixels = _inject(clean, 11)
    path = tmp_path / "spiky.txt"
    write_matrix(path, da.values.T, da["energy"].values, da["angle"].values,
                 header="rows: energy [eV]; columns: angle [degree]; signal: counts\n"
                 "gain: 1; read_noise: 3")
    assert main(["inspect", str(path), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    n = int(truth.sum())
    assert f"cosmic-ray spikes masked: {n} spike pixel(s)" in out
    assert "saturated pixels masked: 0" in out
    assert main(["inspect", str(path), "--out", str(tmp_path), "--keep-spikes",
                 "--exclude", "1.46:1.47"]) == 0
    out = capsys.readouterr().out
    assert "spike masking switched off (--keep-spikes)" in out
    e = da["energy"].values
    n_window = 61 * int(((e >= 1.46) & (e <= 1.47)).sum())
    assert f"excluded windows masked: {n_window} pixel(s)" in out


def test_dispersion_command_prints_and_records_the_masks(tmp_path, capsys):
    # common practice, no published source
    clean, _ = _steep_map(1)
    da, truth, _ = _inject(clean, 11)
    da = da.isel(angle=slice(10, 51, 2))  # a smaller map keeps the fit short
    path = tmp_path / "spiky.txt"
    write_matrix(path, da.values.T, da["energy"].values, da["angle"].values,
                 header="rows: energy [eV]; columns: angle [degree]; signal: counts\n"
                 "gain: 1; read_noise: 3")
    n_spikes = int(find_spikes(validate_map(da.assign_attrs(gain=1.0, read_noise=3.0)))[0].sum())
    kept = truth[10:51:2]
    assert n_spikes == int(kept.sum()) > 0  # every injected pixel left in the smaller map
    with warnings.catch_warnings():  # 200 steps are too few for the gate: exit status 3
        warnings.simplefilter("ignore", ConvergenceWarning)
        status = main(["dispersion", str(path), "--peaks-only", "--quiet", "--seed", "1",
                       "--max-steps", "200", "--out", str(tmp_path / "fit"),
                       "--keep-saturated", "--exclude", "1.52:1.53", "--min-snr", "6"])
    assert status == 3
    out = capsys.readouterr().out
    assert f"cosmic-ray spikes masked: {n_spikes} spike pixel(s)" in out
    assert "saturation masking switched off (--keep-saturated)" in out
    prov = json.loads((tmp_path / "fit" / "summary.json").read_text())["provenance"]
    assert prov["preprocessing"]["spikes"]["spikes"] == n_spikes
    assert prov["preprocessing"]["excluded"]["windows"] == ["1.52:1.53 eV"]
    assert prov["peak_min_snr"] == 6.0


def test_peaks_of_undersampled_lines_are_not_taken_for_spikes():
    # common practice, no published source: with lines about one pixel wide the peak pixel's
    # height changes from row to row with the sampling phase (by far more than the noise on
    # a bright line); a coarse map of 6 angles x 60 energies must lose no pixel to the finder
    rng = np.random.default_rng(11)
    angle = np.linspace(-10.0, 10.0, 6)
    energy = np.linspace(1.52, 1.56, 60)  # 0.68 meV pixels for 0.3-0.8 meV lines
    lp, up = _branches(angle, ex=1.545, ec0=1.541, n_eff=3.4, g=0.005)
    mean = 100.0 + 4000.0 * _lorentz(energy[None], lp[:, None], 0.0005) \
        + 1500.0 * _lorentz(energy[None], up[:, None], 0.0008)
    counts = rng.poisson(mean) + rng.normal(0.0, 4.0, mean.shape)
    spikes, _ = find_spikes(_map(counts, angle, energy, gain=1.0, read_noise=4.0))
    assert int(spikes.sum()) == 0
