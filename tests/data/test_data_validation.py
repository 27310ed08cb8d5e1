"""Bad input: every refusal is a DataError naming the file and the field."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from data_helpers import polariton_map, write_matrix

from polkit.data import (
    load_map,
    load_series,
    make_map,
    make_series,
    validate_map,
    validate_series,
)
from polkit.errors import ConfigError, DataError, DataWarning
from polkit.files import write_netcdf

ANGLE = np.linspace(-10, 10, 11)
ENERGY = np.linspace(1.45, 1.50, 40)
HEADER = "rows: energy [eV]; columns: angle [degree]; signal: counts"


def _matrix(tmp_path, sig=None, energy=ENERGY, angle=ANGLE, header=HEADER, name="m.txt"):
    path = tmp_path / name
    if sig is None:
        sig = polariton_map(angle, energy).T
    write_matrix(path, sig, energy, angle, header=header)
    return path


# ----------------------------------------------------------------------------- files
@pytest.mark.parametrize("name", ["empty.txt", "empty.csv", "empty.nc", "empty.npz"])
def test_empty_file(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(b"")
    with pytest.raises(DataError, match=r"empty\.\w+: field 'file': expected data; found an empty"):
        load_map(path)


def test_comment_only_file(tmp_path):
    path = tmp_path / "comments.txt"
    path.write_text("# nothing here\n\n# still nothing\n")
    with pytest.raises(DataError, match=r"field 'file'.*only comments"):
        load_map(path)


def test_missing_file(tmp_path):
    with pytest.raises(DataError, match=r"field 'file'.*nothing at this path"):
        load_map(tmp_path / "absent.nc")


def test_suffix_that_contradicts_the_content(tmp_path):
    path = tmp_path / "looks.nc"
    path.write_text("power [mW],intensity [counts]\n1,2\n")
    with pytest.raises(DataError, match=r"field 'file'.*netCDF/HDF5 file as its suffix says"):
        load_map(path)


def test_truncated_netcdf(tmp_path):
    ds = xr.Dataset({"signal": (("angle", "energy"), np.ones((6, 20)))})
    good = tmp_path / "good.nc"
    write_netcdf(good, ds)
    bad = tmp_path / "bad.nc"
    bad.write_bytes(good.read_bytes()[:300])
    with pytest.raises(DataError, match=r"bad\.nc: field 'file': expected a readable netCDF/HDF5"):
        load_map(bad)


def test_npz_with_pickled_member_is_refused(tmp_path):
    path = tmp_path / "pickled.npz"
    np.savez(path, signal=np.array([{"a": 1}, None], dtype=object))
    with pytest.raises(DataError, match=r"field 'file'.*needs pickle"):
        load_map(path)


def test_unknown_reader_name_and_option(tmp_path):
    path = _matrix(tmp_path)
    with pytest.raises(DataError, match=r"field 'reader'.*'excel'"):
        load_map(path, reader="excel")
    with pytest.raises(ConfigError, match=r"key 'sheet'"):
        load_map(path, sheet=2)


def test_map_loader_on_a_series_file_and_back(tmp_path):
    table = tmp_path / "series.csv"
    table.write_text("power [mW],intensity [counts]\n1,2\n2,3\n3,4\n")
    with pytest.raises(DataError, match=r"field 'signal'.*load_series"):
        load_map(table)
    with pytest.raises(DataError, match=r"field 'power'.*load_map"):
        load_series(_matrix(tmp_path))


# ----------------------------------------------------------------------------- values
def test_nan_is_refused_by_default_and_masked_on_request(tmp_path):
    sig = polariton_map(ANGLE, ENERGY).T
    sig[3, 4] = np.nan
    sig[5, 6] = np.inf
    path = _matrix(tmp_path, sig)
    with pytest.raises(DataError, match=r"m\.txt: field 'signal': expected finite values"):
        load_map(path)
    with pytest.warns(DataWarning, match=r"field 'signal'.*2 NaN/Inf value\(s\) masked"):
        m = load_map(path, mask_nonfinite=True)
    assert m.attrs["masked"] == 1
    assert int(np.isnan(m.values).sum()) == 2


def test_inf_in_memory_is_refused():
    m = make_map(polariton_map(ANGLE, ENERGY), ANGLE, ENERGY)
    bad = m.copy(data=np.where(m.values > 1e3, np.inf, m.values)).assign_attrs(masked=1)
    with pytest.raises(DataError, match=r"field 'signal'.*infinite"):
        validate_map(bad)


def test_non_monotonic_axis(tmp_path):
    energy = ENERGY.copy()
    energy[[10, 11]] = energy[[11, 10]]
    with pytest.raises(DataError, match=r"field 'energy'.*monotonic.*followed by"):
        load_map(_matrix(tmp_path, energy=energy))


def test_duplicate_axis_values(tmp_path):
    angle = ANGLE.copy()
    angle[4] = angle[3]
    with pytest.raises(DataError, match=r"field 'angle'.*distinct axis values.*repeated"):
        load_map(_matrix(tmp_path, angle=angle))


def test_shape_mismatch_between_axes_and_signal(tmp_path):
    with pytest.raises(
        DataError, match=r"field 'signal'.*shape \(11, 40\).*found shape \(40, 11\)"
    ):
        make_map(np.ones((40, 11)), ANGLE, ENERGY)
    path = tmp_path / "shape.npz"
    np.savez(
        path,
        signal=np.ones((11, 39)),
        angle=ANGLE,
        energy=ENERGY,
        units_signal="counts",
        units_angle="degree",
        units_energy="eV",
    )
    with pytest.raises(DataError, match=r"shape\.npz: field 'signal'.*matching the signal's shape"):
        load_map(path)


def test_ragged_matrix_rows(tmp_path):
    path = _matrix(tmp_path)
    lines = path.read_text().splitlines()
    lines[5] = lines[5] + " 7.0"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(DataError, match=r"field 'row'.*at line 6"):
        load_map(path)


def test_missing_axis_units(tmp_path):
    path = tmp_path / "nounits.txt"
    write_matrix(path, np.ones((40, 11)), ENERGY, ANGLE)
    with pytest.raises(DataError, match=r"field 'energy'.*expected units on axis.*energy_units="):
        load_map(path, signal_units="counts")


def test_missing_signal_units(tmp_path):
    path = _matrix(tmp_path, header="rows: energy [eV]; columns: angle [degree]")
    with pytest.raises(DataError, match=r"field 'units'.*units of the signal.*signal_units="):
        load_map(path)


def test_conflicting_units_option(tmp_path):
    with pytest.raises(DataError, match=r"field 'energy'.*energy_units='nm'.*'eV'"):
        load_map(_matrix(tmp_path), energy_units="nm")


def test_unknown_kind(tmp_path):
    with pytest.raises(DataError, match=r"field 'kind'.*'photocurrent'"):
        load_map(_matrix(tmp_path), kind="photocurrent")


def test_unknown_medium(tmp_path):
    with pytest.raises(DataError, match=r"field 'wavelength_medium'.*'water'"):
        load_map(_matrix(tmp_path), wavelength_medium="water")


def test_negative_emission_beyond_noise():
    rng = np.random.default_rng(5)
    sig = rng.normal(0.0, 3.0, size=(ANGLE.size, ENERGY.size))
    # background over-subtracted by 200 counts on a band of pixels: -66 sigma
    sig[:, 10:20] -= 200.0
    with pytest.raises(DataError, match=r"field 'signal'.*negative beyond the noise.*sigma"):
        make_map(sig, ANGLE, ENERGY, read_noise=3.0)
    # noise around zero is fine, and a reflectance may be anything
    make_map(rng.normal(0.0, 3.0, size=sig.shape), ANGLE, ENERGY, read_noise=3.0)
    make_map(sig, ANGLE, ENERGY, units="1", kind="reflectance")


def test_a_single_negative_pixel_is_only_a_warning():
    sig = polariton_map(ANGLE, ENERGY)
    sig[2, 2] = -500.0
    with pytest.warns(DataWarning, match=r"field 'signal'.*1 pixel\(s\) below -5 sigma"):
        make_map(sig, ANGLE, ENERGY, read_noise=5.0)


@pytest.mark.parametrize(("n_angle", "n_energy", "field"), [(4, 40, "angle"), (11, 19, "energy")])
def test_too_few_points_in_a_map(n_angle, n_energy, field):
    a = np.linspace(-5, 5, n_angle)
    e = np.linspace(1.45, 1.5, n_energy)
    with pytest.raises(DataError, match=rf"field '{field}': expected at least"):
        make_map(np.ones((n_angle, n_energy)), a, e)


def test_too_few_powers():
    with pytest.raises(DataError, match=r"field 'power': expected at least 3 powers"):
        make_series([1.0, 2.0], [3.0, 4.0])


def test_bad_attributes():
    with pytest.raises(DataError, match=r"field 'temperature'.*finite number > 0"):
        make_map(np.ones((11, 40)), ANGLE, ENERGY, temperature=-4.0)
    with pytest.raises(DataError, match=r"field 'flags'.*netCDF can store"):
        make_map(np.ones((11, 40)), ANGLE, ENERGY, flags={"a": 1})
    with pytest.raises(DataError, match=r"field 'masked'"):
        make_map(np.ones((11, 40)), ANGLE, ENERGY, masked=True)


def test_saturated_pixels_draw_a_warning():
    sig = polariton_map(ANGLE, ENERGY)
    with pytest.warns(DataWarning, match=r"field 'signal'.*at or above the saturation level"):
        make_map(sig, ANGLE, ENERGY, saturation=1500.0)


def test_implausible_energy_range_draws_a_warning():
    with pytest.warns(DataWarning, match=r"field 'energy'.*check the units"):
        make_map(np.ones((11, 40)), ANGLE, np.linspace(800, 850, 40))


def test_validate_map_refuses_other_objects():
    with pytest.raises(DataError, match=r"field 'dims'"):
        validate_map(xr.DataArray(np.ones((40, 11)), dims=("energy", "angle")))
    with pytest.raises(DataError, match=r"field 'map'"):
        validate_map(np.ones((3, 3)))
    m = make_map(np.ones((11, 40)), ANGLE, ENERGY)
    m["energy"].attrs["units"] = "nm"
    with pytest.raises(DataError, match=r"field 'energy'.*units 'eV'.*'nm'"):
        validate_map(m)


# ----------------------------------------------------------------------------- CSV
def _csv(tmp_path, text, name="t.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_csv_decimal_comma_names_line_and_column(tmp_path):
    path = _csv(tmp_path, "power [mW];intensity [counts]\n1.0;2.0\n2,5;3.0\n3.0;4.0\n")
    with pytest.raises(DataError, match=r"field 'power'.*line 3, column 'power'.*decimal comma"):
        load_series(path)


def test_csv_decimal_comma_with_comma_delimiter(tmp_path):
    path = _csv(tmp_path, "power [mW],intensity [counts]\n1,5,2,0\n")
    with pytest.raises(DataError, match=r"field 'row'.*line 2.*decimal commas"):
        load_series(path)


def test_csv_unparsable_cell(tmp_path):
    path = _csv(tmp_path, "power [mW],intensity [counts]\n1,2\n2,lots\n3,4\n")
    with pytest.raises(DataError, match=r"field 'intensity'.*line 3, column 'intensity'.*'lots'"):
        load_series(path)


def test_csv_missing_units(tmp_path):
    path = _csv(tmp_path, "power,intensity [counts]\n1,2\n2,3\n3,4\n")
    with pytest.raises(DataError, match=r"field 'power'.*'power \[mW\]'"):
        load_series(path)


def test_csv_unknown_power_units(tmp_path):
    path = _csv(tmp_path, "power [hp],intensity [counts]\n1,2\n2,3\n3,4\n")
    with pytest.raises(DataError, match=r"field 'power'.*found 'hp'"):
        load_series(path)


def test_csv_missing_required_column(tmp_path):
    path = _csv(tmp_path, "power [mW],peak_energy [eV]\n1,1.47\n2,1.47\n3,1.47\n")
    with pytest.raises(DataError, match=r"field 'intensity'.*expected a column 'intensity'"):
        load_series(path)


def test_csv_bad_sweep_label(tmp_path):
    path = _csv(tmp_path, "power [mW],intensity [counts],sweep\n1,2,up\n2,3,sideways\n3,4,down\n")
    with pytest.raises(DataError, match=r"field 'sweep'.*'sideways'"):
        load_series(path)


def test_csv_empty_power_cell(tmp_path):
    path = _csv(tmp_path, "power [mW],intensity [counts]\n1,2\n,3\n3,4\n")
    with pytest.raises(DataError, match=r"field 'power'.*finite power"):
        load_series(path)


def test_csv_empty_optional_cell_needs_masking(tmp_path):
    path = _csv(tmp_path, "power [mW],intensity [counts],linewidth [meV]\n1,2,\n2,3,0.5\n3,4,0.4\n")
    with pytest.raises(DataError, match=r"field 'linewidth'.*NaN"):
        load_series(path)
    with pytest.warns(DataWarning, match="masked"):
        s = load_series(path, mask_nonfinite=True)
    assert s.attrs["masked"] == 1


def test_csv_duplicate_columns_and_header_only(tmp_path):
    with pytest.raises(DataError, match=r"field 'power'.*twice"):
        load_series(_csv(tmp_path, "power [mW],power [uW]\n1,2\n"))
    with pytest.raises(DataError, match=r"field 'file'.*no(ne)?"):
        load_series(_csv(tmp_path, "power [mW],intensity [counts]\n", name="h.csv"))


def test_csv_negative_power_and_negative_error(tmp_path):
    with pytest.raises(DataError, match=r"field 'power'.*>= 0"):
        load_series(_csv(tmp_path, "power [mW],intensity [counts]\n-1,2\n2,3\n3,4\n"))
    text = "power [mW],intensity [counts],intensity_error [counts]\n1,2,1\n2,3,-1\n3,4,1\n"
    with pytest.raises(DataError, match=r"field 'intensity_error'.*>= 0"):
        load_series(_csv(tmp_path, text, name="e.csv"))


def test_validate_series_refuses_wrong_units():
    s = make_series([1.0, 2.0, 3.0], [1.0, 2.0, 3.0], linewidth=[0.3, 0.3, 0.3])
    s["linewidth"].attrs["units"] = "eV"
    with pytest.raises(DataError, match=r"field 'linewidth'.*'meV'"):
        validate_series(s)
