"""Reading a density calibration file: unit conversion, the file form, refusals naming the key."""

from __future__ import annotations

import pytest
from data_helpers import calibration_dict

from polkit.config.calibration import load_calibration
from polkit.errors import ConfigError

# Invented example calibration (no real set-up).
GOOD_TOML = """\
drive = "pulsed"
note = "invented example"
spot_fwhm = {value = 2.0, error = 0.2, units = "um"}
photon_energy = {value = 1600.0, units = "meV"}
coupling_efficiency = {value = 0.5, rel_error = 0.3, units = "1"}
detection_efficiency = {value = 0.05, rel_error = 0.5, units = "1"}
pulse_duration = {value = 2.0, units = "ps"}
repetition_rate = {value = 80.0, units = "MHz"}
"""




def test_toml_file_loads_with_unit_conversion(tmp_path):
    path = tmp_path / "calibration.toml"
    path.write_text(GOOD_TOML)
    cal = load_calibration(path)
    assert cal.drive == "pulsed"
    assert cal.photon_energy_eV.value == pytest.approx(1.6, rel=1e-15)
    assert cal.photon_energy_eV.units == "eV"
    assert cal.spot_fwhm_um.sigma_log == pytest.approx(0.1)  # 0.2 um of 2 um
    assert cal.coupling_efficiency.sigma_log == pytest.approx(0.3)
    assert cal.density(1.0) == pytest.approx(5.379293e6, rel=1e-6)  # hand-worked above
    assert cal.source == str(path)
    # The file form round-trips through a dict.
    again = load_calibration(cal.to_dict())
    assert again == cal


@pytest.mark.parametrize(
    "change,key,message",
    [
        ({"spot_size": {"value": 2.0, "units": "um"}}, "spot_size", "unknown key"),
        ({"spot_fwhm": {"value": 2.0}}, "spot_fwhm.units", "missing units"),
        ({"spot_fwhm": {"value": 2.0, "units": "cm"}}, "spot_fwhm.units", "units of length"),
        ({"spot_fwhm": {"value": 2.0, "unit": "um"}}, "spot_fwhm.unit", "unknown key"),
        ({"spot_fwhm": 2.0}, "spot_fwhm", "bare float"),
        ({"spot_fwhm": {"value": -2.0, "units": "um"}}, "spot_fwhm.value", "> 0"),
        ({"spot_fwhm": {"value": "2", "units": "um"}}, "spot_fwhm.value", "expected a number"),
        ({"photon_energy": {"value": 1.6, "units": "nm"}}, "photon_energy.units", "energy"),
        ({"coupling_efficiency": {"value": 30, "units": "1"}}, "coupling_efficiency.value",
         "not a percentage"),
        ({"coupling_efficiency": {"value": 0.0, "units": "1"}}, "coupling_efficiency.value",
         "> 0"),
        ({"coupling_efficiency": {"value": True, "units": "1"}}, "coupling_efficiency.value",
         "expected a number"),
        ({"coupling_efficiency": {"value": 0.5, "error": 0.1, "rel_error": 0.2, "units": "1"}},
         "coupling_efficiency.error", "both"),
        ({"coupling_efficiency": {"value": 0.5, "error": -0.1, "units": "1"}},
         "coupling_efficiency.error", ">= 0"),
        ({"drive": "flash"}, "drive", "'cw' or 'pulsed'"),
        ({"spot_area": {"value": 3.0, "units": "um2"}}, "spot_fwhm", "both"),
        ({"repetition_rate": {"value": 80.0, "units": "MHz"}}, "repetition_rate", "pulsed"),
        ({"drive": "pulsed", "pulse_duration": {"value": 1.0, "units": "ps"}},
         "repetition_rate", "repetition rate"),
    ],
)
def test_bad_calibrations_raise_config_error_naming_the_key(change, key, message):
    raw = calibration_dict()
    raw.update(change)
    with pytest.raises(ConfigError, match=message) as info:
        load_calibration(raw)
    assert info.value.key == key
    assert f"key '{key}'" in str(info.value)


def test_missing_required_keys_and_bad_files(tmp_path):
    raw = calibration_dict()
    del raw["photon_energy"]
    with pytest.raises(ConfigError, match="key 'photon_energy': missing"):
        load_calibration(raw)
    bad = tmp_path / "broken.toml"
    bad.write_text('drive = "cw"\nspot_fwhm = {value = 2.0, units = }\n')
    with pytest.raises(ConfigError, match="not valid TOML") as info:
        load_calibration(bad)
    assert info.value.path == str(bad)
    with pytest.raises(ConfigError, match="not found"):
        load_calibration(tmp_path / "absent.toml")
    raw = calibration_dict()
    del raw["polariton_lifetime"]
    with pytest.raises(ConfigError, match="polariton_lifetime"):
        load_calibration(raw).density(1.0)


def test_a_power_fits_calibration_file_may_name_the_pump_spot(tmp_path):
    from polkit.config.calibration import read_calibration

    path = tmp_path / "cal.toml"
    path.write_text('drive = "cw"\nspot = "flat"\n'
                    'spot_fwhm = {value = 2.0, units = "um"}\n'
                    'photon_energy = {value = 1.6, units = "eV"}\n'
                    'coupling_efficiency = {value = 0.5, units = "1"}\n', encoding="utf-8")
    cal, info, spot = read_calibration(path)
    assert spot == "flat" and cal.drive == "cw"
    assert info["calibration"]["spot"] == "flat"
    assert info["calibration_file"] == str(path) and len(info["calibration_sha256"]) == 64
    cal, info, spot = read_calibration(calibration_dict())  # no spot key: none named
    assert spot is None and "calibration_file" not in info
    assert read_calibration(None) == (None, {}, None)
