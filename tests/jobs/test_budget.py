"""The energy-budget job: worked example, scaling laws, propagation, claims and refusals.

The dispersion and power results used here are small synthetic result folders in the
layout FitResult writes (posterior draws with units, provenance, observed-data attributes),
filled with invented draws of known distribution.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from scipy import constants, stats

from polkit.config.device import load_device
from polkit.errors import ConfigError, ConvergenceWarning, DataError, DataWarning
from polkit.inference import FitResult
from polkit.jobs.budget.claims import parse_claim
from polkit.jobs.budget.result import BudgetResult
from polkit.jobs.budget.run import energy_budget
from polkit.models.device_energy import lognormal_product

DEMO_DEVICE = Path(__file__).resolve().parents[2] / "data_examples" / "ds1_device.toml"


def _save_result(folder, variables, *, sample="TEST-1 (invented)", sha="d" * 64,
                 converged=True, provenance=None):
    """A result folder in FitResult's layout; ``variables`` maps name -> (draws, units)."""
    post = xr.Dataset({
        name: (("chain", "draw"), np.asarray(v, dtype=float).reshape(1, -1),
               {"units": units, "long_name": name})
        for name, (v, units) in variables.items()
    })
    observed = xr.Dataset(attrs={} if sample is None else {"sample": sample})
    prov = {"input_sha256": sha, **(provenance or {})}
    root = xr.Dataset(attrs={"model": "synthetic", "kind": "synthetic",
                             "converged": int(converged),
                             "diagnostics": json.dumps({"converged": converged}),
                             "provenance": json.dumps(prov)})
    tree = xr.DataTree.from_dict({"/": root, "posterior": post, "sample_stats": xr.Dataset(),
                                  "observed_data": observed})
    FitResult(tree).save(folder)
    return Path(folder)


def _dispersion(folder, gamma, e_lp, x2=0.4, **kw):
    gamma = np.atleast_1d(np.asarray(gamma, dtype=float))
    n = gamma.size
    e_lp = np.broadcast_to(np.asarray(e_lp, dtype=float), (n,))
    x2 = np.broadcast_to(np.asarray(x2, dtype=float), (n,))
    return _save_result(folder, {
        "lp_energy_k0": (e_lp, "eV"),
        "lp_linewidth_k0": (gamma, "meV"),
        "exciton_fraction_k0": (x2, "1"),
        "lp_lifetime_k0": (constants.hbar / constants.e * 1e15 / gamma, "ps"),
    }, **kw)


def _power(folder, g, name="interaction_constant", **kw):
    return _save_result(folder, {name: (np.atleast_1d(g), "ueV um^2")}, **kw)


def _device(**changes):
    dev = {
        "node_area": {"value": 10.0, "units": "um2"},
        "coupling_efficiency": {"value": 0.5, "units": "1"},
        "temperature": {"value": 4.0, "units": "K"},
        "array": {"nodes": 2, "inputs": 3, "outputs": 1},
        "modulator_energy": {"value": 100.0, "units": "fJ"},
        "detector_energy": {"value": 50.0, "units": "fJ"},
    }
    for key, value in changes.items():
        if value is None:
            dev.pop(key, None)
        else:
            dev[key] = value
    return dev


@pytest.fixture
def one_draw(tmp_path):
    """Single-draw fits: gamma 0.1 meV, E_LP 1.6 eV, g_LP 1 ueV um^2 (invented)."""
    return _dispersion(tmp_path / "disp", 0.1, 1.6), _power(tmp_path / "power", 1.0)


# -- worked example --------------------------------------------------------------------------


