"""Every reader loads a small file written in the test to the same canonical object."""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import scipy.constants as sc
import xarray as xr
from data_helpers import polariton_map, write_matrix

from polkit.data import choose_reader, load_map, load_series, make_map, make_series
from polkit.files import write_netcdf

HC = sc.h * sc.c / sc.e * 1e9  # Source: CODATA via scipy.constants (eV nm)

ANGLE = np.linspace(-15.0, 15.0, 31)
WAVELENGTH = np.linspace(830.0, 850.0, 120)  # ascending, so energy comes out descending


@pytest.fixture(scope="module")
def raw_map():
    """Invented counts on (angle, wavelength) and the canonical map expected from them."""
    rng = np.random.default_rng(11)
    sig = polariton_map(ANGLE, HC / WAVELENGTH, rng=rng)
    # expected canonical form, computed here from first principles:
    # E = hc/lambda ascending; I_E = I_lambda lambda^2 / hc  (Source: change of variables)
    energy = HC / WAVELENGTH[::-1]
    expected = (sig * WAVELENGTH**2 / HC)[:, ::-1]
    return sig, energy, expected


def _check(m, energy, expected):
    assert m.dims == ("angle", "energy")
    assert m.dtype == np.float64
    assert m["angle"].attrs["units"] == "degree"
    assert m["energy"].attrs["units"] == "eV"
    assert m["energy"].attrs["long_name"]
    assert m.attrs["units"] == "counts nm/eV"
    assert m.attrs["kind"] == "emission"
    assert m.attrs["wavelength_medium"] == "vacuum"
    np.testing.assert_allclose(m["angle"].values, ANGLE, rtol=0, atol=1e-12)
    np.testing.assert_allclose(m["energy"].values, energy, rtol=1e-12)
    np.testing.assert_allclose(m.values, expected, rtol=1e-12)


def test_netcdf_reader(tmp_path, raw_map):
    sig, energy, expected = raw_map
    ds = xr.Dataset(
        {"intensity": (("wavelength", "angle"), sig.T, {"units": "counts"})},
        coords={
            "wavelength": ("wavelength", WAVELENGTH, {"units": "nm"}),
            "angle": ("angle", ANGLE, {"units": "degree"}),
        },
        attrs={"sample": "invented demo cavity", "temperature": 10.0},
    )
    path = tmp_path / "map.nc"
    write_netcdf(path, ds)
    assert choose_reader(path) == "netcdf"
    m = load_map(path)
    _check(m, energy, expected)
    assert m.attrs["sample"] == "invented demo cavity"
    assert m.attrs["temperature"] == 10.0
    assert m.attrs["source"] == str(path)


def test_classic_netcdf3_reader(tmp_path, raw_map):
    sig, energy, expected = raw_map
    ds = xr.Dataset(
        {"counts": (("angle", "wavelength"), sig, {"units": "counts"})},
        coords={
            "wavelength": ("wavelength", WAVELENGTH, {"units": "nm"}),
            "angle": ("angle", np.radians(ANGLE), {"units": "rad"}),
        },
    )
    path = tmp_path / "map3.nc"
    ds.to_netcdf(path, engine="scipy")
    _check(load_map(path), energy, expected)


def test_plain_hdf5_reader(tmp_path, raw_map):
    sig, energy, expected = raw_map
    path = tmp_path / "map.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("signal", data=sig).attrs["units"] = "counts"
        f.create_dataset("angle", data=ANGLE).attrs["units"] = "degree"
        f.create_dataset("wavelength", data=WAVELENGTH).attrs["units"] = "nm"
        f.attrs["sample"] = "invented"
    assert choose_reader(path) == "netcdf"
    m = load_map(path)
    _check(m, energy, expected)
    assert m.attrs["sample"] == "invented"


def test_npz_reader(tmp_path, raw_map):
    sig, energy, expected = raw_map
    path = tmp_path / "map.npz"
    np.savez(
        path,
        signal=sig.T,
        wavelength=WAVELENGTH,
        angle=ANGLE,
        units_signal="counts",
        units_wavelength="nm",
        units_angle="degree",
        kind="emission",
    )
    assert choose_reader(path) == "npz"
    _check(load_map(path), energy, expected)


def test_npz_reader_with_explicit_dims(tmp_path):
    # a square signal is ambiguous by length; dims_signal settles it
    sig = np.arange(25 * 25, dtype=float).reshape(25, 25) + 10
    path = tmp_path / "square.npz"
    np.savez(
        path,
        signal=sig,
        energy=np.linspace(1.4, 1.5, 25),
        angle=np.linspace(-10, 10, 25),
        units_signal="counts",
        units_energy="eV",
        units_angle="degree",
        dims_signal=np.array(["energy", "angle"]),
    )
    m = load_map(path)
    np.testing.assert_array_equal(m.values, sig.T)


