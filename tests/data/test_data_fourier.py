"""Fourier-plane calibration: Abbe sine condition, pupil edges, angle to k."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr
from data_helpers import E_C0, branches, fourier_image, polariton_map

from polkit.data import (
    find_pupil_edges,
    load_map,
    make_map,
    pixel_to_angle,
    sin_theta_from_pixel,
    to_k,
    wavevector,
)
from polkit.errors import ConfigError, DataError, DataWarning
from polkit.files import write_netcdf

# Source: CODATA via scipy.constants: 1/(hbar c) in 1/(um eV)
K_PER_EV_UM = sc.e / (sc.hbar * sc.c) * 1e-6


def test_wavevector_constant_and_formula():
    # Source: k = E sin(theta) / (hbar c), k[1/um] = 5.0677 E[eV] sin(theta) (CODATA via
    # scipy.constants)
    assert K_PER_EV_UM == pytest.approx(5.0677, abs=1e-4)
    assert wavevector(30.0, 1.5) == pytest.approx(K_PER_EV_UM * 1.5 * 0.5, rel=1e-12)
    grid = wavevector(np.array([[-10.0], [0.0], [20.0]]), np.array([1.4, 1.6]))
    assert grid.shape == (3, 2)
    assert grid[1] == pytest.approx([0.0, 0.0])
    assert grid[2, 1] == pytest.approx(K_PER_EV_UM * 1.6 * math.sin(math.radians(20.0)))


def test_abbe_sine_worked_example():
    # Source: Abbe sine condition worked by hand: NA 0.5, r_NA 200 px, p - p0 = 100 px
    # gives sin(theta) = 0.25, theta = asin(0.25) = 14.4775 degree
    s = sin_theta_from_pixel(355.0, na=0.5, k0_pixel=255.0, pupil_radius_px=200.0)
    assert s == pytest.approx(0.25, abs=1e-15)
    theta = pixel_to_angle(np.array([155.0, 355.0]), na=0.5, k0_pixel=255.0, pupil_radius_px=200.0)
    assert theta == pytest.approx([-14.4775, 14.4775], abs=1e-4)
    # at the pupil edge theta = asin(NA) = 30 degree; beyond it nothing is seen
    edge = pixel_to_angle(np.array([455.0, 456.0]), na=0.5, k0_pixel=255.0, pupil_radius_px=200.0)
    assert edge[0] == pytest.approx(30.0)
    assert np.isnan(edge[1])


@pytest.mark.parametrize("bad", [{"na": 0.0}, {"na": 1.4}, {"pupil_radius_px": -3.0}])
def test_bad_calibration_is_a_config_error(bad):
    params = {"na": 0.5, "k0_pixel": 10.0, "pupil_radius_px": 100.0, **bad}
    key = next(iter(bad))
    with pytest.raises(ConfigError, match=rf"key '{key}'"):
        sin_theta_from_pixel(1.0, **params)


def test_pupil_edge_detection_recovers_the_radius():
    # simulated data with known truth: pupil centre 250.3 px, radius 180.7 px
    rng = np.random.default_rng(7)
    energy = np.linspace(1.46, 1.50, 60)
    image = fourier_image(512, energy, na=0.5, k0_pixel=250.3, pupil_radius_px=180.7, rng=rng)
    edges = find_pupil_edges(image)
    assert edges.radius == pytest.approx(180.7, abs=1.0)
    assert edges.k0_pixel == pytest.approx(250.3, abs=1.0)


def test_pupil_edge_detection_refuses_a_frame_filled_by_the_pupil():
    image = np.ones((64, 30))
    with pytest.raises(DataError, match="flat profile|frame edge"):
        find_pupil_edges(image)


def _pixel_map_file(tmp_path, *, attrs=None, n_pixel=160):
    energy = np.linspace(1.46, 1.50, 40)
    image = fourier_image(n_pixel, energy, na=0.5, k0_pixel=80.0, pupil_radius_px=60.0)
    ds = xr.Dataset(
        {"signal": (("pixel", "energy"), image, {"units": "counts"})},
        coords={
            "pixel": ("pixel", np.arange(n_pixel, dtype=float), {"units": "pixel"}),
            "energy": ("energy", energy, {"units": "eV"}),
        },
        attrs=attrs or {},
    )
    path = tmp_path / "fourier.nc"
    write_netcdf(path, ds)
    return path, image, energy


def test_load_pixel_axis_with_given_calibration_drops_pixels_beyond_the_na(tmp_path):
    path, image, _ = _pixel_map_file(tmp_path)
    with pytest.warns(DataWarning, match=r"field 'angle'.*pixel\(s\) beyond the pupil"):
        m = load_map(path, fourier={"na": 0.5, "k0_pixel": 80.0, "pupil_radius_px": 60.0})
    # pixels 20..140 lie within |p - 80| <= 60; the others are dropped
    assert m.sizes["angle"] == 121
    p = np.arange(20, 141, dtype=float)
    # Source: Abbe sine condition sin(theta) = NA (p - p0)/r_NA
    assert m["angle"].values == pytest.approx(np.degrees(np.arcsin(0.5 * (p - 80.0) / 60.0)))
    assert m.values == pytest.approx(image[20:141])
    assert m.attrs["na"] == 0.5 and m.attrs["pupil_radius_px"] == 60.0
    assert "sin(theta) = NA (p - p0)/r_NA" in m.attrs["history"]


def test_load_pixel_axis_with_calibration_from_file_attributes(tmp_path):
    path, _, _ = _pixel_map_file(
        tmp_path, attrs={"na": 0.5, "k0_pixel": 80.0, "pupil_radius_px": 60.0}
    )
    with pytest.warns(DataWarning, match="beyond the pupil"):
        m = load_map(path)
    assert m["angle"].values[0] == pytest.approx(-30.0)
    assert m["angle"].values[-1] == pytest.approx(30.0)


def test_load_pixel_axis_finds_the_pupil_itself(tmp_path):
    path, _, _ = _pixel_map_file(tmp_path)
    with pytest.warns(DataWarning, match="beyond the pupil"):
        m = load_map(path, fourier={"na": 0.5})
    # simulated truth: p0 = 80 px, r_NA = 60 px
    assert m.attrs["pupil_radius_px"] == pytest.approx(60.0, abs=1.0)
    assert m.attrs["k0_pixel"] == pytest.approx(80.0, abs=1.0)
    assert "pupil edges found" in m.attrs["fourier_calibration"]


def test_pixel_axis_without_numerical_aperture_is_refused(tmp_path):
    path, _, _ = _pixel_map_file(tmp_path)
    with pytest.raises(DataError, match=r"field 'na'.*numerical aperture"):
        load_map(path)


def test_unknown_fourier_key_is_a_config_error(tmp_path):
    path, _, _ = _pixel_map_file(tmp_path)
    with pytest.raises(ConfigError, match=r"key 'focal_length'"):
        load_map(path, fourier={"na": 0.5, "focal_length": 2.0})


def test_to_k_places_a_function_of_k_exactly():
    # A signal that is a linear function of k = E sin(theta)/(hbar c) must come out of
    # the resampling as exactly that function of the new k coordinate.
    # Source: linear interpolation is exact for linear functions; k from CODATA
    angle = np.linspace(-20, 20, 41)
    energy = np.linspace(1.45, 1.50, 30)
    k = K_PER_EV_UM * np.outer(np.sin(np.radians(angle)), energy)
    m = make_map(100.0 + 3.0 * k, angle, energy)
    km = to_k(m)
    assert km.dims == ("k", "energy")
    assert km["k"].attrs["units"] == "1/um"
    expected = 100.0 + 3.0 * km["k"].values[:, None] * np.ones(energy.size)[None, :]
    assert km.values == pytest.approx(expected, rel=1e-12)


def test_to_k_keeps_the_dispersion_minimum_at_k_zero():
    angle = np.linspace(-20, 20, 81)
    energy = np.linspace(1.46, 1.49, 300)
    m = make_map(polariton_map(angle, energy), angle, energy)
    km = to_k(m)
    i0 = int(np.argmin(np.abs(km["k"].values)))
    lp0, _ = branches(0.0)
    # simulated truth: the lower branch at k = 0
    assert km["energy"].values[np.argmax(km.values[i0])] == pytest.approx(lp0, abs=2e-4)
    assert lp0 < E_C0