def test_worked_example_by_hand(one_draw, tmp_path):
    disp, power = one_draw
    device = _device(
        holding_power={"value": 1.0, "units": "mW"},
        holding_window={"value": 10.0, "units": "ps"},
        wall_plug_efficiency={"value": 0.25, "units": "1"},
        cooler_fraction_of_carnot={"value": 0.5, "units": "1"},
    )
    res = energy_budget(disp, power, device, seed=1, n_draws=5, out=tmp_path / "out",
                        figures=False)
    # Source: hand arithmetic from E_op = phi gamma A E_LP / (g_LP eta_in) (common practice, no
    # published source);
    # e and h from CODATA via scipy.constants.
    # n = 1e3 x phi x gamma[meV] / g[ueV um^2] = 1e3 x 1 x 0.1 / 1 = 100 polaritons per um^2
    # N = n A = 100 x 10 um^2 = 1000 polaritons
    # E_op = N E_LP / eta = 1000 x 1.6 eV / 0.5 = 3200 eV = 5.126965e-16 J = 0.5126965 fJ
    e_op_fJ = 3200 * constants.e * 1e15
    assert e_op_fJ == pytest.approx(0.5126965229, rel=1e-9)
    # rate = gamma / h = 1e-4 eV / 4.135668e-15 eV s = 24.1799 GHz
    rate_GHz = 1e-4 * constants.e / constants.h / 1e9
    assert rate_GHz == pytest.approx(24.1798924, rel=1e-7)
    # power per node = E_op x rate = 0.5127 fJ x 24.18 GHz = 1.2397e-5 W = 0.012397 mW
    p_node_mW = e_op_fJ * 1e-15 * rate_GHz * 1e9 * 1e3
    control = 2 * e_op_fJ  # two nodes
    holding = 1e-3 * 10e-12 * 1e15  # 1 mW x 10 ps = 10 fJ
    optical = control + holding
    wallplug = optical * (1 / 0.25 - 1)  # 3 x optical
    cooling = optical * (300 - 4) / 4 / 0.5  # Carnot 74 W/W, cooler at half of Carnot
    expected = {
        "polaritons_per_node": 1000.0,
        "energy_per_operation": e_op_fJ,
        "energy_per_pi_shift": math.pi * e_op_fJ,
        "control_energy_per_node": e_op_fJ,
        "operation_rate": rate_GHz,
        "power_per_node": p_node_mW,
        "array_optical_power": 2 * p_node_mW + 1.0,
        "control_optical": control,
        "modulators": 300.0,
        "detectors": 50.0,
        "holding_optical": holding,
        "laser_wallplug": wallplug,
        "cooling": cooling,
        "energy_per_activation": control + 300.0 + 50.0,
        "wall_energy_per_activation": control + 350.0 + holding + wallplug + cooling,
        "wall_energy_per_node": (control + 350.0 + holding + wallplug + cooling) / 2,
    }
    assert expected["wall_energy_per_activation"] == pytest.approx(2025.858, rel=1e-6)
    for name, value in expected.items():
        np.testing.assert_allclose(res.draws(name), value, rtol=1e-12, err_msg=name)
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    for name in ("energy_per_operation", "energy_per_pi_shift", "energy_per_activation"):
        assert summary["parameters"][name]["units"] == "fJ"
        assert summary["parameters"][name]["median"] == pytest.approx(expected[name], rel=1e-12)
    assert summary["parameters"]["operation_rate"]["units"] == "GHz"
    assert summary["parameters"]["power_per_node"]["units"] == "mW"


def test_lifetime_convention_is_two_pi_faster(one_draw):
    disp, power = one_draw
    lw = energy_budget(disp, power, _device(), seed=2, n_draws=3)
    lt = energy_budget(disp, power, _device(rate_convention="lifetime"), seed=2, n_draws=3)
    # Source: 1/tau = gamma/hbar = 2 pi gamma/h (tau = hbar / gamma, CODATA via scipy.constants)
    np.testing.assert_allclose(lt.operation_rate, 2 * np.pi * lw.operation_rate, rtol=1e-12)
    # 1/tau = 1e-4 eV / (6.582e-16 eV s) = 151.93 GHz
    np.testing.assert_allclose(lt.operation_rate, 1e-4 / (constants.hbar / constants.e) / 1e9,
                               rtol=1e-9)


# -- scaling laws ------------------------------------------------------------------------------