@pytest.mark.parametrize("transposed", [False, True])
def test_matrix_reader(tmp_path, raw_map, transposed):
    sig, energy, expected = raw_map
    path = tmp_path / "map.txt"
    if transposed:
        header = "rows: angle [degree]; columns: wavelength [nm]; signal: counts"
        write_matrix(path, sig, ANGLE, WAVELENGTH, header=header, delimiter="\t")
    else:
        header = "rows: wavelength [nm]; columns: angle [degree]; signal: counts"
        write_matrix(path, sig.T, WAVELENGTH, ANGLE, header=header)
    assert choose_reader(path) == "matrix"
    _check(load_map(path), energy, expected)


def test_matrix_reader_csv_with_bom_crlf_and_no_corner(tmp_path, raw_map):
    sig, energy, expected = raw_map
    path = tmp_path / "map.csv"
    write_matrix(path, sig.T, WAVELENGTH, ANGLE, delimiter=",", corner="", newline="\r\n")
    data = b"\xef\xbb\xbf" + path.read_bytes()
    path.write_bytes(data)
    m = load_map(path, energy_units="nm", angle_units="degree", signal_units="counts")
    _check(m, energy, expected)


def test_matrix_reader_without_header_uses_the_caller_units(tmp_path):
    path = tmp_path / "plain.dat"
    e = np.linspace(1450.0, 1500.0, 25)  # meV
    write_matrix(path, np.full((25, 6), 3.0), e, np.linspace(-5, 5, 6))
    m = load_map(path, energy_units="meV", angle_units="degree", signal_units="counts/s")
    assert m["energy"].values == pytest.approx(e / 1000.0)
    assert m.attrs["units"] == "counts/s"
    assert "wavelength_medium" not in m.attrs


def test_all_readers_agree(tmp_path, raw_map):
    sig, _, _ = raw_map
    write_matrix(
        tmp_path / "a.txt",
        sig.T,
        WAVELENGTH,
        ANGLE,
        header="rows: wavelength [nm]; columns: angle [degree]; signal: counts",
    )
    np.savez(
        tmp_path / "b.npz",
        counts=sig,
        angle=ANGLE,
        wavelength=WAVELENGTH,
        units="counts",
        units_angle="degree",
        units_wavelength="nm",
    )
    a = load_map(tmp_path / "a.txt")
    b = load_map(tmp_path / "b.npz")
    xr.testing.assert_allclose(a, b)


def test_netcdf_round_trip_keeps_data_coords_and_units(tmp_path):
    angle = np.linspace(-10, 10, 11)
    energy = np.linspace(1.45, 1.50, 40)
    m = make_map(
        polariton_map(angle, energy), angle, energy, sample="invented", temperature=8.0, gain=2.0
    )
    path = tmp_path / "canon.nc"
    write_netcdf(path, m)
    back = load_map(path)
    xr.testing.assert_equal(back, m)
    for dim in m.dims:
        assert back[dim].attrs == m[dim].attrs
    for key in ("units", "kind", "sample", "temperature", "gain", "masked"):
        assert back.attrs[key] == m.attrs[key]


def test_k_map_round_trip(tmp_path):
    k = np.linspace(-3, 3, 13)
    energy = np.linspace(1.45, 1.50, 30)
    m = make_map(np.full((13, 30), 5.0), k=k, energy=energy, units="1", kind="reflectance")
    path = tmp_path / "k.nc"
    write_netcdf(path, m)
    back = load_map(path)
    assert back.dims == ("k", "energy")
    xr.testing.assert_equal(back, m)


# ----------------------------------------------------------------------------- series
SERIES_CSV = (
    "# invented coherent-drive sweep; sample: demo\r\n"
    "power [uW],intensity [counts],wavelength [nm],linewidth [nm],sweep\r\n"
    "# a comment between rows\r\n"
    "100,1000,845.00,0.10,up\r\n"
    "200,2100,845.01,0.11,up\r\n"
    "300,3300,845.02,0.12,up\r\n"
    "200,2500,845.03,0.11,down\r\n"
    "100,1200,845.00,0.10,down\r\n"
)


def test_csv_series_with_bom_crlf_comments_and_sweep(tmp_path):
    path = tmp_path / "sweep.csv"
    path.write_bytes(b"\xef\xbb\xbf" + SERIES_CSV.encode())
    assert choose_reader(path) == "csv"
    s = load_series(path)
    # repeated powers and a sweep column: dim 'point' in measurement order
    assert s["intensity"].dims == ("point",)
    assert list(s["sweep"].values) == ["up", "up", "up", "down", "down"]
    assert s["power"].values == pytest.approx([0.1, 0.2, 0.3, 0.2, 0.1])
    assert s["power"].attrs["units"] == "mW"
    lam = np.array([845.0, 845.01, 845.02, 845.03, 845.0])
    # Source: E = hc/lambda, dE = hc dlambda / lambda^2 (CODATA via scipy.constants)
    assert s["peak_energy"].values == pytest.approx(HC / lam, rel=1e-12)
    assert s["peak_energy"].attrs["units"] == "eV"
    dl = np.array([0.10, 0.11, 0.12, 0.11, 0.10])
    assert s["linewidth"].values == pytest.approx(HC * dl / lam**2 * 1e3, rel=1e-9)
    assert s["linewidth"].attrs["units"] == "meV"
    assert s.attrs["sample"] == "demo"
    assert s.attrs["wavelength_medium"] == "vacuum"


