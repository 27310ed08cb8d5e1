"""Line fitting of synthetic spectra with known truth: peak tables of maps and power series.

All data here are simulated (invented sample, seeded numpy Generators).
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy.optimize import brentq
from scipy.signal import find_peaks
from scipy.special import voigt_profile

from polkit.errors import ConfigError, DataError, DataWarning
from polkit.files import save_figure
from polkit.linefit import extract_observables, peak_table
from polkit.models.lineshapes import lorentzian, voigt
from polkit.plotting.linefit import plot_extraction, plot_peak_table

# ---------------------------------------------------------------------------------------------
# synthetic data
# ---------------------------------------------------------------------------------------------


def anticrossing(angle_deg, ec0, ex, n_eff, g_meV):
    """Lower and upper branch energies [eV] and the exciton fraction of the lower branch.

    Planar-cavity photon E_C = E_C0 / sqrt(1 - sin^2(theta)/n_eff^2) coupled to an exciton:
    E = (E_C + E_X)/2 -/+ sqrt(delta^2 + 4 g^2)/2, delta = E_C - E_X, and the lower-branch
    exciton fraction |X|^2 = (1 + delta/sqrt(delta^2 + 4 g^2))/2.
    Source: Hopfield, Phys. Rev. 112, 1555 (1958)
    """
    s = np.sin(np.deg2rad(angle_deg))
    ec = ec0 / np.sqrt(1.0 - s**2 / n_eff**2)
    delta = ec - ex
    root = np.sqrt(delta**2 + 4.0 * (1e-3 * g_meV) ** 2)
    lower = 0.5 * (ec + ex) - 0.5 * root
    upper = 0.5 * (ec + ex) + 0.5 * root
    return lower, upper, 0.5 * (1.0 + delta / root)


def _map(signal, angle, energy, **attrs):
    base = {"units": "counts", "kind": "emission", "source": "invented-test-map"}
    return xr.DataArray(
        signal, dims=("angle", "energy"),
        coords={"angle": ("angle", angle, {"units": "degree", "long_name": "emission angle"}),
                "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"})},
        attrs={**base, **attrs})


def two_branch_map(seed, *, g_meV=4.0, ec0=1.592, widths=(1.0, 1.5), peak=2000.0,
                   upper_scale=0.5, background=20.0, n_angle=80, n_energy=400):
    """Emission map: two Lorentzians per angle on the anticrossing branches, Poisson noise.

    The lower branch is weighted by its photon fraction, the upper by its own (the lower
    branch's exciton fraction) times ``upper_scale``.
    """
    rng = np.random.default_rng(seed)
    angle = np.linspace(-20.0, 20.0, n_angle)
    energy = np.linspace(1.570, 1.630, n_energy)
    lower, upper, x_lower = anticrossing(angle, ec0, 1.600, 3.5, g_meV)
    # peak height h of a Lorentzian of FWHM w has area h * pi * w / 2 (areas in counts meV)
    a_lo = peak * np.pi / 2 * widths[0] * (1 - x_lower)
    a_up = peak * np.pi / 2 * widths[1] * upper_scale * x_lower
    e_meV = 1e3 * energy
    expected = (background
                + lorentzian(e_meV, 1e3 * lower[:, None], widths[0], a_lo[:, None])
                + lorentzian(e_meV, 1e3 * upper[:, None], widths[1], a_up[:, None]))
    counts = rng.poisson(expected).astype(float)
    return _map(counts, angle, energy, gain=1.0, read_noise=0.0), lower, upper, expected


def single_line_map(seed, noise, *, profile="lorentzian", n_angle=80):
    """One line per angle whose centre drifts with angle; known centre and FWHM."""
    rng = np.random.default_rng(seed)
    angle = np.linspace(-15.0, 15.0, n_angle)
    energy = np.linspace(1.590, 1.610, 300)
    centre = 1.600 + 3e-3 * (angle / 15.0) ** 2 - 2e-3 + 1e-4 * np.sin(angle)
    e_meV = 1e3 * energy
    if profile == "lorentzian":
        shape = lorentzian(e_meV, 1e3 * centre[:, None], 0.8, 1.0)
        fwhm = np.full(n_angle, 0.8)
    else:  # Voigt: FWHM_L 0.5 meV, sigma_G 0.3 meV; true FWHM measured by root finding
        shape = voigt(e_meV, 1e3 * centre[:, None], 0.5, 0.3, 1.0)
        peak = voigt_profile(0.0, 0.3, 0.25)
        half = 2 * brentq(lambda x: voigt_profile(x, 0.3, 0.25) - peak / 2, 0.0, 5.0)
        fwhm = np.full(n_angle, half)
    expected = 30.0 + 1500.0 * shape / shape.max(axis=1, keepdims=True)
    attrs = {}
    if noise == "poisson-gain":  # counts of a camera with 2 electrons per count
        counts = rng.poisson(2.0 * expected) / 2.0
        attrs = {"gain": 2.0, "read_noise": 0.0}
    elif noise == "poisson":
        counts = rng.poisson(expected).astype(float)
    else:  # Gaussian read-out noise of known size, unknown to the fitter
        counts = expected + rng.normal(0.0, 8.0, expected.shape)
    return _map(counts, angle, energy, **attrs), centre, fwhm


def pulls(table, truth, slot=0, var="energy"):
    ok = table["found"].values[:, slot] == 1
    got = table[var].values[ok, slot]
    err = table[f"{var}_error"].values[ok, slot]
    return (got - truth[ok]) / err


# ---------------------------------------------------------------------------------------------
# peak tables
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("noise", ["poisson-gain", "poisson", "gaussian"])
def test_centres_and_widths_recovered_with_calibrated_errors(noise):
    # Simulated lines (polkit's Lorentzian, checked elsewhere against its formula); calibrated
    # errors give pulls of unit standard
    # deviation (common practice, no published source)
    da, centre, fwhm = single_line_map(11, noise)
    table = peak_table(da, n_peaks=1, rng=3)
    assert table["found"].values[:, 0].all()
    for var, truth in (("energy", centre), ("fwhm", fwhm)):
        p = pulls(table, truth, var=var)
        assert np.mean(np.abs(p) < 3) >= 0.95, (var, p)
        assert np.max(np.abs(p)) < 5
        assert 0.7 < np.std(p) < 1.4, (var, np.std(p))
    assert table["energy"].attrs["units"] == "eV"
    assert table["fwhm"].attrs["units"] == "meV"


def test_voigt_profile_recovers_voigt_lines():
    # Source: simulated Voigt lines (scipy.special.voigt_profile); the true FWHM is measured
    # by root finding, independently of the Olivero-Longbothum formula used in the fit
    da, centre, fwhm = single_line_map(5, "poisson-gain", profile="voigt", n_angle=40)
    table = peak_table(da, n_peaks=1, profile="voigt")
    assert table["found"].values.all()
    for var, truth in (("energy", centre), ("fwhm", fwhm)):
        p = pulls(table, truth, var=var)
        assert np.mean(np.abs(p) < 3) >= 0.95
        assert 0.7 < np.std(p) < 1.4, (var, np.std(p))
    assert table.attrs["profile"] == "voigt"
    assert {"fwhm_lorentzian", "sigma_gaussian"} <= set(table.data_vars)


def test_gain_is_ignored_for_signals_that_are_not_counts():
    # Source: simulated truth.  Counts rescaled to a density per energy (as after a wavelength
    # to energy conversion) no longer follow counts/gain; the noise is then learnt instead.
    da, centre, _ = single_line_map(13, "poisson", n_angle=40)
    scaled = (da * 480.0).assign_attrs(da.attrs, units="counts nm/eV", gain=1.0, read_noise=0.0)
    table = peak_table(scaled, n_peaks=1)
    assert table.attrs["noise_model"].startswith("learnt")
    p = pulls(table, centre)
    assert 0.7 < np.std(p) < 1.4


def test_two_branch_map_follows_the_anticrossing():
    # Source: branches of Hopfield, Phys. Rev. 112, 1555 (1958) as simulated truth
    da, lower, upper, _ = two_branch_map(seed=2)
    table = peak_table(da, n_peaks=2)
    assert table.sizes == {"angle": 80, "peak": 2}
    found = table["found"].values
    assert found[:, 0].all() and found[:, 1].mean() >= 0.9
    for slot, truth in ((0, lower), (1, upper)):
        p = pulls(table, truth, slot)
        assert np.mean(np.abs(p) < 3) >= 0.95
        assert 0.7 < np.std(p) < 1.4
        ok = found[:, slot] == 1
        assert np.max(np.abs(table["energy"].values[ok, slot] - truth[ok])) < 2e-4  # eV
    both = found.all(axis=1)
    assert np.all(np.diff(table["energy"].values[both], axis=1) > 0)  # ordered by energy
    assert table.attrs["source"] == "invented-test-map"
    # splitting at the smallest separation: 2g = 8 meV, read from the table
    split = (table["energy"] .sel(peak=1) - table["energy"].sel(peak=0)).min()
    assert float(split) * 1e3 == pytest.approx(8.0, abs=0.1)


def test_weak_upper_branch_followed_through_a_shoulder():
    # Source: simulated truth (Hopfield 1958 branches).  Near the anticrossing the weak upper
    # line is only a shoulder of the lower one -- the noiseless spectrum has a single local
    # maximum -- and is followed there from its neighbours.
    da, lower, upper, expected = two_branch_map(
        seed=4, g_meV=1.3, ec0=1.598, widths=(2.0, 2.0), peak=3000.0, upper_scale=0.3,
        background=30.0, n_angle=61, n_energy=350)
    shoulder = np.array([find_peaks(row)[0].size == 1 for row in expected])
    assert shoulder.sum() >= 10  # the test means something only if shoulders exist
    table = peak_table(da, n_peaks=2)
    assert table["found"].values[shoulder, 1].all()
    p = pulls(table, upper, 1)
    assert np.mean(np.abs(p) < 3) >= 0.95 and np.max(np.abs(p)) < 5


def test_three_branches_of_two_excitons():
    # Source: the three branches of a photon coupled to two excitons, eigenvalues by
    # numpy.linalg.eigh (an independent solver); photon fractions weight the emission
    rng = np.random.default_rng(12)
    angle = np.linspace(-25.0, 25.0, 41)
    energy = np.linspace(1.565, 1.655, 400)
    s = np.sin(np.deg2rad(angle))
    ham = np.zeros((angle.size, 3, 3))
    ham[:, 0, 0] = 1.590 / np.sqrt(1 - s**2 / 3.5**2)
    ham[:, 1, 1], ham[:, 2, 2] = 1.600, 1.615
    ham[:, 0, 1] = ham[:, 1, 0] = 4e-3
    ham[:, 0, 2] = ham[:, 2, 0] = 3e-3
    levels, vectors = np.linalg.eigh(ham)
    areas = 2000.0 * np.pi / 2 * vectors[:, 0, :] ** 2
    expected = 20.0 + sum(lorentzian(1e3 * energy, 1e3 * levels[:, j, None], 1.0,
                                     areas[:, j, None]) for j in range(3))
    da = _map(rng.poisson(expected).astype(float), angle, energy, gain=1.0)
    table = peak_table(da, n_peaks=3)
    found = table["found"].values
    assert found[:, 0].all() and found[:, 1].all() and found[:, 2].sum() >= 10
    for slot in range(3):
        p = pulls(table, levels[:, slot], slot)
        assert np.mean(np.abs(p) < 3) >= 0.95 and np.max(np.abs(p)) < 5


def test_one_visible_branch_warns_and_leaves_the_second_slot_empty():
    # Source: simulated truth; with no upper branch g and detuning are degenerate
    da, lower, _, _ = two_branch_map(seed=7, upper_scale=0.0)
    with pytest.warns(DataWarning, match="at most one line"):
        table = peak_table(da, n_peaks=2)
    assert table["found"].values[:, 0].all()
    assert not table["found"].values[:, 1].any()
    assert np.isnan(table["energy"].values[:, 1]).all()
    p = pulls(table, lower, 0)
    assert np.mean(np.abs(p) < 3) >= 0.95


def test_pure_noise_is_refused():
    # common practice, no published source: a map without lines has no branch to report
    rng = np.random.default_rng(9)
    da, _, _, _ = two_branch_map(seed=1)
    noise = da.copy(data=rng.poisson(50.0, da.shape).astype(float))
    with pytest.raises(DataError, match="no branch visible"):
        peak_table(noise)
    flat = da.copy(data=rng.normal(100.0, 1.0, da.shape))
    del flat.attrs["gain"]
    with pytest.raises(DataError, match="no branch visible"):
        peak_table(flat, n_peaks=1)


def test_reflectance_dips_are_fitted_as_dips():
    # Source: simulated truth; a reflectance map shows the branches as dips below a baseline
    _, lower, upper, expected = two_branch_map(seed=3)
    rng = np.random.default_rng(8)
    reflectance = 0.95 - 0.6 * (expected - 20.0) / expected.max()
    da = _map(reflectance + rng.normal(0.0, 0.01, expected.shape),
              np.linspace(-20.0, 20.0, 80), np.linspace(1.570, 1.630, 400),
              units="1", kind="reflectance")
    table = peak_table(da, n_peaks=2)
    assert table["found"].values[:, 0].all()
    assert table["found"].values[:, 1].mean() >= 0.8
    for slot, truth in ((0, lower), (1, upper)):
        p = pulls(table, truth, slot)
        assert np.mean(np.abs(p) < 3) >= 0.95
    assert (table["amplitude"].values[table["found"].values == 1] > 0).all()  # depth
    assert table["background"].values == pytest.approx(0.95, abs=0.01)


def test_windows_masks_and_reproducibility():
    da, lower, _, _ = two_branch_map(seed=5, n_angle=30)
    table = peak_table(da, angle_window=(-5.0, 5.0), energy_window=(1.585, 1.615))
    assert float(table["angle"].min()) >= -5.0 and float(table["angle"].max()) <= 5.0
    assert table.attrs["energy_window"] == [1.585, 1.615]
    again = peak_table(da, angle_window=(-5.0, 5.0), energy_window=(1.585, 1.615))
    xr.testing.assert_identical(table, again)
    # masked pixels (NaN with attrs masked = 1) are skipped, not refused
    masked = da.copy()
    masked.values[:, 100:110] = np.nan
    masked.attrs["masked"] = 1
    tm = peak_table(masked, n_peaks=2)
    ok = tm["found"].values[:, 0] == 1
    assert ok.all()
    # common practice, no published source: the fit stays within 3 errors of the truth
    assert np.mean(np.abs(pulls(tm, lower, 0)) < 3) >= 0.9
    # a map on in-plane wavevector gives a table on k
    tk = peak_table(da.rename(angle="k").assign_coords(k=da["angle"].values / 10.0))
    assert tk["energy"].dims == ("k", "peak")
    assert tk["energy"].values == pytest.approx(peak_table(da)["energy"].values, nan_ok=True)


def test_tables_survive_a_netcdf_round_trip(tmp_path):
    # common practice, no published source: values, units and attrs are kept on disk
    from polkit.files import write_netcdf

    da, _, _, _ = two_branch_map(seed=6, n_angle=12)
    table = peak_table(da)
    write_netcdf(tmp_path / "table.nc", table)
    back = xr.load_dataset(tmp_path / "table.nc", engine="h5netcdf")
    xr.testing.assert_identical(back, table)
    cube, _, _ = power_cube(4, with_angle=False)
    cube = cube.rename_dims(power="point").assign_coords(
        sweep=("point", np.where(np.arange(30) < 15, "up", "down")))
    obs = extract_observables(cube)
    write_netcdf(tmp_path / "obs.nc", obs)
    back = xr.load_dataset(tmp_path / "obs.nc", engine="h5netcdf")
    assert back["linewidth"].attrs["units"] == "meV"
    assert list(back["sweep"].values) == list(obs["sweep"].values)
    np.testing.assert_array_equal(back["intensity"].values, obs["intensity"].values)


@pytest.mark.parametrize(
    ("change", "error", "match"),
    [
        (lambda d: d.rename(angle="theta"), DataError, "dims"),
        (lambda d: d.assign_coords(energy=d["energy"].assign_attrs(units="meV")), DataError,
         "eV"),
        (lambda d: d.isel(energy=slice(None, None, -1)), DataError, "ascending"),
        (lambda d: d.where(d["energy"] < 1.6), DataError, "NaN"),
        (lambda d: d.expand_dims(power=[1.0]), DataError, "dims"),
    ],
)
def test_malformed_maps_are_refused(change, error, match):
    # common practice, no published source: bad input is named, with what was expected
    da, _, _, _ = two_branch_map(seed=1, n_angle=10)
    with pytest.raises(error, match=match) as info:
        peak_table(change(da))
    assert "invented-test-map" in str(info.value)


def test_bad_options_are_refused():
    da, _, _, _ = two_branch_map(seed=1, n_angle=10)
    with pytest.raises(ConfigError, match="n_peaks"):
        peak_table(da, n_peaks=4)
    with pytest.raises(ConfigError, match="profile"):
        peak_table(da, profile="gauss")
    with pytest.raises(ConfigError, match="energy_window"):
        peak_table(da, energy_window=(1.62, 1.58))
    for bad in (True, 0.0, float("nan")):  # a flag is not a threshold of 1
        with pytest.raises(ConfigError, match="min_snr"):
            peak_table(da, min_snr=bad)
    with pytest.raises(DataError, match="energy_window"):
        peak_table(da, energy_window=(1.70, 1.80))
    with pytest.raises(DataError, match="gain"):
        peak_table(da.assign_attrs(gain=-1.0))
    with pytest.raises(DataError, match="DataArray"):
        peak_table(da.to_dataset(name="signal"))


def test_analytic_jacobian_matches_finite_differences():
    # Source: central finite differences, independent of the derivative formulas; both shapes
    from polkit.linefit.noise import Noise
    from polkit.linefit.spectrum import LineFitter

    x = np.linspace(-6.0, 6.0, 81)
    rng = np.random.default_rng(0)
    for profile, p in (("lorentzian", [3.0, -1.0, 1.2, 40.0, 2.0, 0.7, 15.0]),
                       ("voigt", [3.0, -1.0, 0.8, 0.4, 40.0, 2.0, 0.3, 0.9, 15.0])):
        fitter = LineFitter(x, rng.normal(size=x.size), profile=profile, sign=-1.0,
                            noise=Noise(), rng=rng)
        p = np.array(p)
        jac = fitter.model_jac(p)[1]
        for j in range(p.size):
            step = np.zeros(p.size)
            step[j] = 1e-6 * max(1.0, abs(p[j]))
            num = (fitter.model_jac(p + step)[0] - fitter.model_jac(p - step)[0]) / (2 * step[j])
            assert jac[:, j] == pytest.approx(num, rel=1e-5, abs=1e-6)


# ---------------------------------------------------------------------------------------------
# power series
# ---------------------------------------------------------------------------------------------


def power_cube(seed, *, with_angle=True):
    """A line whose centre shifts linearly and whose area grows with power (invented data)."""
    rng = np.random.default_rng(seed)
    power = np.geomspace(0.2, 20.0, 30)  # mW
    energy = np.linspace(1.590, 1.600, 200)
    centre = 1.5940 + 0.04e-3 * power  # 0.04 meV per mW
    area = 300.0 * power**1.2  # counts meV
    background = 10.0
    line = lorentzian(1e3 * energy[None, :], 1e3 * centre[:, None], 0.6, area[:, None])
    coords = {"power": ("power", power, {"units": "mW", "long_name": "pump power"}),
              "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"})}
    if with_angle:
        angle = np.linspace(-10.0, 10.0, 41)
        envelope = np.exp(-0.5 * (angle / 6.0) ** 2)
        expected = background + line[:, :, None] * envelope
        coords["angle"] = ("angle", angle, {"units": "degree"})
        dims = ("power", "energy", "angle")
    else:
        expected = background + line
        dims = ("power", "energy")
    counts = rng.poisson(expected).astype(float)
    cube = xr.Dataset({"intensity": (dims, counts, {"units": "counts"})}, coords=coords,
                      attrs={"kind": "emission", "gain": 1.0, "read_noise": 0.0,
                             "source": "invented-test-cube"})
    return cube, centre, expected - background


def test_power_series_recovers_shift_and_intensity():
    # Source: simulated truth; at k = 0 the default window averages the columns with
    # |angle| <= 1 degree, and the true integrated intensity is the expected line counts
    # summed over the energy window
    cube, centre, line_counts = power_cube(21)
    obs = extract_observables(cube)
    assert obs["found"].values.all()
    cols = np.abs(cube["angle"].values) <= 1.0
    truth_i = line_counts[:, :, cols].mean(axis=2).sum(axis=1)
    for var, truth in (("peak_energy", centre), ("intensity", truth_i),
                       ("linewidth", np.full(centre.size, 0.6))):
        p = (obs[var].values - truth) / obs[f"{var}_error"].values
        assert np.mean(np.abs(p) < 3) >= 0.9, var
        assert 0.6 < np.std(p) < 1.5, (var, np.std(p))
    # the blueshift per power from a weighted straight line through the peak energies
    power = obs["power"].values
    w = 1.0 / obs["peak_energy_error"].values
    (slope, _), cov = np.polyfit(power, obs["peak_energy"].values, 1, w=w, cov="unscaled")
    assert slope * 1e3 == pytest.approx(0.04, abs=3 * np.sqrt(cov[0, 0]) * 1e3)
    assert obs["intensity"].attrs["units"] == "counts"
    assert obs["peak_energy"].attrs["units"] == "eV"
    assert obs["linewidth"].attrs["units"] == "meV"
    assert obs.attrs["angle_columns"] == [-1.0, -0.5, 0.0, 0.5, 1.0]


def test_power_series_with_sweeps_and_a_chosen_angle_window():
    # Source: simulated truth; the sweep labels of a coherent-drive series survive
    cube, centre, line_counts = power_cube(22, with_angle=False)
    cube = cube.rename_dims(power="point").assign_coords(
        sweep=("point", np.where(np.arange(30) < 15, "up", "down")))
    obs = extract_observables(cube, energy_window=(1.591, 1.599))
    assert list(obs["sweep"].values[:2]) == ["up", "up"] and obs["sweep"].values[-1] == "down"
    assert "power" in obs.coords and obs["power"].dims == ("point",)
    p = (obs["peak_energy"].values - centre) / obs["peak_energy_error"].values
    assert np.mean(np.abs(p) < 3) >= 0.9
    keep = (cube["energy"].values >= 1.591) & (cube["energy"].values <= 1.599)
    truth_i = line_counts[:, keep].sum(axis=1)
    p = (obs["intensity"].values - truth_i) / obs["intensity_error"].values
    assert np.mean(np.abs(p) < 3) >= 0.9
    # an angle window picks other columns than k = 0
    cube2, _, _ = power_cube(23)
    obs2 = extract_observables(cube2, angle_window=(4.0, 6.0))
    assert obs2.attrs["angle_columns"] == [4.0, 4.5, 5.0, 5.5, 6.0]
    with pytest.raises(DataError, match="angle_window"):
        extract_observables(cube2, angle_window=(30.0, 40.0))


def test_power_series_bad_input():
    cube, _, _ = power_cube(1, with_angle=False)
    # a bare DataArray is accepted like the Dataset
    xr.testing.assert_identical(extract_observables(cube["intensity"].assign_attrs(cube.attrs)),
                                extract_observables(cube))
    with pytest.raises(DataError, match="dims"):
        extract_observables(cube.rename(power="temperature"))
    with pytest.raises(ConfigError, match="profile"):
        extract_observables(cube, profile="pseudo")


# ---------------------------------------------------------------------------------------------
# plots
# ---------------------------------------------------------------------------------------------


def test_plots_draw_and_save(tmp_path):
    # common practice, no published source: the figures build headless and save atomically
    da, _, _, _ = two_branch_map(seed=2, n_angle=20)
    table = peak_table(da)
    fig = plot_peak_table(da, table)
    assert len(fig.axes) == 2
    n_points = sum(len(line.get_xdata()) for line in fig.axes[0].lines)
    assert n_points == int(table["found"].sum())
    out = save_figure(tmp_path / "table.png", fig)
    assert out.stat().st_size > 1000

    cube, _, _ = power_cube(3)
    obs = extract_observables(cube, profile="voigt")
    fig2 = plot_extraction(cube, obs, n_examples=3)
    assert len(fig2.axes) == 3
    assert save_figure(tmp_path / "series.png", fig2).stat().st_size > 1000