@pytest.fixture
def spread(tmp_path):
    """Fits with spread (invented log-normal draws), for metamorphic checks."""
    rng = np.random.default_rng(2024)
    n = 500
    gamma = np.exp(rng.normal(np.log(0.3), 0.1, n))
    e_lp = 1.54 + rng.normal(0, 2e-4, n)
    g = np.exp(rng.normal(np.log(0.8), 0.4, n))
    return (_dispersion(tmp_path / "disp", gamma, e_lp), _power(tmp_path / "p1", g),
            _power(tmp_path / "p2", 2 * g))


UNCERTAIN = dict(node_area={"value": 8.0, "rel_error": 0.2, "units": "um2"},
                 coupling_efficiency={"value": 0.3, "rel_error": 0.2, "units": "1"})


def test_scaling_laws(spread):
    disp, p1, p2 = spread
    base = energy_budget(disp, p1, _device(**UNCERTAIN), seed=7, n_draws=1000)
    # Source: E_op proportional to A and to 1 / g_LP (common practice, no published source); same
    # seed, same draws
    big = energy_budget(disp, p1, _device(**{**UNCERTAIN, "node_area": {
        "value": 16.0, "rel_error": 0.2, "units": "um2"}}), seed=7, n_draws=1000)
    np.testing.assert_allclose(big.energy_per_operation, 2 * base.energy_per_operation,
                               rtol=1e-12)
    strong = energy_budget(disp, p2, _device(**UNCERTAIN), seed=7, n_draws=1000)
    np.testing.assert_allclose(strong.energy_per_operation, base.energy_per_operation / 2,
                               rtol=1e-12)
    # Source: E_op proportional to phi: a pi shift costs pi times the 1-rad figure
    np.testing.assert_allclose(base.energy_per_pi_shift, np.pi * base.energy_per_operation,
                               rtol=1e-12)
    # the array's phase sets the control line: pi rad -> pi x control pulses
    pi_dev = energy_budget(disp, p1, _device(**UNCERTAIN, phase={"value": math.pi,
                                                                  "units": "rad"}),
                           seed=7, n_draws=1000)
    np.testing.assert_allclose(pi_dev.draws("control_optical"),
                               np.pi * base.draws("control_optical"), rtol=1e-12)
    # Source: node_size d gives the area pi d^2 / 4 (circle)
    size = energy_budget(disp, p1, _device(node_area=None, node_size={
        "value": 2.0, "units": "um"}), seed=7, n_draws=10)
    area = energy_budget(disp, p1, _device(node_area={"value": math.pi, "units": "um2"}),
                         seed=7, n_draws=10)
    np.testing.assert_allclose(size.energy_per_operation, area.energy_per_operation, rtol=1e-12)


def test_exciton_route_matches_polariton_constant(tmp_path):
    # Source: g_LP = g_X |X|^4 / N_QW (Ciuti et al., Phys. Rev. B 58, 7926 (1998)): |X|^2 = 0.5,
    # g_X = 8, N = 2 -> g_LP = 1
    disp = _dispersion(tmp_path / "disp", [0.1, 0.2], [1.6, 1.6], x2=0.5)
    pol = _power(tmp_path / "pol", [1.0, 1.0])
    exc = _power(tmp_path / "exc", [8.0, 8.0], name="exciton_interaction_constant",
                 provenance={"n_wells": 2})
    a = energy_budget(disp, pol, _device(), seed=3, n_draws=2)
    b = energy_budget(disp, exc, _device(), seed=3, n_draws=2,
                      interaction="exciton")
    np.testing.assert_allclose(b.energy_per_operation, a.energy_per_operation, rtol=1e-12)
    np.testing.assert_allclose(b.draws("interaction_constant"), 1.0, rtol=1e-12)


@pytest.mark.parametrize("wells", [0, 2.5, -1, True, "2"])
def test_exciton_route_refuses_a_recorded_well_count_that_is_not_whole(tmp_path, wells):
    # common practice, no published source: N in g_X |X|^4 / N counts quantum wells, a whole
    # number >= 1; a recorded 0 or 2.5 must not be replaced by a guess
    disp = _dispersion(tmp_path / "disp", [0.1, 0.2], [1.6, 1.6], x2=0.5)
    exc = _power(tmp_path / "exc", [8.0, 8.0], name="exciton_interaction_constant",
                 provenance={"n_wells": wells})
    with pytest.raises(DataError, match="whole number of wells"):
        energy_budget(disp, exc, _device(), seed=3, n_draws=2, interaction="exciton")


