"""load_map/load_series take one LoadOptions object, or the same names as keywords."""

from __future__ import annotations

import numpy as np
import pytest
from data_helpers import write_matrix

from polkit.data import LoadOptions, load_map, load_series
from polkit.errors import ConfigError

SERIES = (
    "# invented series; sample: demo\n"
    "power [mW],intensity [counts],peak_wavelength [nm]\n"
    "0.1,100,845.00\n"
    "0.2,210,845.01\n"
    "0.3,330,845.02\n"
    "0.4,460,845.03\n"
    "0.5,600,845.04\n"
)


@pytest.fixture
def plain_matrix(tmp_path):
    """A matrix without header: its units must come from the caller."""
    path = tmp_path / "plain.dat"
    e = np.linspace(1450.0, 1500.0, 25)  # meV
    write_matrix(path, np.full((25, 6), 3.0), e, np.linspace(-5, 5, 6))
    return path


def test_options_object_and_keywords_give_the_same_map(plain_matrix):
    words = {"energy_units": "meV", "angle_units": "degree", "signal_units": "counts/s"}
    by_object = load_map(plain_matrix, LoadOptions(**words))
    by_keywords = load_map(plain_matrix, **words)
    by_dict = load_map(plain_matrix, dict(words))
    assert by_object.identical(by_keywords)
    assert by_dict.identical(by_keywords)
    assert by_object.attrs["units"] == "counts/s"


def test_keywords_replace_the_fields_of_the_options(plain_matrix):
    base = LoadOptions(energy_units="meV", angle_units="degree", signal_units="counts/s")
    m = load_map(plain_matrix, base, signal_units="counts", kind="reflectance")
    assert m.attrs["units"] == "counts"
    assert m.attrs["kind"] == "reflectance"
    assert base.signal_units == "counts/s"  # the object given is not changed


def test_other_names_are_reader_options_and_a_reader_refuses_unknown_ones(plain_matrix):
    m = load_map(plain_matrix, energy_units="meV", angle_units="degree", signal_units="1",
                 rows="energy [meV]")
    assert m["energy"].values[0] == pytest.approx(1.45)
    with pytest.raises(ConfigError, match="expected options of the matrix reader"):
        load_map(plain_matrix, energy_units="meV", angle_units="degree", signal_units="1",
                 delimter=",")
    # a job's window given to the loader as a keyword is not a loader option either
    with pytest.raises(ConfigError, match="angle_window"):
        load_map(plain_matrix, energy_units="meV", angle_units="degree", signal_units="1",
                 angle_window=(-1.0, 1.0))


def test_the_windows_of_an_options_object_are_left_to_the_job(plain_matrix):
    opts = LoadOptions(energy_units="meV", angle_units="degree", signal_units="1",
                       angle_window=(-1.0, 1.0))
    assert load_map(plain_matrix, opts).sizes["angle"] == 6


def test_series_options_object_and_keywords_agree(tmp_path):
    path = tmp_path / "series.csv"
    path.write_text(SERIES)
    by_object = load_series(path, LoadOptions(wavelength_medium="air"))
    by_keywords = load_series(path, wavelength_medium="air")
    assert by_object.identical(by_keywords)
    assert by_object.attrs["wavelength_medium"] == "air"
    # a series has no kind: as a keyword it is a reader option, which the csv reader refuses
    with pytest.raises(ConfigError, match="expected options of the csv reader"):
        load_series(path, kind="emission")
