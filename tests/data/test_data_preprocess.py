"""Preprocessing on invented maps with a known truth."""

from __future__ import annotations

import numpy as np
import pytest
from data_helpers import polariton_map

from polkit.data import (
    bin_map,
    check_symmetry,
    crop,
    flag_saturated,
    make_map,
    remove_cosmic_rays,
    shift_axis,
    subtract_background,
    subtract_dark,
)
from polkit.errors import ConfigError, DataError

ANGLE = np.linspace(-20, 20, 81)  # 0.5 degree steps
ENERGY = np.linspace(1.460, 1.495, 200)  # 0.18 meV steps, FWHM 1.2 meV ~ 7 pixels


def _noisy_map(seed=1, **kw):
    rng = np.random.default_rng(seed)
    sig = polariton_map(ANGLE, ENERGY, rng=rng, **kw)
    return make_map(sig, ANGLE, ENERGY, gain=1.0, read_noise=5.0)


def _spike_positions(rng, n, shape, min_sep=5):
    chosen = []
    while len(chosen) < n:
        i, j = int(rng.integers(2, shape[0] - 2)), int(rng.integers(2, shape[1] - 2))
        if all(abs(i - a) >= min_sep or abs(j - b) >= min_sep for a, b in chosen):
            chosen.append((i, j))
    return chosen


@pytest.mark.parametrize("seed", [1, 2])
def test_cosmic_ray_removal_replaces_exactly_the_injected_spikes(seed):
    # simulated data with known truth: isolated spikes of 1500-5000 counts on a noisy map
    # (Poisson counts plus 5 counts read noise, branches peaking near 2100 counts), some of
    # them on the bright branches
    m = _noisy_map(seed)
    rng = np.random.default_rng(100 + seed)
    spikes = _spike_positions(rng, 25, m.shape)
    dirty = m.values.copy()
    for i, j in spikes:
        dirty[i, j] += rng.uniform(1500.0, 5000.0)
    lp_row = np.argmax(m.values[40])  # a spike right on the lower branch at normal incidence
    dirty[40, lp_row] += 1000.0
    spikes.append((40, int(lp_row)))
    hit = m.copy(data=dirty)
    clean = remove_cosmic_rays(hit)
    changed = {tuple(int(v) for v in ij) for ij in np.argwhere(clean.values != dirty)}
    assert changed == set(spikes)
    assert clean.attrs["cosmic_rays_replaced"] == len(spikes)
    assert f"{len(spikes)} pixel(s) replaced" in clean.attrs["history"]
    # the replacement is close to the noiseless truth
    truth = polariton_map(ANGLE, ENERGY)
    for i, j in spikes:
        assert abs(clean.values[i, j] - truth[i, j]) < 6 * np.sqrt(truth[i, j] + 25.0)
    # the input is untouched
    assert np.array_equal(hit.values, dirty)


def test_cosmic_ray_removal_leaves_a_clean_map_alone():
    m = _noisy_map(3)
    clean = remove_cosmic_rays(m)
    assert clean.attrs["cosmic_rays_replaced"] == 0
    assert np.array_equal(clean.values, m.values)


def test_binning_keeps_the_sum_of_counts():
    m = _noisy_map(4)
    b = bin_map(m, angle=4, energy=3)
    # 81 angles -> 20 bins (one left over), 200 energies -> 66 bins (two left over)
    assert b.shape == (20, 66)
    # Source: binning by summation conserves counts (definition)
    assert float(b.sum()) == pytest.approx(float(m.values[:80, :198].sum()), rel=1e-12)
    assert b["angle"].values[0] == pytest.approx(ANGLE[:4].mean())
    assert b["energy"].attrs["units"] == "eV"
    # Source: independent read noise adds in quadrature, sqrt(12) * 5 counts
    assert b.attrs["read_noise"] == pytest.approx(5.0 * np.sqrt(12.0))


def test_binning_averages_a_reflectance():
    r = make_map(np.full((81, 200), 0.7), ANGLE, ENERGY, units="1", kind="reflectance")
    b = bin_map(r, energy=5)
    assert np.allclose(b.values, 0.7)


def test_binning_refuses_bad_factors():
    m = _noisy_map(4)
    with pytest.raises(ConfigError, match=r"key 'energy'"):
        bin_map(m, energy=0)
    with pytest.raises(ConfigError, match=r"key 'k'"):
        bin_map(m, k=2)


@pytest.mark.parametrize("offset", [0.73, -1.35])
def test_symmetry_check_finds_an_injected_offset(offset):
    # simulated truth: the k = 0 axis sits at `offset` degree
    rng = np.random.default_rng(8)
    sig = polariton_map(ANGLE, ENERGY, center_deg=offset, rng=rng)
    report = check_symmetry(make_map(sig, ANGLE, ENERGY))
    assert report.offset == pytest.approx(offset, abs=0.05)
    assert report.units == "degree"
    assert report.correlation > report.correlation_at_zero
    assert "offset" in str(report)
    centred = shift_axis(make_map(sig, ANGLE, ENERGY), report.offset)
    assert check_symmetry(centred).offset == pytest.approx(0.0, abs=0.05)


def test_crop():
    m = _noisy_map(5)
    c = crop(m, angle=(-5.0, 5.0), energy=(1.465, 1.485))
    assert c["angle"].values.min() >= -5.0 and c["angle"].values.max() <= 5.0
    assert c.sizes["angle"] == 21
    assert "crop: angle [-5, 5] degree" in c.attrs["history"]
    with pytest.raises(DataError, match=r"field 'angle': expected at least 5"):
        crop(m, angle=(0.0, 1.0))
    with pytest.raises(ConfigError, match=r"key 'energy'"):
        crop(m, energy=(1.5, 1.4))


def test_subtract_dark_frame():
    rng = np.random.default_rng(6)
    truth = polariton_map(ANGLE, ENERGY)
    dark = rng.uniform(90.0, 110.0, size=truth.shape)
    m = make_map(truth + dark, ANGLE, ENERGY)
    d = make_map(dark, ANGLE, ENERGY)
    out = subtract_dark(m, d)
    assert out.values == pytest.approx(truth)
    assert "subtract_dark" in out.attrs["history"]
    assert subtract_dark(m, 50.0).values == pytest.approx(truth + dark - 50.0)
    with pytest.raises(DataError, match=r"field 'dark'.*shape"):
        subtract_dark(m, dark[:, :10])


def test_subtract_background_region_median():
    truth = polariton_map(ANGLE, ENERGY, background=0.0)
    m = make_map(truth + 123.0, ANGLE, ENERGY)
    # far below the lower branch the invented map is background plus Lorentzian tails
    out = subtract_background(m, energy=(1.460, 1.4605))
    region = (truth + 123.0)[:, ENERGY <= 1.4605]
    assert out.attrs["background_level"] == pytest.approx(np.median(region))
    assert out.values == pytest.approx(truth + 123.0 - np.median(region))


def test_flag_saturated_masks_and_counts():
    truth = polariton_map(ANGLE, ENERGY)
    m = make_map(truth, ANGLE, ENERGY, saturation=1e9)
    level = 1500.0
    expected = int((truth >= level).sum())
    assert expected > 0
    f = flag_saturated(m, level)
    assert f.attrs["masked"] == 1
    assert f.attrs["saturated_pixels"] == expected
    assert int(np.isnan(f.values).sum()) == expected
    assert f"{expected} pixel(s)" in f.attrs["history"]
    with pytest.raises(ConfigError, match=r"key 'level'"):
        flag_saturated(make_map(truth, ANGLE, ENERGY))