# -- propagation --------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def lognormal_inputs(tmp_path_factory):
    """Independent log-normal inputs with known medians and log-widths (invented)."""
    tmp_path = tmp_path_factory.mktemp("lognormal")
    rng = np.random.default_rng(31415)
    n = 20000
    truth = {  # name: (median, sigma_log, exponent in E_op)
        "lp_linewidth_k0": (0.3, 0.25, 1),
        "lp_energy_k0": (1.55, 0.002, 1),
        "interaction_constant": (0.5, 0.45, -1),
        "node_area": (8.0, 0.2, 1),
        "coupling_efficiency": (0.3, 0.15, -1),
    }

    def draw(name):
        m, s, _ = truth[name]
        return np.exp(rng.normal(np.log(m), s, n))

    disp = _dispersion(tmp_path / "disp", draw("lp_linewidth_k0"), draw("lp_energy_k0"))
    power = _power(tmp_path / "power", draw("interaction_constant"))
    device = _device(
        node_area={"value": 8.0, "rel_error": 0.2, "units": "um2"},
        coupling_efficiency={"value": 0.3, "rel_error": 0.15, "units": "1"},
    )
    res = energy_budget(disp, power, device, seed=11, n_draws=n)
    return res, truth, n


def test_propagation_matches_lognormal_product(lognormal_inputs):
    res, truth, n = lognormal_inputs
    medians = np.array([truth[k][0] for k in truth])
    sigmas = np.array([truth[k][1] for k in truth])
    powers = np.array([truth[k][2] for k in truth])
    median_J, sigma = lognormal_product(medians, sigmas, powers)
    # constant of E_op = 1e3 x gamma A E_LP e / (g eta) in J -> fJ
    median_fJ = 1e3 * median_J * constants.e * 1e15
    y = np.log(res.energy_per_operation)
    # Source: product of independent log-normals (closed form); tolerances are 5 standard
    # errors of the sample median (1.2533 s / sqrt n) and of the sample sd (s / sqrt(2n))
    assert np.median(y) == pytest.approx(np.log(median_fJ), abs=5 * 1.2533 * sigma / n**0.5)
    assert np.std(y) == pytest.approx(sigma, abs=5 * sigma / (2 * n) ** 0.5)


def test_sensitivity_shares_match_closed_form(lognormal_inputs):
    res, truth, n = lognormal_inputs
    s = res.sensitivity()
    rows = {r["input"]: r for r in s["factors"]}
    total = sum((truth[k][2] * truth[k][1]) ** 2 for k in truth)
    # Source: for independent inputs Var ln E = sum a_i^2 s_i^2, so each share is
    # a_i^2 s_i^2 / sum (log-normal algebra); sampling error of a share is ~1/sqrt(n)
    for name, (_, sig, a) in truth.items():
        expected = (a * sig) ** 2 / total
        assert rows[name]["variance_share"] == pytest.approx(expected, abs=0.02), name
        assert rows[name]["first_order_share"] == pytest.approx(expected, abs=0.02), name
    # the decomposition is complete: shares add up to 1 (ln E is exactly sum a_i ln x_i + c)
    assert s["shares_sum"] == pytest.approx(1.0, abs=1e-9)
    assert s["factors"][0]["input"] == "interaction_constant"
    # Source: the rank correlation of a monotone decreasing factor is negative
    ranks = {r["input"]: r["spearman"] for r in s["rank_correlations"]}
    assert ranks["interaction_constant"] < -0.5


