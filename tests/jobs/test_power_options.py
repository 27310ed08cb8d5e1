"""The settings objects of the power-series job: the calibration with the sample's constants,
and the extraction window of a spectra cube.  Every number is invented."""

from __future__ import annotations

import numpy as np
import pytest

from polkit.data import make_series
from polkit.errors import ConfigError
from polkit.jobs.power.options import ExtractionWindow, PowerCalibration
from polkit.jobs.power.stages import prepare_power

# invented cw calibration
CAL = {"drive": "cw", "spot_fwhm": {"value": 3.0, "units": "um"},
       "photon_energy": {"value": 1.54, "units": "eV"},
       "coupling_efficiency": {"value": 0.5, "units": "1"}}


def _series():
    p = np.geomspace(0.5, 40.0, 12)
    return make_series(p, 3.0 * p**2, units="counts", intensity_error=0.1 * p**2)


def test_power_calibration_wraps_a_density_calibration_and_keeps_itself():
    wrapped = PowerCalibration.of(CAL)
    assert wrapped.density is CAL and wrapped.spot is None and wrapped.n_wells is None
    full = PowerCalibration(density=CAL, n_wells=4)
    assert PowerCalibration.of(full) is full
    assert PowerCalibration.of(None) == PowerCalibration()


def test_extraction_window_from_a_dict_and_its_refusals():
    w = ExtractionWindow.of({"energy": (1.5, 1.6)})
    assert w == ExtractionWindow(energy=(1.5, 1.6)) and w.given
    assert not ExtractionWindow.of(None).given
    with pytest.raises(ConfigError, match="unknown window.*energy_window") as info:
        ExtractionWindow.of({"energy_window": (1.5, 1.6)})
    assert info.value.key == "window"
    with pytest.raises(ConfigError, match="ExtractionWindow or a dict"):
        ExtractionWindow.of((1.5, 1.6))


def test_sample_constants_travel_in_the_calibration_and_are_checked():
    problem, setup = prepare_power(_series(), model="reservoir", calibration=PowerCalibration(
        density=CAL, n_wells=2, exciton_binding_meV=10.0, bohr_radius_nm=10.0,
        reservoir_lifetime_ps=(50.0, 0.1)))
    assert setup.options == {"n_wells": 2, "exciton_binding_meV": 10.0, "bohr_radius_nm": 10.0,
                             "reservoir_lifetime": (50.0, 0.1)}
    assert setup.calibration is not None and setup.spot == "point"
    for wells in (0, True, 2.5):  # True is not one well: a flag passed by mistake
        with pytest.raises(ConfigError, match="quantum wells") as info:
            prepare_power(_series(), model="reservoir",
                          calibration=PowerCalibration(n_wells=wells))
        assert info.value.key == "n_wells"
    with pytest.raises(ConfigError, match="lifetime in ps"):
        prepare_power(_series(), model="reservoir",
                      calibration=PowerCalibration(reservoir_lifetime_ps=(True, 0.0)))
    with pytest.raises(ConfigError, match="lifetime in ps") as info:
        prepare_power(_series(), model="reservoir",
                      calibration=PowerCalibration(reservoir_lifetime_ps=-1.0))
    assert info.value.key == "reservoir_lifetime_ps"
