"""Checks of the compiled whole-map kernels (polkit.numerics.kernels) against the numpy path.

The compiled kernels fuse the line-shape evaluation with the weighted Gram sums and solve
the small projected problems in closed form.  They must give the numpy path's numbers on
every case the hot path covers: emission and reflectance maps, masked (NaN) pixels, exciton
disorder on and off, two and three oscillators, each background, with and without the
non-negativity constraint.  The Gram sums are also checked against a direct numpy sum of
the materialised basis, and the solve against SciPy's bounded least squares.

Tolerance between the two paths.  Both compute ``chi^2 = c0 - h^T G^-1 h`` in float64 from
sums over the E pixels of a row, in a different order (the compiled sums are vectorised).
By the standard bound for a floating-point sum of E products, |error| <= E u sum|terms|
(Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., section 3.1, u = 2^-53);
the largest magnitude in the cancellation is the background-only chi^2 ``c0``, so each row's
chi^2 can differ by about E u c0, times the conditioning of the 2x2 or 3x3 solve.  The
checks allow ``1e-9 * sum(c0)`` per walker (E u is below 1e-13 here, so this leaves four
orders of magnitude for the conditioning) and, on a realistic map, an absolute
log-likelihood difference below 1e-6 (the sampler's acceptance test needs well below 0.01).
Amplitudes and model maps are allowed 1e-9 of their largest value, by the same reasoning.
Measured when these tests were written: at most 2e-13 sum(c0) on chi^2 and 4e-12 on the
amplitudes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize

from polkit.models.simulate import simulate_map
from polkit.models.spectral import emission_basis, reflectance_basis
from polkit.numerics import kernels as _kernels
from polkit.numerics import projection
from polkit.numerics.projection import prepare_map, project_linear

pytestmark = pytest.mark.skipif(not _kernels.available(),
                                reason="numba does not import: only the numpy path exists")

# Invented, sample-like parameters (eV): a GaAs-like cavity, not a real device.
ONE = dict(e_c0=1.541, n_eff=3.4, e_x=1.545, g=0.006, gamma_c=0.0003, gamma_x=0.0008)
TWO = dict(ONE, e_x=[1.545, 1.552], g=[0.006, 0.003], gamma_x=[0.0008, 0.0011])
ANGLES = np.linspace(-20.0, 20.0, 17)
ENERGIES = np.linspace(1.528, 1.562, 180)
KAPPA = 0.00012
GAIN, READ_NOISE = 1.0, 4.0  # invented CCD: electrons per count, counts


@pytest.fixture
def numpy_path():
    """Run a block with the compiled path switched off, then restore the setting."""
    previous = _kernels.use_compiled(None)

    class Switch:
        def __enter__(self):
            _kernels.use_compiled(False)

        def __exit__(self, *exc):
            _kernels.use_compiled(None)

    yield Switch()
    _kernels.use_compiled(previous)


def physics(excitons: int, disorder: bool) -> dict:
    p = dict(ONE if excitons == 1 else TWO)
    if disorder:
        p["sigma_x"] = 0.0006 if excitons == 1 else [0.0006, 0.0004]
    return p


def walkers(p: dict, n: int, rng: np.random.Generator) -> dict:
    """A batch of ``n`` parameter sets around ``p``: a posterior-sized ball plus far walkers."""
    out = {}
    for key, value in p.items():
        v = np.asarray(value, dtype=float)
        rel = {"e_c0": 2e-5, "e_x": 2e-5, "n_eff": 1e-3}.get(key, 0.05)
        draws = v[..., None] * (1.0 + rel * rng.standard_normal(v.shape + (n,)))
        draws[..., -2:] = v[..., None] * (1.0 + 40 * rel * rng.uniform(-1, 1, v.shape + (2,)))
        draws = np.abs(draws)
        out[key] = list(draws) if v.ndim else draws
    return out


def noisy_map(kind: str, p: dict, rng: np.random.Generator, masked: bool):
    """Simulated map with Gaussian CCD noise (known truth); NaN-masked pixels if asked."""
    if kind == "emission":
        n_branch = 2 if np.ndim(p["e_x"]) == 0 else 3
        amps = [3.0, 0.4, 0.2][:n_branch]
        sim = simulate_map(ANGLES, ENERGIES, **p, amplitudes=amps, background=60.0)
        clean = sim.signal
        var = np.clip(clean, 0, None) / GAIN + READ_NOISE**2
    else:
        sim = simulate_map(ANGLES, ENERGIES, kind="reflectance", **p, kappa=KAPPA,
                           amplitudes=0.9, background=0.02)
        clean = sim.signal
        var = np.full_like(clean, 0.004**2)
    y = clean + np.sqrt(var) * rng.standard_normal(clean.shape)
    if masked:
        y[rng.random(y.shape) < 0.1] = np.nan  # scattered bad pixels
        y[3, :] = np.nan  # a whole angle lost
        y[:, 40:70] = np.nan  # a band of energies (e.g. a laser line) removed everywhere
    return y, 1.0 / var


def basis_for(kind: str, params: dict):
    if kind == "emission":
        return emission_basis(ANGLES, ENERGIES, **params)
    kappa = KAPPA * np.ones_like(np.asarray(params["e_c0"], dtype=float))
    return reflectance_basis(ANGLES, ENERGIES, **params, kappa=kappa)


def both_paths(numpy_path, prepared, basis, nonneg: bool):
    compiled = project_linear(prepared, None, basis, nonneg=nonneg, return_parts=True)
    with numpy_path:
        reference = project_linear(prepared, None, basis, nonneg=nonneg, return_parts=True)
    return compiled, reference


# ---------------------------------------------------------------- compiled vs numpy
@pytest.mark.parametrize("kind", ["emission", "reflectance"])
@pytest.mark.parametrize("excitons", [1, 2])
@pytest.mark.parametrize("disorder", [False, True])
@pytest.mark.parametrize("masked", [False, True])
def test_compiled_chi2_equals_numpy_chi2(numpy_path, kind, excitons, disorder, masked):
    # Source: the numpy projection of polkit.numerics.projection (blocks + closed-form
    # solves), itself checked against scipy.optimize.nnls / lsq_linear in
    # tests/models/test_models_spectral.py; simulated data with known truth
    rng = np.random.default_rng(1000 * excitons + 100 * disorder + 10 * masked + len(kind))
    p = physics(excitons, disorder)
    y, iv = noisy_map(kind, p, rng, masked)
    batch = walkers(p, 9, rng)
    for background in ("constant", "linear", "none"):
        prepared = prepare_map(y, iv, background=background, energy_ev=ENERGIES)
        basis = basis_for(kind, batch)
        assert basis._fused is not None  # the compiled path is really taken
        for nonneg in (True, False):
            got, ref = both_paths(numpy_path, prepared, basis, nonneg)
            tol = 1e-9 * prepared.chi2_background.sum()
            assert np.all(np.isfinite(got.chi2))
            np.testing.assert_allclose(got.chi2, ref.chi2, rtol=0, atol=tol)
            np.testing.assert_allclose(got.chi2_per_angle, ref.chi2_per_angle, rtol=0, atol=tol)
            scale = np.abs(ref.amplitudes).max()
            np.testing.assert_allclose(got.amplitudes, ref.amplitudes, rtol=0,
                                       atol=1e-9 * scale)
            np.testing.assert_allclose(got.model, ref.model, rtol=0,
                                       atol=1e-9 * np.nanmax(np.abs(y)))
            if masked:
                assert np.all(got.chi2_per_angle[:, 3] == 0.0)
                assert np.all(got.amplitudes[:, 3] == 0.0)


def test_realistic_map_log_likelihood_differences_are_unchanged(numpy_path):
    # Self-consistency check: compiled against numpy path (an 80 x 600 emission map with CCD noise,
    # the size of the hot-path benchmark); what the sampler sees are differences of the
    # log-likelihood -chi2/2 between walkers, which must agree to far below 0.01
    angles = np.linspace(-24.0, 24.0, 80)
    energy = np.linspace(1.528, 1.562, 600)
    sim = simulate_map(angles, energy, **ONE, amplitudes=[3.0, 0.36], background=60.0)
    var = np.clip(sim.signal, 0, None) / GAIN + READ_NOISE**2
    rng = np.random.default_rng(20261208)
    y = sim.signal + np.sqrt(var) * rng.standard_normal(sim.signal.shape)
    prepared = prepare_map(y, 1.0 / var, background="constant", energy_ev=energy)
    batch = {k: np.asarray(v) * (1 + (2e-5 if k in ("e_c0", "e_x") else 0.02)
                                 * rng.standard_normal(32)) for k, v in ONE.items()}
    basis = emission_basis(angles, energy, **batch)
    fast = -0.5 * project_linear(prepared, None, basis)
    with numpy_path:
        slow = -0.5 * project_linear(prepared, None, basis)
    assert np.max(np.abs(fast - slow)) < 1e-6
    diff_fast = fast[:, None] - fast[None, :]
    diff_slow = slow[:, None] - slow[None, :]
    assert np.max(np.abs(diff_fast - diff_slow)) < 1e-6
    # and the numbers are those of a good fit: chi2 per pixel near 1 at the truth
    truth = emission_basis(angles, energy, **ONE)
    chi2_truth = float(project_linear(prepared, None, truth))
    n_dof = y.size - 3 * angles.size
    assert abs(chi2_truth / n_dof - 1.0) < 5 * np.sqrt(2.0 / n_dof)


# ---------------------------------------------------------------- against outside references
@pytest.mark.parametrize("kind", ["lorentz", "disorder", "reflectance"])
def test_gram_sums_equal_direct_sums_of_the_materialised_basis(kind):
    # Source: the definition G = sum_E w B_k B_l and H = sum_E sqrt(w) B_k R_j, summed
    # with numpy.einsum over the materialised basis (numpy.asarray of the lazy basis)
    rng = np.random.default_rng(31)
    p = physics(1 if kind != "disorder" else 2, kind == "disorder")
    y, iv = noisy_map("reflectance" if kind == "reflectance" else "emission", p, rng, True)
    prepared = prepare_map(y, iv, background="linear", energy_ev=ENERGIES)
    batch = walkers(p, 5, rng)
    basis = basis_for("reflectance" if kind == "reflectance" else "emission", batch)
    mode, args = basis._fused
    assert mode == kind
    gram = {"lorentz": _kernels.gram_lorentz, "disorder": _kernels.gram_disorder,
            "reflectance": _kernels.gram_reflectance}[kind]
    g, c = gram(*args, prepared.sqrt_weight, prepared.weighted_rhs)
    full = np.asarray(basis) * prepared.sqrt_weight[None, :, None, :]
    g_ref = np.einsum("wake,wale->wakl", full, full)
    c_ref = np.einsum("wake,aje->wakj", full, prepared.weighted_rhs)
    np.testing.assert_allclose(g, g_ref, rtol=1e-12, atol=1e-13 * np.abs(g_ref).max())
    np.testing.assert_allclose(c, c_ref, rtol=1e-11, atol=1e-13 * np.abs(c_ref).max())


@pytest.mark.parametrize("n_cols", [1, 2, 3])
@pytest.mark.parametrize("background", ["none", "constant", "linear"])
def test_compiled_solve_matches_scipy_bounded_least_squares(n_cols, background):
    # Source: scipy.optimize.lsq_linear (bounded-variable least squares, amplitudes >= 0,
    # background free) on the sqrt(w)-weighted design matrix of each row
    rng = np.random.default_rng(40 + n_cols)
    n_rows, n_e = 30, 50
    basis = rng.normal(size=(n_rows, n_cols, n_e))
    y = rng.normal(size=(n_rows, n_e))
    w = rng.uniform(0.2, 2.0, size=(n_rows, n_e))
    energy = np.linspace(1.50, 1.55, n_e)
    prepared = prepare_map(y, w, background=background, energy_ev=energy)
    full = basis[None] * prepared.sqrt_weight[None, :, None, :]
    g = np.einsum("wake,wale->wakl", full, full)
    c = np.einsum("wake,aje->wakj", full, prepared.weighted_rhs)
    chi2, amps = _kernels.solve_rows(g, c, prepared.background_pinv, prepared.h_background,
                                     prepared.chi2_background, nonneg=True, rtol=1e-10)
    extra = prepared.columns.T
    at_bound = 0
    for i in range(n_rows):
        s = np.sqrt(w[i])
        design = np.column_stack([*basis[i], *extra]) * s[:, None]
        lb = [0.0] * n_cols + [-np.inf] * extra.shape[0]
        ref = optimize.lsq_linear(design, y[i] * s, bounds=(lb, np.inf), tol=1e-14,
                                  method="bvls")
        np.testing.assert_allclose(amps[0, i], ref.x[:n_cols], atol=1e-8)
        assert chi2[0, i] == pytest.approx(np.sum(ref.fun**2), rel=1e-9)
        at_bound += np.count_nonzero(amps[0, i] == 0.0)
    assert at_bound > 0  # the random problems do exercise the constraint


def test_singular_and_broken_rows_behave_as_in_the_numpy_path():
    # common practice, no published source: a column that duplicates another or is zero
    # (e.g. a branch entirely in masked pixels) makes a singular sub-problem, which is
    # skipped; a non-finite basis gives NaN (the sampler refuses it), never a silent fit
    rng = np.random.default_rng(8)
    n_e = 40
    y = rng.normal(size=(4, n_e))
    w = rng.uniform(0.5, 1.5, size=(4, n_e))
    prepared = prepare_map(y, w, background="constant")
    basis = rng.normal(size=(3, 4, 3, n_e))
    basis[0, 1, 2] = basis[0, 1, 0]  # duplicated column
    basis[1, 2, 1] = 0.0  # empty column
    basis[2, 0, 1, 7] = np.nan  # broken
    full = basis * prepared.sqrt_weight[None, :, None, :]
    g = np.einsum("wake,wale->wakl", full, full)
    c = np.einsum("wake,aje->wakj", full, prepared.weighted_rhs)
    got_chi2, got_amps = _kernels.solve_rows(g, c, prepared.background_pinv,
                                             prepared.h_background, prepared.chi2_background,
                                             nonneg=True, rtol=projection._RTOL_SINGULAR)
    ref_chi2, ref_amps = projection._solve_rows(g, c, prepared, True)
    assert np.isnan(got_chi2[2, 0]) and np.isnan(ref_chi2[2, 0])
    ok = ~np.isnan(ref_chi2)
    np.testing.assert_allclose(got_chi2[ok], ref_chi2[ok], rtol=1e-10)
    np.testing.assert_allclose(got_amps[ok], ref_amps[ok], atol=1e-10)
    assert got_amps[1, 2, 1] == 0.0
    # the fused kernel itself: a zero-width line exactly on a pixel gives 0/0 = NaN
    xr = np.zeros((1, 4, 2))
    xr[0, 1, 0] = ENERGIES[30]  # a zero-width line exactly on a pixel: 0/0
    g1, c1 = _kernels.gram_lorentz(ENERGIES, xr, np.zeros_like(xr), np.zeros_like(xr),
                                   np.zeros_like(xr), np.ones((4, ENERGIES.size)),
                                   np.ones((4, 2, ENERGIES.size)))
    assert np.isnan(g1[0, 1]).any() and np.all(np.isfinite(g1[0, 0]))


# ---------------------------------------------------------------- the switch
def test_switch_follows_flag_then_environment(monkeypatch):
    # common practice, no published source: POLKIT_COMPILED=0 forces the numpy path,
    # use_compiled() overrides the environment until reset with None
    previous = _kernels.use_compiled(None)
    try:
        monkeypatch.setenv(_kernels.ENV_SWITCH, "0")
        assert not _kernels.enabled()
        _kernels.use_compiled(True)
        assert _kernels.enabled()
        monkeypatch.delenv(_kernels.ENV_SWITCH)
        _kernels.use_compiled(False)
        assert not _kernels.enabled()
        _kernels.use_compiled(None)
        assert _kernels.enabled()
    finally:
        _kernels.use_compiled(previous)


def test_switched_off_path_never_calls_the_kernels(numpy_path, monkeypatch):
    # common practice, no published source: with the switch off, project_linear must
    # not touch the compiled module (what a machine without numba runs)
    def refuse(*args, **kwargs):
        raise AssertionError("compiled kernel called with the compiled path switched off")

    for name in ("gram_lorentz", "gram_disorder", "gram_reflectance", "solve_rows"):
        monkeypatch.setattr(_kernels, name, refuse)
    rng = np.random.default_rng(5)
    y, iv = noisy_map("emission", ONE, rng, False)
    with numpy_path:
        chi2 = project_linear(y, iv, emission_basis(ANGLES, ENERGIES, **ONE))
    assert np.isfinite(chi2)
    if not _kernels.available():
        return
    _kernels.use_compiled(True)  # whatever POLKIT_COMPILED says; the fixture restores it
    with pytest.raises(AssertionError, match="compiled kernel called"):
        project_linear(y, iv, emission_basis(ANGLES, ENERGIES, **ONE))


def test_numpy_path_runs_where_numba_does_not_import(tmp_path):
    # common practice, no published source: a machine where numba cannot be imported
    # (simulated by blocking the import in a fresh interpreter) still fits, with the
    # same chi^2 as the compiled path here
    rng = np.random.default_rng(12)
    y, iv = noisy_map("emission", TWO, rng, True)
    batch = walkers(TWO, 4, rng)
    np.savez(tmp_path / "case.npz", y=y, iv=iv)
    (tmp_path / "batch.json").write_text(json.dumps(
        {k: np.asarray(v).tolist() for k, v in batch.items()}))
    script = (
        "import json, sys\n"
        "sys.modules['numba'] = None  # any 'import numba' now raises ImportError\n"
        "import numpy as np\n"
        "from polkit.numerics import kernels as _kernels\n"
        "from polkit.models import spectral\n"
        "from polkit.numerics import projection\n"
        "case = np.load('case.npz')\n"
        "batch = json.load(open('batch.json'))\n"
        "batch = {k: [np.array(x) for x in v] if k in ('e_x', 'g', 'gamma_x')\n"
        "         else np.array(v) for k, v in batch.items()}\n"
        f"angles = np.linspace({ANGLES[0]!r}, {ANGLES[-1]!r}, {ANGLES.size})\n"
        f"energy = np.linspace({ENERGIES[0]!r}, {ENERGIES[-1]!r}, {ENERGIES.size})\n"
        "basis = spectral.emission_basis(angles, energy, **batch)\n"
        "chi2 = projection.project_linear(case['y'], case['iv'], basis)\n"
        "print(json.dumps({'available': _kernels.available(), 'chi2': chi2.tolist()}))\n"
    )
    env = {k: v for k, v in os.environ.items() if k != _kernels.ENV_SWITCH}
    root = Path(__file__).resolve().parents[2]
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(root), env.get("PYTHONPATH")]))
    done = subprocess.run([sys.executable, "-c", script], cwd=tmp_path, env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout.strip().splitlines()[-1])
    assert out["available"] is False
    batch_here = {k: list(v) if k in ("e_x", "g", "gamma_x") else v for k, v in batch.items()}
    here = project_linear(y, iv, emission_basis(ANGLES, ENERGIES, **batch_here))
    tol = 1e-9 * prepare_map(y, iv).chi2_background.sum()
    np.testing.assert_allclose(out["chi2"], here, rtol=0, atol=tol)