def test_correlated_inputs_shares_still_add_up(tmp_path):
    # gamma and E_LP drawn together with correlation (as in one dispersion posterior)
    rng = np.random.default_rng(5)
    z = rng.multivariate_normal([0, 0], [[1, 0.8], [0.8, 1]], 4000)
    disp = _dispersion(tmp_path / "disp", 0.3 * np.exp(0.2 * z[:, 0]),
                       1.55 * np.exp(0.1 * z[:, 1]))
    power = _power(tmp_path / "power", np.exp(rng.normal(0, 0.1, 4000)))
    s = energy_budget(disp, power, _device(), seed=4, n_draws=4000).sensitivity()
    rows = {r["input"]: r for r in s["factors"]}
    # Source: Var(0.2 z1 + 0.1 z2 + 0.1 w) = 0.04 + 0.01 + 2 x 0.8 x 0.02 + 0.01 = 0.092;
    # share of gamma = (0.04 + 0.016) / 0.092 (covariance split evenly), of E_LP (0.01 + 0.016)
    assert rows["lp_linewidth_k0"]["variance_share"] == pytest.approx(0.056 / 0.092, abs=0.03)
    assert rows["lp_energy_k0"]["variance_share"] == pytest.approx(0.026 / 0.092, abs=0.03)
    # first-order share of E_LP: Corr^2 = (0.016 + 0.01)^2 / (0.01 x 0.092)
    assert rows["lp_energy_k0"]["first_order_share"] == pytest.approx(
        0.026**2 / (0.01 * 0.092), abs=0.03)
    assert s["shares_sum"] == pytest.approx(1.0, abs=1e-9)


# -- claims -----------------------------------------------------------------------------------


def test_claim_probability_matches_normal_cdf(lognormal_inputs):
    res, truth, n = lognormal_inputs
    medians = np.array([truth[k][0] for k in truth])
    sigmas = np.array([truth[k][1] for k in truth])
    powers = np.array([truth[k][2] for k in truth])
    median_J, sigma = lognormal_product(medians, sigmas, powers)
    median_fJ = 1e3 * median_J * constants.e * 1e15
    threshold = 1.5 * median_fJ
    # Source: P(E < t) = Phi((ln t - ln m) / s) for a log-normal E; tolerance 5 binomial SE
    p_true = stats.norm.cdf(np.log(1.5) / sigma)
    text = f"energy_per_operation < {threshold:.6g} fJ"
    p = BudgetResult(res.dataset.assign_attrs(claims=json.dumps([text]))).claims()[0]
    assert p["probability"] == pytest.approx(p_true, abs=5 * (p_true * (1 - p_true) / n) ** 0.5)
    assert p["evidence"]["n_draws"] == n
    assert p["evidence"]["q2_5"] < p["evidence"]["median"] < p["evidence"]["q97_5"]


def test_claim_units_convert(spread):
    disp, p1, _ = spread
    res = energy_budget(disp, p1, _device(), seed=9, n_draws=800, claims=[
        "energy_per_operation < 2 fJ", "energy_per_operation < 2000 aJ",
        "energy_per_operation<0.002 pJ", "energy_per_operation < 12483 eV",
        "operation_rate > 72 GHz", "operation_rate > 72000 MHz",
        "power_per_node <= 130 uW", "power_per_node <= 0.13 mW",
        "exciton_fraction_k0 >= 0.3",
    ])
    c = res.claims()
    # Source: SI prefixes; 1 eV = 1.602176634e-19 J (CODATA via scipy.constants)
    assert c[0]["probability"] == c[1]["probability"] == c[2]["probability"]
    assert c[3]["evidence"]["threshold_in_quantity_units"] == pytest.approx(
        12483 * constants.e * 1e15, rel=1e-12)
    assert c[4]["probability"] == c[5]["probability"]
    assert c[6]["probability"] == c[7]["probability"]
    assert c[8]["probability"] == 1.0  # every draw has |X|^2 = 0.4
    e = res.energy_per_operation
    assert c[0]["probability"] == np.mean(e < 2.0)
    for k in (0, 3, 4, 6):
        assert 0.05 < c[k]["probability"] < 0.95, c[k]


