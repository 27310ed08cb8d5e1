"""The interactive panels driven from Python: sliders, buttons, overlays, summaries, saving.

Every map and series here is invented: simulated with polkit's own models and a fixed
seed, so the truth behind it is known.  Setting ``slider.value`` runs the observers
synchronously and ``Button.click()`` runs the handlers, exactly as in JupyterLab.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from polkit.errors import ConfigError, ConvergenceWarning, DataError
from polkit.inference import FitResult

pytest.importorskip("ipywidgets")

from polkit.widgets import dispersion_panel  # noqa: E402

# invented truth, GaAs-like numbers (not a measurement)
TRUTH = {"exciton_energy": 1.545, "cavity_energy": 1.541, "n_eff": 3.4, "rabi_splitting": 12.0,
         "cavity_linewidth": 0.3, "exciton_linewidth": 0.8}


def _emission_map(n_angles=21, n_energies=170, seed=7) -> xr.DataArray:
    from polkit.models.simulate import simulate_map

    rng = np.random.default_rng(seed)
    angles = np.linspace(-20.0, 20.0, n_angles)
    energy = np.linspace(1.528, 1.562, n_energies)
    occ = np.stack([np.full(n_angles, 3.0), np.full(n_angles, 0.4)], axis=-1)
    sim = simulate_map(angles, energy, kind="emission", e_c0=TRUTH["cavity_energy"],
                       n_eff=TRUTH["n_eff"], e_x=TRUTH["exciton_energy"],
                       g=0.5e-3 * TRUTH["rabi_splitting"], gamma_c=1e-3 * TRUTH["cavity_linewidth"],
                       gamma_x=1e-3 * TRUTH["exciton_linewidth"], amplitudes=occ,
                       background=60.0)
    counts = rng.poisson(np.clip(sim.signal, 0, None)) + rng.normal(0.0, 4.0, sim.signal.shape)
    return xr.DataArray(
        counts, dims=("angle", "energy"),
        coords={"angle": ("angle", angles, {"units": "degree", "long_name": "emission angle"}),
                "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"})},
        attrs={"units": "counts", "kind": "emission", "gain": 1.0, "read_noise": 4.0,
               "sample": "invented test map", "masked": 0},
    )


@pytest.fixture(scope="module")
def emission_map():
    return _emission_map()


@pytest.fixture
def panel(emission_map):
    return dispersion_panel(emission_map, seed=3, max_steps=60)


@pytest.fixture(scope="module")
def refined(emission_map):
    """A panel refined once from sliders displaced 2-3 meV from the truth (shared: slow)."""
    p = dispersion_panel(emission_map, seed=3, max_steps=60)
    p.set_values({"exciton_energy": 1.547, "cavity_energy": 1.538, "rabi_splitting": 15.0,
                  "cavity_linewidth": 1.0, "exciton_linewidth": 1.5})
    p.refine_button.click()
    return p


def _branches_closed_form(angle_deg, e_x, e_c0, n_eff, rabi_mev):
    # Source: planar-cavity dispersion E_C = E_C0 / sqrt(1 - sin^2(theta)/n_eff^2) and the
    # Hermitian coupled-oscillator branches E = (E_C + E_X)/2 -/+ sqrt(delta^2 + (2g)^2)/2
    # (Hopfield, Phys. Rev. 112, 1555 (1958))
    s = np.sin(np.radians(angle_deg))
    e_c = e_c0 / np.sqrt(1.0 - s**2 / n_eff**2)
    half = 0.5 * np.sqrt((e_c - e_x) ** 2 + (1e-3 * rabi_mev) ** 2)
    return e_c, 0.5 * (e_c + e_x) - half, 0.5 * (e_c + e_x) + half


def test_overlay_follows_the_sliders_and_matches_the_coupled_oscillator(panel):
    # equal linewidths: the real parts of the non-Hermitian eigenvalues are the Hermitian
    # branches exactly, so the drawn curves must equal the closed form
    values = {"exciton_energy": 1.546, "cavity_energy": 1.539, "n_eff": 3.3,
              "rabi_splitting": 10.0, "cavity_linewidth": 0.5, "exciton_linewidth": 0.5}
    panel.set_values(values)
    ov = panel.overlay_data()
    e_c, lower, upper = _branches_closed_form(ov["grid"], 1.546, 1.539, 3.3, 10.0)
    np.testing.assert_allclose(ov["cavity"], e_c, rtol=0, atol=1e-9)
    np.testing.assert_allclose(ov["branches"][:, 0], lower, rtol=0, atol=1e-9)
    np.testing.assert_allclose(ov["branches"][:, 1], upper, rtol=0, atol=1e-9)
    np.testing.assert_allclose(ov["excitons"], [1.546], atol=1e-12)

    before_png = panel.map_image.value
    before_readout = panel.readout.value
    panel.sliders["rabi_splitting"].value = 14.0
    after = panel.overlay_data()
    _, lower14, upper14 = _branches_closed_form(after["grid"], 1.546, 1.539, 3.3, 14.0)
    np.testing.assert_allclose(after["branches"][:, 0], lower14, rtol=0, atol=1e-9)
    np.testing.assert_allclose(after["branches"][:, 1], upper14, rtol=0, atol=1e-9)
    assert panel.map_image.value != before_png
    assert panel.readout.value != before_readout


def test_readout_gives_detuning_and_hopfield_fractions(panel):
    panel.set_values({"exciton_energy": 1.545, "cavity_energy": 1.541, "rabi_splitting": 12.0})
    r = panel.readout_values
    delta_mev, rabi_mev = -4.0, 12.0
    # Source: Hopfield, Phys. Rev. 112, 1555 (1958): |X|^2 = (1 + delta / sqrt(delta^2 + 4g^2))/2
    x2 = 0.5 * (1.0 + delta_mev / np.hypot(delta_mev, rabi_mev))
    assert r["detuning"] == pytest.approx(delta_mev, abs=1e-9)
    assert r["exciton_fraction_k0"] == pytest.approx(x2, abs=1e-9)
    assert r["photon_fraction_k0"] == pytest.approx(1.0 - x2, abs=1e-9)
    assert "-4.000" in panel.readout.value and f"{x2:.3f}" in panel.readout.value


def test_colour_scale_and_window_redraw_the_map(panel, emission_map):
    log_png = panel.map_image.value
    panel.scale.value = "linear"
    assert panel.map_image.value != log_png
    assert "linear" in panel.live.axes[0, 0].get_title()
    panel.axis_window.value = (-10.0, 10.0)
    panel.energy_window.value = (1.530, 1.556)
    ax = panel.live.axes[0, 0]
    assert ax.get_xlim() == pytest.approx((-10.0, 10.0))
    assert ax.get_ylim() == pytest.approx((1.530, 1.556))
    problem = panel.problem()
    x = emission_map["angle"].values
    e = emission_map["energy"].values
    assert problem.y.shape == (np.sum((x >= -10) & (x <= 10)),
                               np.sum((e >= 1.530) & (e <= 1.556)))
    grid = panel.overlay_data()["grid"]
    assert grid.min() == pytest.approx(-10.0) and grid.max() == pytest.approx(10.0)


def test_refine_recovers_the_simulated_truth_from_displaced_sliders(refined):
    # simulated data with known truth; the sliders started 2 meV and 3 meV away from it
    panel = refined
    assert panel.map_result is not None, panel.status.value
    got = panel.values()
    assert got["exciton_energy"] == pytest.approx(TRUTH["exciton_energy"], abs=2e-4)
    assert got["cavity_energy"] == pytest.approx(TRUTH["cavity_energy"], abs=2e-4)
    assert got["rabi_splitting"] == pytest.approx(TRUTH["rabi_splitting"], abs=0.3)
    assert got["cavity_linewidth"] == pytest.approx(TRUTH["cavity_linewidth"], rel=0.25)
    assert got["exciton_linewidth"] == pytest.approx(TRUTH["exciton_linewidth"], rel=0.25)
    # the sliders moved to the mode and the overlay with them
    assert panel.sliders["rabi_splitting"].value == pytest.approx(got["rabi_splitting"])
    assert panel.residual_image.value
    assert "refined" in panel.status.value


def test_background_sampling_stops_on_request_and_saves_what_the_cli_saves(refined, tmp_path):
    panel = refined
    panel.max_steps.value = 100_000
    panel.sample_button.click()
    job = panel.job
    assert job is not None and job.thread is not None
    # wait for some steps, then press Stop (a condition, not a timing)
    for _ in range(2400):
        if job.steps >= 5 or job.done.wait(0.05):
            break
    assert panel.stop_button.disabled is False
    panel.stop_button.click()
    result = panel.wait(timeout=300)
    # a warning raised in the sampling thread is recorded and shown in the status line
    assert any(issubclass(w.category, ConvergenceWarning) for w in job.warnings)
    assert not result.converged
    assert any("stopped on request" in r for r in result.diagnostics["reasons"])
    assert panel.progress.value < panel.progress.max
    assert "NOT converged" in panel.status.value
    assert "rabi_splitting" in panel.summary.value and "meV" in panel.summary.value
    assert bytes(panel.corner_image.value).startswith(b"\x89PNG")
    assert panel.save_button.disabled is False

    out = tmp_path / "saved"
    panel.out_folder.value = str(out)
    panel.save_button.click()
    names = sorted(p.name for p in out.iterdir())
    assert names == ["corner.png", "fit.png", "posterior.nc", "residuals.png", "spectra.png",
                     "summary.json", "traces.png"]
    back = FitResult.load(out)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["parameters"]["rabi_splitting"]["units"] == "meV"
    assert back.summary()["parameters"]["rabi_splitting"]["median"] == pytest.approx(
        result.summary()["parameters"]["rabi_splitting"]["median"])


def test_same_seed_gives_the_same_numbers(refined):
    refined.max_steps.value = 30
    refined.show_corner = False  # the numbers are the point here
    medians = []
    for _ in range(2):
        with pytest.warns(ConvergenceWarning):
            refined.sample(background=False)
        assert refined.progress.max == 30
        medians.append({k: v["median"] for k, v in refined.result.summary()["parameters"].items()})
    assert medians[0] == medians[1]
    assert refined.result.provenance["seed"] == 3


def test_refusals_name_the_problem(panel, emission_map):
    with pytest.raises(DataError, match="expected model 'weak', 'two' or 'three'"):
        dispersion_panel(emission_map, model="four")
    with pytest.raises(DataError, match="unknown parameters"):
        panel.set_values({"rabi": 3.0})
    with pytest.raises(DataError, match="no result to save yet"):
        panel.save()
    panel.save_button.disabled = False
    panel.save_button.click()  # a button shows the error instead of raising
    assert "no result to save yet" in panel.status.value


# --------------------------------------------------------------------------------------
# power-series panel
# --------------------------------------------------------------------------------------
DATA = Path(__file__).resolve().parents[2] / "data_examples"


@pytest.fixture(scope="module")
def coherent_panel():
    from polkit.widgets import power_panel

    return power_panel(DATA / "ds1_p1_power_coherent.csv", model="coherent", seed=5,
                       max_steps=30)


def test_coherent_curves_follow_each_sweeps_branch_of_the_steady_state(coherent_panel):
    p = coherent_panel
    d, phi, s = 2.0, 0.15, 1500.0
    p.set_values({"detuning_ratio": d, "reduced_drive_per_power": phi, "intensity_scale": s})
    curves = p.curve_data()["intensity"]
    assert len(curves) == 2  # one curve per sweep run: up, then down
    for (power, intensity), direction in zip(curves, ("up", "down"), strict=True):
        u = intensity / s
        # Source: single-mode driven-dissipative steady state in linewidth units,
        # u[(d - u)^2 + 1/4] = phi P (Baas et al., Phys. Rev. A 69, 023809 (2004))
        np.testing.assert_allclose(u * ((d - u) ** 2 + 0.25), phi * power, rtol=1e-7, atol=1e-9)
        for pk, uk in zip(power, u, strict=True):
            roots = np.roots([1.0, -2 * d, d * d + 0.25, -phi * pk])
            real = np.sort(roots[np.abs(roots.imag) < 1e-9].real)
            if real.size == 3:  # bistable range: up sweep on the lowest, down on the highest
                assert uk == pytest.approx(real[0] if direction == "up" else real[-1], rel=1e-6)


def test_coherent_readout_gives_the_turning_points(coherent_panel):
    p = coherent_panel
    before = bytes(p.plot_image.value)
    p.sliders["detuning_ratio"].value = 3.0
    assert bytes(p.plot_image.value) != before
    d, phi = 3.0, p.values()["reduced_drive_per_power"]
    # Source: turning points y = (2 Delta -/+ sqrt(Delta^2 - 3 gamma^2/4))/3 of
    # y[(Delta - y)^2 + gamma^2/4] = F (Baas et al., PRA 69, 023809 (2004)); gamma = 1 here
    y_lo = (2 * d - np.sqrt(d * d - 0.75)) / 3
    y_hi = (2 * d + np.sqrt(d * d - 0.75)) / 3
    f_up = y_lo * ((d - y_lo) ** 2 + 0.25)
    f_down = y_hi * ((d - y_hi) ** 2 + 0.25)
    r = p.readout_values
    assert r["power_up_threshold"] == pytest.approx(f_up / phi, rel=1e-9)
    assert r["power_down_threshold"] == pytest.approx(f_down / phi, rel=1e-9)
    assert "bistable" in p.readout.value
    p.sliders["detuning_ratio"].value = 0.5  # below sqrt(3)/2: no loop
    assert "monostable" in p.readout.value


def test_coherent_sample_and_save(coherent_panel, tmp_path):
    p = coherent_panel
    p.show_corner = False
    with pytest.warns(ConvergenceWarning):
        p.sample(background=False)
    res = p.result
    assert res.model == "coherent" and not res.converged
    assert res.provenance["started_from"].startswith("interactive panel")
    assert "detuning_ratio" in p.summary.value
    files = p.save(tmp_path / "coherent")
    assert {f.name for f in files} >= {"posterior.nc", "summary.json", "fit.png", "corner.png"}
    back = FitResult.load(tmp_path / "coherent")
    assert back.posterior["pump_detuning"].attrs["units"] == "meV"


def test_reservoir_refine_recovers_the_simulated_threshold():
    from polkit.widgets import power_panel

    truth = json.loads((DATA / "truth.json").read_text())["ds1_p1_power_nonresonant.csv"]
    p = power_panel(DATA / "ds1_p1_power_nonresonant.csv", model="reservoir", seed=2)
    assert set(p.curve_data()) == {"intensity", "peak_energy", "linewidth"}
    p.set_values({"threshold_power": 30.0, "saturation_number": 50.0})
    p.refine_button.click()
    got = p.values()
    # simulated data with known truth (data_examples/make_demo.py, truth.json)
    assert got["threshold_power"] == pytest.approx(truth["threshold_power_mw"], rel=0.05)
    assert got["saturation_number"] == pytest.approx(truth["saturation_number"], rel=0.25)
    assert p.readout_values["threshold_power"] == pytest.approx(got["threshold_power"])
    assert "crosses threshold" in p.readout.value


def test_power_panel_refusals():
    from polkit.widgets import power_panel

    with pytest.raises(ConfigError, match="expected model 'coherent' or 'reservoir'"):
        power_panel(DATA / "ds1_p1_power_coherent.csv", model="laser")
    with pytest.raises(DataError, match="sweep"):
        power_panel(DATA / "ds1_p1_power_nonresonant.csv", model="coherent")
