"""Unit conversions of the data layer: wavelength, wavenumber, air, Jacobian, angle, power."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc
from data_helpers import write_matrix
from scipy.integrate import trapezoid

from polkit import units as U
from polkit.data import detector_variance_terms, load_map, make_map
from polkit.errors import DataError

HC_EV_NM_CODATA = sc.h * sc.c / sc.e * 1e9  # Source: CODATA via scipy.constants


def test_800_nm_in_vacuum_is_1_549802_ev():
    e = U.axis_to_ev([800.0], "wavelength", 1.0)
    # Source: CODATA via scipy.constants (hc / 800 nm = 1.549802 eV)
    assert e[0] == pytest.approx(1.549802, abs=5e-7)
    assert e[0] == pytest.approx(HC_EV_NM_CODATA / 800.0, rel=1e-12)


def test_micrometre_axis_equals_nanometre_axis():
    # Source: SI prefixes (1 um = 1000 nm)
    assert U.axis_to_ev([0.8], "wavelength", U.WAVELENGTH_UNITS["um"])[0] == pytest.approx(
        HC_EV_NM_CODATA / 800.0, rel=1e-12
    )


def test_one_ev_is_8065_544_per_cm():
    # Source: CODATA via scipy.constants (1 eV / hc = 8065.544 1/cm)
    per_cm = sc.e / (sc.h * sc.c) / 100.0
    assert per_cm == pytest.approx(8065.544, abs=1e-3)
    assert U.axis_to_ev([8065.544], "wavenumber", 1.0)[0] == pytest.approx(1.0, abs=1e-7)
    assert U.EV_PER_INV_CM == pytest.approx(1.0 / per_cm, rel=1e-12)


def test_mev_axis_is_relabelled_not_rescaled():
    # Source: SI prefixes
    assert U.axis_to_ev([1450.0], "energy", U.ENERGY_UNITS["meV"])[0] == pytest.approx(1.45)


@pytest.mark.parametrize("medium", ["vacuum", "air"])
def test_wavelength_jacobian_keeps_integrated_intensity(medium):
    # A Gaussian line on a uniform wavelength grid; its integral over lambda must equal
    # the integral of the converted density over energy.
    # Source: change of variables, integral I_lambda dlambda = integral I_E dE
    lam = np.linspace(800.0, 900.0, 2001)
    line = np.exp(-0.5 * ((lam - 850.0) / 2.0) ** 2)
    energy = U.axis_to_ev(lam, "wavelength", 1.0, medium=medium)
    dens = line * U.wavelength_jacobian(energy, 1.0, medium=medium)
    order = np.argsort(energy)
    assert trapezoid(dens[order], energy[order]) == pytest.approx(trapezoid(line, lam), rel=1e-6)


def test_vacuum_jacobian_is_lambda_squared_over_hc():
    lam = np.array([700.0, 850.0, 1000.0])
    # Source: d lambda / dE = lambda^2 / hc for lambda = hc/E (CODATA hc via scipy.constants)
    assert U.wavelength_jacobian(HC_EV_NM_CODATA / lam, 1.0) == pytest.approx(
        lam**2 / HC_EV_NM_CODATA, rel=1e-12
    )


def test_jacobian_end_to_end_through_a_matrix_file(tmp_path):
    # The loader must keep the integral of each angle's spectrum over the axis.
    # Source: change of variables, integral I_lambda dlambda = integral I_E dE
    lam = np.linspace(820.0, 880.0, 1201)
    angle = np.linspace(-10, 10, 5)
    line = 50.0 + 1000.0 * np.exp(-0.5 * ((lam - 850.0) / 1.5) ** 2)
    sig = np.tile(line, (angle.size, 1))
    path = tmp_path / "gauss.txt"
    write_matrix(
        path,
        sig.T,
        lam,
        angle,
        header="rows: wavelength [nm]; columns: angle [degree]; signal: counts",
    )
    m = load_map(path, wavelength_medium="air")
    assert m.attrs["units"] == "counts nm/eV"
    assert m.attrs["wavelength_medium"] == "air"
    for row in m.values:
        assert trapezoid(row, m["energy"].values) == pytest.approx(trapezoid(line, lam), rel=1e-6)
    raw = load_map(path, wavelength_medium="air", wavelength_jacobian=False)
    assert raw.attrs["units"] == "counts"
    assert np.sort(raw.values[0]) == pytest.approx(np.sort(line))


def test_noise_attributes_follow_the_jacobian(tmp_path):
    # simulated data with known truth: Poisson electrons (gain 2 e/count) plus 4 counts
    # read noise on a flat level, recorded on a wavelength grid; after the Jacobian the
    # variance of each energy column must match the CCD model with J per pixel
    # Source: var(J c) = J^2 var(c) for a constant J (propagation of variance)
    rng = np.random.default_rng(21)
    lam = np.linspace(840.0, 850.0, 40)
    n_angle = 4000
    level = 400.0  # counts
    counts = rng.poisson(level * 2.0, size=(lam.size, n_angle)) / 2.0
    counts = counts + rng.normal(0.0, 4.0, size=counts.shape)
    path = tmp_path / "noise.txt"
    write_matrix(
        path,
        counts,
        lam,
        np.linspace(-30, 30, n_angle),
        header="rows: wavelength [nm]; columns: angle [degree]; signal: counts\n"
        "gain: 2; read_noise: 4; saturation: 60000",
    )
    m = load_map(path)
    # the attributes stay in raw counts; the factor per pixel is the jacobian coordinate
    assert m.attrs["gain"] == 2.0
    assert m.attrs["read_noise"] == 4.0
    assert m.attrs["saturation"] == 60000.0
    assert m.attrs["raw_units"] == "counts"
    jac = lam[::-1] ** 2 / HC_EV_NM_CODATA  # nm/eV, CODATA hc; energy ascending
    np.testing.assert_allclose(m["jacobian"].values, jac, rtol=1e-9)
    assert m["jacobian"].attrs["units"] == "nm/eV"
    a, b = detector_variance_terms(m)
    model = (a * m.mean("angle").values + b).ravel()
    measured = m.var("angle").values
    # 4000 samples per column: the sample variance scatters by sqrt(2/4000) ~ 2.2 %
    assert measured == pytest.approx(model, rel=0.1)
    assert np.mean(measured / model) == pytest.approx(1.0, abs=0.01)


def test_reflectance_is_not_jacobian_scaled(tmp_path):
    # Source: a reflectance is a ratio, not a spectral density (common practice, no published
    # source)
    lam = np.linspace(820.0, 880.0, 60)
    angle = np.linspace(-10, 10, 5)
    sig = np.full((lam.size, angle.size), 0.8)
    path = tmp_path / "refl.txt"
    write_matrix(
        path,
        sig,
        lam,
        angle,
        header="rows: wavelength [nm]; columns: angle [degree]; signal: reflectance [1]",
    )
    m = load_map(path)
    assert m.attrs["kind"] == "reflectance"
    assert np.allclose(m.values, 0.8)
    assert "jacobian" not in m.attrs


def _edlen_1966(wavelength_vac_nm):
    # Source: Edlen, Metrologia 2, 71 (1966): standard air (15 degC, 101325 Pa, 300 ppm CO2)
    s2 = (1e3 / np.asarray(wavelength_vac_nm)) ** 2
    return 1e-8 * (8342.13 + 2406030.0 / (130.0 - s2) + 15997.0 / (38.9 - s2))


def test_standard_air_index_agrees_with_edlen_1966():
    lam = np.array([350.0, 450.0, 633.0, 850.0, 1064.0, 1550.0])
    # Source: Edlen 1966 (independent formula); Ciddor 1996 assumes 450 ppm CO2 against
    # Edlen's 300 ppm, a difference of 0.534e-6 * 150 * (n-1) ~ 2.2e-8 [mem], so the two
    # standard-air formulas must agree to 3e-8.
    assert U.refractive_index_air(lam) - 1 == pytest.approx(_edlen_1966(lam), abs=3e-8)


def test_air_index_near_850_nm():
    # value from memory / Ciddor 1996: n_air - 1 ~ 2.7e-4 near 850 nm
    n = U.refractive_index_air(850.0)
    assert n - 1 == pytest.approx(2.7477e-4, abs=1e-7)
    # value from memory: standard air at the HeNe line (632.99 nm), n - 1 = 2.7653e-4
    assert U.refractive_index_air(632.99) - 1 == pytest.approx(2.7653e-4, abs=2e-8)


def test_air_wavelength_shift_at_850_nm_and_round_trip():
    lam_air = np.array([850.0])
    lam_vac = U.air_to_vacuum_nm(lam_air)
    # Source: lambda_vac = n lambda_air with n - 1 ~ 2.7e-4 (Ciddor 1996 [mem])
    assert lam_vac[0] - lam_air[0] == pytest.approx(850.0 * 2.7477e-4, rel=1e-3)
    assert U.vacuum_to_air_nm(lam_vac) == pytest.approx(lam_air, abs=1e-9)
    # value from memory: the air/vacuum offset is ~0.4 meV at 1.46 eV (from Ciddor 1996's n_air)
    e_vac = U.axis_to_ev(lam_air, "wavelength", 1.0, medium="vacuum")[0]
    e_air = U.axis_to_ev(lam_air, "wavelength", 1.0, medium="air")[0]
    assert (e_vac - e_air) * 1e3 == pytest.approx(0.40, abs=0.01)


def test_angle_and_power_conversions():
    # Source: SI definitions (pi rad = 180 degree; 1 W = 1000 mW)
    assert U.angle_to_degree([np.pi / 6], "rad")[0] == pytest.approx(30.0)
    assert U.power_to_mw([1.0, 2.0], "W") == pytest.approx([1000.0, 2000.0])
    assert U.power_to_mw([250.0], "uW") == pytest.approx([0.25])
    assert U.power_to_mw([5.0], "nW") == pytest.approx([5e-6])
    assert U.wavevector_to_inv_um([2e6], "1/m") == pytest.approx([2.0])


@pytest.mark.parametrize(
    ("func", "units", "field", "spelling"),
    [
        (U.power_to_mw, "MW", "power", "'mW'"),
        (U.power_to_mw, "horsepower", "power", "'uW'"),
        (U.angle_to_degree, "grad", "angle", "'degree'"),
        (U.width_to_mev, "MeV", "linewidth", "'meV'"),
        (U.power_to_mw, None, "power", "'nW'"),
    ],
)
def test_unknown_or_missing_units_are_refused_with_the_accepted_spellings(
    func, units, field, spelling
):
    with pytest.raises(DataError, match=rf"field '{field}': expected units.*{spelling}"):
        func([1.0], units)


def test_unknown_spectral_units_in_a_file(tmp_path):
    path = tmp_path / "bad_units.txt"
    write_matrix(
        path,
        np.ones((25, 6)),
        np.linspace(1, 2, 25),
        np.linspace(-5, 5, 6),
        header="rows: energy [furlong]; columns: angle [degree]; signal: counts",
    )
    with pytest.raises(DataError, match=r"field 'energy'.*found 'furlong'.*'nm'"):
        load_map(path)


def test_angles_beyond_90_degree_are_refused():
    # Source: an emission angle lies within -90..90 degree (geometry)
    with pytest.raises(DataError, match=r"field 'angle'.*within -90\.\.90"):
        make_map(np.ones((6, 20)), np.linspace(-100, 100, 6), np.linspace(1.4, 1.5, 20))