@pytest.mark.parametrize("text, match", [
    ("energy_per_opration < 10 fJ", "unknown quantity 'energy_per_opration'"),
    ("energy_per_operation < 10 furlongs", "unknown units 'furlongs'"),
    ("energy_per_operation < 10 GHz", "units 'GHz' are frequency"),
    ("energy_per_operation < 10", "units 'none' are dimensionless"),
    ("energy_per_operation = 10 fJ", "expected 'QUANTITY OP NUMBER UNITS'"),
    ("__import__('os').system('true') < 1 fJ", "expected 'QUANTITY OP NUMBER UNITS'"),
    ("energy_per_operation < 1e3e3 fJ", "unknown units"),
])
def test_bad_claims_are_refused(text, match):
    quantities = {"energy_per_operation": "fJ", "operation_rate": "GHz"}
    with pytest.raises(ConfigError, match=match) as info:
        parse_claim(text, quantities)
    assert info.value.key == f"claim {text!r}"


def test_bad_claim_writes_nothing(one_draw, tmp_path):
    disp, power = one_draw
    out = tmp_path / "out"
    with pytest.raises(ConfigError, match="unknown quantity"):
        energy_budget(disp, power, _device(), claims=["speed < 1 fJ"], out=out, n_draws=3)
    assert not (out / "budget.nc").exists() and not (out / "summary.json").exists()


# -- files, notes, figures -------------------------------------------------------------------


def test_save_load_units_notes_and_figures(spread, tmp_path):
    disp, p1, _ = spread
    out = tmp_path / "out"
    dev = _device(holding_power={"value": 20.0, "units": "mW"})
    res = energy_budget(disp, p1, dev, seed=5, n_draws=400, out=out,
                        claims=["energy_per_activation < 1 pJ"])
    for name in ("budget.nc", "summary.json", "energy_per_activation_breakdown.png",
                 "budget_sensitivity.png"):
        assert (out / name).stat().st_size > 0, name
    back = BudgetResult.load(out)
    for name, var in res.dataset.data_vars.items():
        assert back.dataset[name].attrs["units"] == var.attrs["units"], name
        np.testing.assert_array_equal(back.draws(name), res.draws(name))
    summary = json.loads((out / "summary.json").read_text())
    assert set(summary) >= {"model", "kind", "parameters", "claims", "diagnostics",
                            "provenance"}
    entry = summary["parameters"]["energy_per_operation"]
    assert set(entry) == {"median", "q16", "q84", "q2_5", "q97_5", "units"}
    assert summary["claims"][0]["text"] == "energy_per_activation < 1 pJ"
    assert summary["claims"][0]["probability"] == back.claims()[0]["probability"]
    assert summary["diagnostics"]["dispersion_converged"] is True
    assert summary["provenance"]["dispersion"]["input_sha256"] == "d" * 64
    assert summary["context"]["label"] == "order-of-magnitude context, not a benchmark"
    # common practice, no published source: the laser note states the implied power and
    # defers the class to IEC 60825-1 (its limits depend on wavelength), quoting no limit
    text = res.table()
    assert "Laser safety" in text and "IEC 60825-1" in text and "3R" not in text
    assert "estimate under stated assumptions" in text
    assert "not a benchmark" in text and "Horowitz" in text
    assert "<table>" in res._repr_html_()
    quiet = energy_budget(disp, p1, _device(), seed=5, n_draws=400)
    assert any("Laser safety" in t for t in quiet.notes())  # stated even for microwatts
    assert "not counted" in quiet.counted["holding_optical"]
    assert "not counted" in quiet.counted["laser_wallplug"]


def test_room_temperature_device_counts_no_cooling(one_draw):
    disp, power = one_draw
    res = energy_budget(disp, power, _device(temperature={"value": 300.0, "units": "K"}),
                        seed=1, n_draws=3)
    np.testing.assert_array_equal(res.draws("cooling"), 0.0)
    assert res.counted["cooling"].startswith("not counted")


def test_demo_device_file_loads():
    dev = load_device(DEMO_DEVICE)
    assert "invented" in dev.note
    assert (dev.n_nodes, dev.n_inputs, dev.n_outputs) == (16, 4, 4)
    assert dev.node_size_um.value == 3.0 and dev.temperature_K.value == 4.0
    assert dev.coupling_efficiency.sigma_log == 0.3