def test_csv_series_distinct_powers_sorted_on_dim_power(tmp_path):
    path = tmp_path / "nonres.csv"
    path.write_text(
        "power [mW];intensity [counts/s];peak_energy [eV];linewidth [ueV];linewidth_error [ueV]\n"
        "2.0;50;1.4712;400;20\n"
        "1.0;10;1.4710;500;25\n"
        "4.0;900;1.4716;150;10\n"
    )
    s = load_series(path)
    assert s["intensity"].dims == ("power",)
    assert s["power"].values == pytest.approx([1.0, 2.0, 4.0])
    assert s["intensity"].values == pytest.approx([10.0, 50.0, 900.0])
    assert s["linewidth"].values == pytest.approx([0.5, 0.4, 0.15])  # ueV -> meV
    assert s["linewidth_error"].values == pytest.approx([0.025, 0.02, 0.01])
    assert s["intensity"].attrs["units"] == "counts/s"


def test_repeated_powers_without_sweep_use_dim_point(tmp_path):
    path = tmp_path / "repeat.csv"
    path.write_text("power [mW],intensity [counts]\n1,10\n1,11\n2,20\n3,30\n")
    s = load_series(path)
    assert s["intensity"].dims == ("point",)
    assert "sweep" not in s.variables


def test_npz_series_table_and_netcdf_round_trip(tmp_path):
    path = tmp_path / "s.npz"
    np.savez(
        path,
        power=np.array([1.0, 2.0, 3.0, 2.0]),
        intensity=np.array([5.0, 9.0, 20.0, 12.0]),
        sweep=np.array(["up", "up", "up", "down"]),
        units_power="mW",
        units_intensity="counts",
    )
    s = load_series(path)
    assert s["intensity"].dims == ("point",)
    out = tmp_path / "s.nc"
    write_netcdf(out, s)
    back = load_series(out)
    xr.testing.assert_equal(back, s)
    assert back["power"].attrs["units"] == "mW"


def test_series_round_trip_on_dim_power(tmp_path):
    s = make_series(
        [0.5, 1.0, 2.0],
        [1.0, 4.0, 30.0],
        peak_energy=[1.47, 1.4702, 1.4705],
        peak_energy_error=[1e-5, 1e-5, 2e-5],
        sample="invented",
    )
    path = tmp_path / "p.nc"
    write_netcdf(path, s)
    back = load_series(path)
    xr.testing.assert_equal(back, s)
    assert back["peak_energy_error"].attrs["units"] == "eV"


def test_netcdf_spectra_cube(tmp_path):
    rng = np.random.default_rng(3)
    power_uw = np.array([10.0, 20.0, 40.0, 80.0])
    cube = rng.uniform(1.0, 2.0, size=(4, WAVELENGTH.size))
    ds = xr.Dataset(
        {"intensity": (("power", "wavelength"), cube, {"units": "counts"})},
        coords={
            "power": ("power", power_uw, {"units": "uW"}),
            "wavelength": ("wavelength", WAVELENGTH, {"units": "nm"}),
        },
    )
    path = tmp_path / "cube.nc"
    write_netcdf(path, ds)
    s = load_series(path)
    assert s["intensity"].dims == ("power", "energy")
    assert s["power"].values == pytest.approx(power_uw / 1000.0)
    # Source: change of variables I_E = I_lambda lambda^2/hc (CODATA hc)
    np.testing.assert_allclose(s["intensity"].values, (cube * WAVELENGTH**2 / HC)[:, ::-1])


def test_npz_three_dimensional_cube(tmp_path):
    energy = np.linspace(1.45, 1.5, 25)
    angle = np.linspace(-8, 8, 9)
    power = np.array([1.0, 2.0, 3.0])
    cube = np.ones((energy.size, power.size, angle.size))
    path = tmp_path / "cube.npz"
    np.savez(
        path,
        intensity=cube,
        energy=energy,
        power=power,
        angle=angle,
        units_intensity="counts",
        units_energy="eV",
        units_power="mW",
        units_angle="degree",
        dims_intensity=np.array(["energy", "power", "angle"]),
    )
    s = load_series(path)
    assert s["intensity"].dims == ("power", "angle", "energy")
    assert s.sizes == {"power": 3, "angle": 9, "energy": 25}