def test_device_round_trips_through_its_file_form():
    dev = load_device(DEMO_DEVICE)
    again = load_device(dev.to_dict())
    assert again == dev
    first = dev.draw(np.random.default_rng(8), 50)
    second = again.draw(np.random.default_rng(8), 50)
    assert first.keys() == second.keys()
    for name, values in first.items():
        np.testing.assert_allclose(second[name], values, rtol=1e-12, err_msg=name)
    # Source: truncation at the ambient temperature keeps every draw below 300 K
    temps = dev.draw(np.random.default_rng(1), 2000)["temperature_K"]
    assert np.all(temps < 300.0) and np.median(temps) == pytest.approx(4.0, rel=0.01)


def test_seed_reproduces(spread):
    disp, p1, _ = spread
    a = energy_budget(disp, p1, _device(**UNCERTAIN), seed=123, n_draws=300)
    b = energy_budget(disp, p1, _device(**UNCERTAIN), seed=123, n_draws=300)
    np.testing.assert_array_equal(a.energy_per_operation, b.energy_per_operation)
    assert a.provenance["seed"] == 123


# -- refusals ------------------------------------------------------------------------------------


@pytest.mark.parametrize("changes, key, match", [
    ({"node_area": {"value": 10.0}}, "node_area.units", "missing units"),
    ({"node_area": {"value": -3.0, "units": "um2"}}, "node_area.value", "expected a value > 0"),
    ({"coupling_efficiency": {"value": 30, "units": "1"}}, "coupling_efficiency.value",
     "lies in \\(0, 1\\]"),
    ({"wall_plug_efficiency": {"value": 1.2, "units": "1"}}, "wall_plug_efficiency.value",
     "not a percentage"),
    ({"node_area": {"value": 10.0, "units": "GHz"}}, "node_area.units", "expected units of area"),
    ({"modulator_energy": {"value": -1.0, "units": "fJ"}}, "modulator_energy.value", ">= 0"),
    ({"detector_energy": {"value": 0.0, "rel_error": 0.2, "units": "fJ"}},
     "detector_energy.rel_error", "zero value"),
    ({"colour": "blue"}, "colour", "unknown key"),
    ({"node_size": {"value": 3.0, "units": "um"}}, "node_area", "found both"),
    ({"node_area": None}, "node_area", "found neither"),
    ({"temperature": None}, "temperature", "missing"),
    ({"array": {"nodes": 2.5, "inputs": 1, "outputs": 1}}, "array.nodes", "whole number"),
    ({"array": {"nodes": 2, "inputs": 1}}, "array.outputs", "missing"),
    ({"node_area": {"value": 10.0, "error": 1.0, "rel_error": 0.1, "units": "um2"}},
     "node_area.error", "both error and rel_error"),
    ({"ambient_temperature": {"value": 300.0, "error": 5.0, "units": "K"}},
     "ambient_temperature.error", "exact"),
    ({"rate_convention": "fast"}, "rate_convention", "'linewidth' or 'lifetime'"),
])
def test_bad_device_is_refused(changes, key, match):
    with pytest.raises(ConfigError, match=match) as info:
        load_device(_device(**changes))
    assert info.value.key == key


def test_bad_device_file_names_the_file(tmp_path):
    path = tmp_path / "device.toml"
    text = DEMO_DEVICE.read_text(encoding="utf-8")
    text = text.replace('node_size = {value = 3.0, error = 0.3, units = "um"}',
                        'node_size = {value = 3.0, error = 0.3}')
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match=r"device\.toml: key 'node_size.units': missing units"):
        load_device(path)


def test_power_without_calibration_is_refused(tmp_path):
    disp = _dispersion(tmp_path / "disp", 0.1, 1.6)
    power = _save_result(tmp_path / "power", {"blueshift_per_power": ([0.1], "meV/mW")})
    # Source: absolute energies need an absolute interaction constant (common practice, no
    # published source)
    with pytest.raises(DataError, match="Absolute energies need a power fit with a density "
                                        "calibration") as info:
        energy_budget(disp, power, _device(), n_draws=3)
    assert info.value.field == "interaction_constant"


def test_other_sample_is_refused_when_checked(tmp_path):
    disp = _dispersion(tmp_path / "disp", 0.1, 1.6, sample="OTHER-9 (invented)")
    power = _power(tmp_path / "power", 1.0, sample="TEST-1 (invented)")
    with pytest.raises(ConfigError, match="sample 'OTHER-9 \\(invented\\)' but the power"):
        energy_budget(disp, power, _device(), n_draws=3, expect_same_sample=True)
    with pytest.warns(DataWarning, match="expect_same_sample"):
        energy_budget(disp, power, _device(), n_draws=3)


def test_unrecorded_sample_or_hash_mismatch_is_refused_when_checked(tmp_path):
    disp = _dispersion(tmp_path / "disp", 0.1, 1.6, sample=None)
    power = _power(tmp_path / "power", 1.0)
    with pytest.raises(ConfigError, match="records no sample name"):
        energy_budget(disp, power, _device(), n_draws=3, expect_same_sample=True)
    disp2 = _dispersion(tmp_path / "disp2", 0.1, 1.6, sha="a" * 64)
    power2 = _power(tmp_path / "power2", 1.0, provenance={"dispersion_input_sha256": "b" * 64})
    with pytest.raises(ConfigError, match="SHA-256"):
        energy_budget(disp2, power2, _device(), n_draws=3, expect_same_sample=True)
    power3 = _power(tmp_path / "power3", 1.0, provenance={"dispersion_input_sha256": "a" * 64})
    ok = energy_budget(disp2, power3, _device(), n_draws=3, expect_same_sample=True)
    assert ok.provenance["sample_check"] is True


def test_bad_results_are_refused(tmp_path):
    power = _power(tmp_path / "power", 1.0)
    with pytest.raises(DataError, match="not a folder"):
        energy_budget(tmp_path / "nowhere", power, _device(), n_draws=3)
    disp = _save_result(tmp_path / "disp", {"lp_energy_k0": ([1.6], "eV"),
                                            "lp_linewidth_k0": ([0.1], "furlong"),
                                            "exciton_fraction_k0": ([0.4], "1")})
    with pytest.raises(DataError, match="expected units 'meV'"):
        energy_budget(disp, power, _device(), n_draws=3)
    neg = _power(tmp_path / "neg", [1.0, -0.5])
    good = _dispersion(tmp_path / "good", 0.1, 1.6)
    with pytest.raises(DataError, match="finite positive draws"):
        energy_budget(good, neg, _device(), n_draws=3)
    with pytest.raises(ConfigError, match="whole number of draws"):
        energy_budget(good, power, _device(), n_draws=1)


def test_unconverged_input_warns(tmp_path):
    disp = _dispersion(tmp_path / "disp", 0.1, 1.6, converged=False)
    power = _power(tmp_path / "power", 1.0)
    with pytest.warns(ConvergenceWarning, match="convergence gate"):
        res = energy_budget(disp, power, _device(), n_draws=3)
    assert res.diagnostics["dispersion_converged"] is False
    assert any("did not pass" in t for t in res.notes())


def test_result_and_device_units_convert(tmp_path):
    # Source: SI prefixes (1 eV = 1000 meV, 1 meV = 1000 ueV, 1 mW = 1000 uW)
    power = _power(tmp_path / "power", 1.0)
    plain = energy_budget(_dispersion(tmp_path / "plain", 0.1, 1.6), power,
                          _device(holding_power={"value": 2.0, "units": "mW"}), n_draws=3)
    scaled = _save_result(tmp_path / "scaled", {"lp_energy_k0": ([1600.0], "meV"),
                                                "lp_linewidth_k0": ([100.0], "ueV"),
                                                "exciton_fraction_k0": ([0.4], "1")})
    other = energy_budget(scaled, power, _device(holding_power={"value": 2000.0, "units": "uW"}),
                          n_draws=3)
    for name in ("lp_energy_k0", "lp_linewidth_k0", "holding_power", "energy_per_operation",
                 "wall_energy_per_activation"):
        np.testing.assert_allclose(other.draws(name), plain.draws(name), rtol=1e-12,
                                   err_msg=name)
    bad = _device(holding_power={"value": 2.0, "units": "μW"})  # Greek mu: not a device spelling
    with pytest.raises(ConfigError, match="holding_power"):
        load_device(bad)
