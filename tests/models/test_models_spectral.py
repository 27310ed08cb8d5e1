"""Checks of polkit.models.spectral: Green's function, bases and variable projection.

References: closed forms and sum rules of the resolvent, numerical quadrature
(scipy.integrate.quad), direct matrix inversion (numpy.linalg.inv) and independent
least-squares solvers (scipy.optimize.nnls, scipy.optimize.lsq_linear, numpy.linalg.lstsq).

Run this file directly (``python tests/models/test_models_spectral.py``) to print the time of
one projected map evaluation against a plain Lorentzian pass; the suite never times.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, optimize

from polkit.errors import DataError
from polkit.models.dispersion import cavity_energy
from polkit.models.green import exciton_propagator, photon_green, photon_spectral_function
from polkit.models.simulate import simulate_map
from polkit.models.spectral import branch_poles, emission_basis, reflectance_basis
from polkit.numerics.projection import MapBasis, prepare_map, project_linear

# Invented, sample-like parameters (eV); not a real device.
TRUTH = dict(e_c0=1.526, n_eff=3.3, e_x=1.530, g=0.0017, gamma_c=0.0006, gamma_x=0.0004)
ANGLES = np.linspace(-18.0, 18.0, 13)
ENERGIES = np.linspace(1.515, 1.545, 240)


def resolvent_cc(energy, e_c, e_xs, gs, gamma_c, gamma_xs):
    """(E - H)^-1 [0, 0] by direct matrix inversion (independent of the closed forms)."""
    n = len(e_xs)
    h = np.zeros((n + 1, n + 1), complex)
    h[0, 0] = e_c - 0.5j * gamma_c
    for j in range(n):
        h[j + 1, j + 1] = e_xs[j] - 0.5j * gamma_xs[j]
        h[0, j + 1] = h[j + 1, 0] = gs[j]
    eye = np.eye(n + 1)
    return np.array([np.linalg.inv(e * eye - h)[0, 0] for e in np.atleast_1d(energy)])


def integrate_line(func, centres):
    """int_R f(E) dE by the substitution E = E0 + tan(t), breakpoints at the peaks."""
    e0 = float(np.mean(centres))
    points = sorted(np.arctan(np.asarray(centres) - e0))

    def integrand(t):
        return func(e0 + np.tan(t)) / np.cos(t) ** 2

    value, err = integrate.quad(integrand, -np.pi / 2, np.pi / 2, points=points, limit=400,
                                epsabs=1e-11, epsrel=1e-11)
    return value


# ---------------------------------------------------------------- Green's function
def test_green_closed_form_matches_matrix_inverse():
    # Source: G_CC = [(E - H)^-1]_00, by direct inversion (numpy.linalg.inv)
    e = np.linspace(1.52, 1.54, 17)
    got = photon_green(e, 1.527, 1.530, 0.0017, 0.0006, 0.0004)
    np.testing.assert_allclose(got, resolvent_cc(e, 1.527, [1.530], [0.0017], 0.0006, [0.0004]),
                               rtol=1e-11)
    got = photon_green(e, 1.527, [1.530, 1.536], [0.0017, 0.001], 0.0006, [0.0004, 0.0007])
    ref = resolvent_cc(e, 1.527, [1.530, 1.536], [0.0017, 0.001], 0.0006, [0.0004, 0.0007])
    np.testing.assert_allclose(got, ref, rtol=1e-11)


@pytest.mark.parametrize("excitons", [1, 2])
def test_residues_sum_to_one_and_rebuild_green(excitons):
    # Source: partial fractions of the resolvent, G_CC = sum_b r_b / (E - eps_b), and
    # sum_b r_b = 1 (G_CC ~ 1/E at large E)
    kw = dict(TRUTH)
    if excitons == 2:
        kw.update(e_x=[1.530, 1.537], g=[0.0017, 0.0011], gamma_x=[0.0004, 0.0008])
    poles, res = branch_poles(ANGLES, **kw)
    assert poles.shape == (ANGLES.size, excitons + 1)
    np.testing.assert_allclose(res.sum(-1), 1.0, atol=1e-12)
    assert np.all(np.diff(poles.real, axis=-1) > 0)
    e_c = cavity_energy(kw["e_c0"], kw["n_eff"], angle_deg=ANGLES)
    e = ENERGIES[::7]
    rebuilt = (res[:, :, None] / (e - poles[:, :, None])).sum(axis=1)
    direct = photon_green(e, e_c[:, None], kw["e_x"], kw["g"], kw["gamma_c"], kw["gamma_x"])
    np.testing.assert_allclose(rebuilt, direct, rtol=1e-9)


@pytest.mark.parametrize("sigma", [None, 0.0008])
def test_sum_rule_of_photon_spectral_function(sigma):
    # Source: sum rule int A_C(E) dE = 1 for the photon spectral function, checked by
    # quadrature over the whole real line (scipy.integrate.quad)
    kw = dict(e_c=1.528, e_x=1.530, g=0.0017, gamma_c=0.0006, gamma_x=0.0004)

    def a_c(e):
        return photon_spectral_function(e, **kw, sigma_x=sigma)

    assert integrate_line(a_c, [1.5281, 1.5311]) == pytest.approx(1.0, abs=1e-7)


def test_branch_weights_are_real_parts_of_residues():
    # Source: int -Im(r / (E - eps)) / pi dE = Re r for Im eps < 0 (contour integral)
    basis = emission_basis([5.0], ENERGIES, **TRUTH)
    assert isinstance(basis, MapBasis)
    poles, res = branch_poles([5.0], **TRUTH)
    for b in range(2):
        x, h = poles[0, b].real, -poles[0, b].imag
        a, c = res[0, b].real / np.pi, res[0, b].imag / np.pi

        def line(e, a=a, c=c, x=x, h=h):
            return (a * h - c * (e - x)) / ((e - x) ** 2 + h**2)

        # over a window symmetric about the pole the dispersive part cancels and the
        # absorptive part gives Re r * (2/pi) arctan(L/h) (principal value)
        half_width = 0.5
        value = integrate.quad(line, x - half_width, x + half_width, points=[x], limit=400,
                               epsabs=1e-12, epsrel=1e-12)[0]
        expected = res[0, b].real * 2 / np.pi * np.arctan(half_width / h)
        assert value == pytest.approx(expected, rel=1e-9)
        # the lazy block reproduces the same function on the grid
        np.testing.assert_allclose(np.asarray(basis)[0, b], line(ENERGIES), rtol=1e-12)


def test_exciton_propagator_disorder_matches_quadrature():
    # Source: direct numerical average of 1/(E - x + i gamma/2) over a Gaussian
    # (scipy.integrate.quad), independent of the Faddeeva closed form
    e_x, gamma, sigma = 1.530, 0.0004, 0.0012
    for e in (1.527, 1.5296, 1.530, 1.5331):
        def part(x, fn, e=e):
            gauss = np.exp(-0.5 * ((x - e_x) / sigma) ** 2) / (np.sqrt(2 * np.pi) * sigma)
            return gauss * fn(1.0 / (e - x + 0.5j * gamma))

        lim = (e_x - 12 * sigma, e_x + 12 * sigma)
        pts = [e] if lim[0] < e < lim[1] else None
        re = integrate.quad(part, *lim, args=(np.real,), points=pts, limit=400)[0]
        im = integrate.quad(part, *lim, args=(np.imag,), points=pts, limit=400)[0]
        got = exciton_propagator(e, e_x, gamma, sigma)
        assert got.real == pytest.approx(re, rel=1e-6, abs=1e-3)
        assert got.imag == pytest.approx(im, rel=1e-6, abs=1e-3)


def test_disorder_tends_to_lorentzian_model():
    # Source: analytic limit sigma -> 0; the Gaussian average differs from the bare
    # propagator at order sigma^2, so halving sigma divides the error by ~4
    e = np.linspace(1.52, 1.54, 400)
    kw = dict(e_c=1.528, e_x=1.530, g=0.0017, gamma_c=0.0006, gamma_x=0.0004)
    ref = photon_spectral_function(e, **kw)
    errors = [np.max(np.abs(photon_spectral_function(e, **kw, sigma_x=s) - ref))
              for s in (4e-5, 2e-5, 1e-5)]
    assert errors[-1] < 2e-3 * ref.max()
    assert errors[0] / errors[1] == pytest.approx(4.0, rel=0.05)
    assert errors[1] / errors[2] == pytest.approx(4.0, rel=0.05)
    # sigma = 0 exactly falls back to the Lorentzian form
    np.testing.assert_allclose(photon_spectral_function(e, **kw, sigma_x=0.0), ref, rtol=1e-12)
    # and the emission basis with disorder tends to the Lorentzian branches
    lor = np.asarray(emission_basis(ANGLES, ENERGIES, **TRUTH))
    dis = np.asarray(emission_basis(ANGLES, ENERGIES, **TRUTH, sigma_x=1e-6))
    np.testing.assert_allclose(dis, lor, atol=1e-5 * lor.max())


@pytest.mark.parametrize("excitons", [1, 2])
def test_emission_branches_sum_to_photon_spectral_function(excitons):
    # Source: A_C = -Im G_CC / pi = sum_b B_b (partial fractions of the resolvent)
    truth = dict(TRUTH)
    if excitons == 2:
        truth.update(e_x=[1.530, 1.537], g=[0.0017, 0.0011], gamma_x=[0.0004, 0.0008])
    e_c = cavity_energy(truth["e_c0"], truth["n_eff"], angle_deg=ANGLES)
    kw = {k: truth[k] for k in ("e_x", "g", "gamma_c", "gamma_x")}
    for sigma in (None, 0.0009):
        basis = np.asarray(emission_basis(ANGLES, ENERGIES, **truth, sigma_x=sigma))
        assert basis.shape[1] == excitons + 1
        a_c = photon_spectral_function(ENERGIES, e_c[:, None], **kw, sigma_x=sigma)
        np.testing.assert_allclose(basis.sum(axis=1), a_c, rtol=1e-9, atol=1e-9 * a_c.max())


def test_walker_batches_broadcast_like_a_loop():
    # common practice, no published source: (W,), (W, 1) and (W, 1, 1) parameters give
    # the same maps as one call per walker
    g = np.array([0.0012, 0.0017, 0.0025])
    per_walker = [np.asarray(emission_basis(ANGLES, ENERGIES, **{**TRUTH, "g": v})) for v in g]
    for shaped in (g, g[:, None], g[:, None, None]):
        batch = np.asarray(emission_basis(ANGLES, ENERGIES, **{**TRUTH, "g": shaped}))
        assert batch.shape == (3, ANGLES.size, 2, ENERGIES.size)
        np.testing.assert_allclose(batch, np.stack(per_walker), rtol=1e-13)
    refl = reflectance_basis(ANGLES, ENERGIES, **{**TRUTH, "g": g}, kappa=0.0003)
    assert refl.shape == (3, ANGLES.size, 1, ENERGIES.size)


def test_reflectance_of_a_bare_cavity():
    # Source: single-sided cavity, r = 1 - i kappa / (E - E_C + i gamma/2), so
    # R = ((E - E_C)^2 + (gamma/2 - kappa)^2) / ((E - E_C)^2 + gamma^2/4)
    # (input-output theory; value from memory of the textbook form)
    kappa, gamma = 0.0002, 0.0006
    basis = np.asarray(reflectance_basis([0.0], ENERGIES, **{**TRUTH, "g": 0.0},
                                         kappa=kappa))[0, 0]
    u = ENERGIES - TRUTH["e_c0"]
    expected = (u**2 + (gamma / 2 - kappa) ** 2) / (u**2 + gamma**2 / 4)
    np.testing.assert_allclose(basis, expected, rtol=1e-10)


# ---------------------------------------------------------------- variable projection
def weighted_problem(rng, n_rows, n_cols, n_e):
    basis = rng.normal(size=(n_rows, n_cols, n_e))
    y = rng.normal(size=(n_rows, n_e))
    w = rng.uniform(0.2, 2.0, size=(n_rows, n_e))
    return basis, y, w


@pytest.mark.parametrize("n_cols", [1, 2, 3])
def test_nonneg_projection_matches_scipy_nnls(n_cols):
    # Source: scipy.optimize.nnls (Lawson-Hanson) on the sqrt(w)-weighted system
    rng = np.random.default_rng(100 + n_cols)
    basis, y, w = weighted_problem(rng, 40, n_cols, 30)
    sol = project_linear(y, w, basis, background="none", return_parts=True)
    active = 0
    for i in range(y.shape[0]):
        s = np.sqrt(w[i])
        x, rnorm = optimize.nnls((basis[i] * s).T, y[i] * s)
        np.testing.assert_allclose(sol.amplitudes[i], x, atol=1e-10)
        assert sol.chi2_per_angle[i] == pytest.approx(rnorm**2, rel=1e-10)
        active += np.count_nonzero(x == 0)
    assert active > 0  # the random problems do exercise the constraint


@pytest.mark.parametrize("background", ["constant", "linear"])
def test_projection_with_free_background_matches_lsq_linear(background):
    # Source: scipy.optimize.lsq_linear with bounds (amplitudes >= 0, background free)
    rng = np.random.default_rng(7)
    basis, y, w = weighted_problem(rng, 25, 2, 50)
    energy = np.linspace(1.50, 1.55, 50)
    sol = project_linear(y, w, basis, background=background, return_parts=True,
                         energy_ev=energy)
    line = (energy - energy.mean()) / (0.5 * (energy[-1] - energy[0]))
    extra = [np.ones_like(energy)] + ([line] if background == "linear" else [])
    for i in range(y.shape[0]):
        s = np.sqrt(w[i])
        design = np.column_stack([*basis[i], *extra]) * s[:, None]
        lb = [0.0] * 2 + [-np.inf] * len(extra)
        ref = optimize.lsq_linear(design, y[i] * s, bounds=(lb, np.inf), tol=1e-14,
                                  method="bvls")
        np.testing.assert_allclose(sol.amplitudes[i], ref.x[:2], atol=1e-8)
        np.testing.assert_allclose(sol.background[i], ref.x[2:], atol=1e-8)
        assert sol.chi2_per_angle[i] == pytest.approx(np.sum(ref.fun**2), rel=1e-9)


def test_unconstrained_projection_matches_lstsq():
    # Source: numpy.linalg.lstsq on the weighted design matrix
    rng = np.random.default_rng(3)
    basis, y, w = weighted_problem(rng, 10, 3, 40)
    sol = project_linear(y, w, basis, nonneg=False, background="constant", return_parts=True)
    for i in range(10):
        s = np.sqrt(w[i])
        design = np.column_stack([*basis[i], np.ones(40)]) * s[:, None]
        x, res, *_ = np.linalg.lstsq(design, y[i] * s, rcond=None)
        np.testing.assert_allclose(sol.amplitudes[i], x[:3], atol=1e-10)
        assert sol.chi2_per_angle[i] == pytest.approx(res[0], rel=1e-10)


def test_model_and_chi2_are_consistent():
    # common practice, no published source: chi2 = sum w (y - model)^2 recomputed
    # from the returned model map, for a lazy basis and its materialised array
    rng = np.random.default_rng(5)
    g = np.array([0.0014, 0.0017, 0.0021])
    basis = emission_basis(ANGLES, ENERGIES, **{**TRUTH, "g": g})
    sim = simulate_map(ANGLES, ENERGIES, **TRUTH, amplitudes=[1.0, 0.3], background=5.0)
    y = rng.poisson(200 * sim.signal).astype(float) / 200
    w = 200 / np.maximum(sim.signal, 1e-3)
    lazy = project_linear(y, w, basis, background="linear", return_parts=True)
    dense = project_linear(y, w, np.asarray(basis), background="linear", return_parts=True,
                           energy_ev=ENERGIES)
    np.testing.assert_allclose(lazy.chi2, dense.chi2, rtol=1e-12)
    direct = np.sum(w * (y - lazy.model) ** 2, axis=(-2, -1))
    np.testing.assert_allclose(lazy.chi2, direct, rtol=1e-8)
    assert np.all(lazy.amplitudes >= 0)
    assert lazy.chi2.shape == (3,)
    # the true coupling fits best (simulated data with known truth)
    assert np.argmin(lazy.chi2) == 1
    # a prepared map gives the same numbers
    prepared = prepare_map(y, w, background="linear", energy_ev=ENERGIES)
    np.testing.assert_allclose(project_linear(prepared, None, basis), lazy.chi2, rtol=1e-12)
    with pytest.raises(DataError, match="prepared with 'linear'"):
        project_linear(prepared, None, basis, background="constant")


def test_known_amplitudes_are_recovered_from_a_synthetic_map():
    # Self-consistency check (polkit's own forward model, noiseless): per-angle occupations that
    # vary with angle, a dimmer upper branch and a background per angle
    occ = np.column_stack([1.0 + 0.05 * ANGLES, 0.2 + 0.01 * np.abs(ANGLES)])
    bg = 0.5 + 0.02 * ANGLES
    sim = simulate_map(ANGLES, ENERGIES, **TRUTH, amplitudes=occ, background=bg)
    basis = emission_basis(ANGLES, ENERGIES, **TRUTH)
    sol = project_linear(sim.signal, np.ones_like(sim.signal), basis, return_parts=True)
    np.testing.assert_allclose(sol.amplitudes, occ, rtol=1e-9)
    np.testing.assert_allclose(sol.background[:, 0], bg, rtol=1e-9)
    assert sol.chi2 <= 1e-14 * np.sum(sim.signal**2)  # zero up to rounding
    np.testing.assert_allclose(sim.components.sum(axis=1) + sim.background, sim.signal)


def test_physics_parameters_are_recovered_by_minimising_projected_chi2():
    # Self-consistency check (polkit's own forward model, noiseless): minimising the projected
    # chi^2 over the six physics parameters alone (scipy.optimize.minimize, Nelder-Mead)
    # from a start 0.05-0.5 meV away must land on the truth
    occ = np.column_stack([1.0 + 0.02 * ANGLES, 0.3 + 0.01 * np.abs(ANGLES)])
    sim = simulate_map(ANGLES, ENERGIES, **TRUTH, amplitudes=occ, background=0.2)
    prepared = prepare_map(sim.signal, 1.0)
    names = list(TRUTH)
    truth = np.array([TRUTH[k] for k in names])
    scale = np.array([1e-3, 0.1, 1e-3, 1e-4, 1e-4, 1e-4])

    def chi2(z):
        params = dict(zip(names, truth + z * scale, strict=True))
        return float(project_linear(prepared, None, emission_basis(ANGLES, ENERGIES, **params)))

    start = np.array([0.5, 0.5, -0.4, 0.6, 0.5, -0.5])
    res = optimize.minimize(chi2, start, method="Nelder-Mead",
                            options=dict(xatol=1e-7, fatol=1e-14, maxfev=20000))
    assert chi2(start) > 1e6 * max(res.fun, 1e-12)
    np.testing.assert_allclose(res.x, 0.0, atol=1e-5)  # i.e. 10 neV on the energies


def test_reflectance_scale_and_offset_are_recovered():
    # Self-consistency check (polkit's own forward model, noiseless reflectance)
    scale = np.linspace(0.9, 0.95, ANGLES.size)
    sim = simulate_map(ANGLES, ENERGIES, kind="reflectance", **TRUTH, kappa=0.00025,
                       amplitudes=scale, background=0.01)
    basis = reflectance_basis(ANGLES, ENERGIES, **TRUTH, kappa=0.00025)
    sol = project_linear(sim.signal, 1e4, basis, return_parts=True)
    np.testing.assert_allclose(sol.amplitudes[:, 0], scale, rtol=1e-9)
    np.testing.assert_allclose(sol.background[:, 0], 0.01, rtol=1e-7)


def test_masked_pixels_are_ignored():
    # common practice, no published source: NaN pixels must act exactly as pixels of
    # zero weight, whatever value they had, and as pixels removed from the problem
    rng = np.random.default_rng(9)
    basis, y, w = weighted_problem(rng, 6, 2, 60)
    mask = rng.random(y.shape) < 0.2
    y_nan = np.where(mask, np.nan, y)
    y_junk = np.where(mask, 1e9, y)
    a = project_linear(y_nan, w, basis, return_parts=True)
    b = project_linear(y_junk, np.where(mask, 0.0, w), basis, return_parts=True)
    np.testing.assert_allclose(a.chi2, b.chi2, rtol=1e-12)
    np.testing.assert_allclose(a.amplitudes, b.amplitudes, rtol=1e-10, atol=1e-14)
    for i in range(6):
        keep = ~mask[i]
        s = np.sqrt(w[i, keep])
        design = np.column_stack([*basis[i][:, keep], np.ones(keep.sum())]) * s[:, None]
        ref = optimize.lsq_linear(design, y[i, keep] * s, bounds=([0, 0, -np.inf], np.inf),
                                  tol=1e-14, method="bvls")
        np.testing.assert_allclose(a.amplitudes[i], ref.x[:2], atol=1e-8)
    # a fully masked angle contributes nothing and gets zero amplitudes
    y_nan[2] = np.nan
    c = project_linear(y_nan, w, basis, return_parts=True)
    assert c.chi2_per_angle[2] == 0.0 and np.all(c.amplitudes[2] == 0.0)


def test_non_finite_basis_gives_nan_not_a_silent_fit():
    # common practice, no published source: NaN must reach the sampler, which refuses it
    rng = np.random.default_rng(2)
    basis, y, w = weighted_problem(rng, 4, 2, 20)
    basis = np.stack([basis, basis])
    basis[1, 2, 0, 5] = np.nan
    chi2 = project_linear(y, w, basis)
    assert np.isfinite(chi2[0]) and np.isnan(chi2[1])


def test_bad_inputs_are_refused():
    basis = emission_basis(ANGLES, ENERGIES, **TRUTH)
    y = np.ones((ANGLES.size, ENERGIES.size))
    with pytest.raises(DataError, match="non-negative inverse variances"):
        project_linear(y, -1.0, basis)
    with pytest.raises(DataError, match="like the basis"):
        project_linear(y[:, :-1], 1.0, basis)
    bad = y.copy()
    bad[0, 0] = np.inf
    with pytest.raises(DataError, match="infinite"):
        project_linear(bad, 1.0, basis)
    with pytest.raises(DataError, match="background"):
        project_linear(y, 1.0, basis, background="quadratic")
    with pytest.raises(DataError, match="kappa"):
        simulate_map(ANGLES, ENERGIES, kind="reflectance", **TRUTH)
    with pytest.raises(DataError, match="gamma_c > 0"):
        emission_basis(ANGLES, ENERGIES, **{**TRUTH, "gamma_c": np.array([1e-3, -1e-4])})
    with pytest.raises(DataError, match="n_eff > "):
        reflectance_basis([0.0, 80.0], ENERGIES, **{**TRUTH, "n_eff": 0.9}, kappa=1e-4)
    with pytest.raises(DataError, match="one batch shape"):
        emission_basis(ANGLES, ENERGIES, **{**TRUTH, "g": np.ones(3) * 1e-3,
                                            "e_c0": np.ones(4) * 1.52})


def test_simulate_map_names_a_misspelt_or_missing_physics_keyword():
    # common practice, no published source: the physics travels by name, so a typo or a
    # forgotten parameter is refused by name (as Python does for a keyword argument)
    # instead of being ignored or reaching the basis half-filled
    with pytest.raises(TypeError, match="'gama_c'"):
        simulate_map(ANGLES, ENERGIES, **TRUTH, gama_c=1e-3)
    missing = {k: v for k, v in TRUTH.items() if k != "n_eff"}
    with pytest.raises(TypeError, match="'n_eff'"):
        simulate_map(ANGLES, ENERGIES, **missing)
    plain = simulate_map(ANGLES, ENERGIES, **TRUTH, amplitudes=[1.0, 0.3])
    ignored = simulate_map(ANGLES, ENERGIES, **TRUTH, amplitudes=[1.0, 0.3], kappa=1e-4)
    np.testing.assert_array_equal(ignored.signal, plain.signal)


def _benchmark(repeats: int = 30) -> None:  # pragma: no cover - run by hand
    """Print one projected emission map (32 walkers, 80 x 600) against a Lorentzian pass."""
    import time

    rng = np.random.default_rng(0)
    n_w, angles, energies = 32, np.linspace(-20, 20, 80), np.linspace(1.50, 1.56, 600)
    params = dict(TRUTH, e_c0=TRUTH["e_c0"] + rng.normal(0, 1e-3, n_w),
                  g=TRUTH["g"] + rng.normal(0, 1e-4, n_w))
    sim = simulate_map(angles, energies, **TRUTH, amplitudes=[1.0, 0.3], background=0.1)
    y = sim.signal + rng.normal(0, 0.01, sim.signal.shape)
    prepared = prepare_map(y, 1e4)
    centre = rng.uniform(1.5, 1.54, (n_w, 80, 1))
    half = rng.uniform(1e-4, 1e-3, (n_w, 80, 1))
    jobs = {
        "lorentzian pass (32 x 80 x 600)": lambda: (half / np.pi) / ((energies - centre) ** 2
                                                                   + half**2),
        "emission map, raw data": lambda: project_linear(y, 1e4, emission_basis(
            angles, energies, **params)),
        "emission map, prepared data": lambda: project_linear(prepared, None, emission_basis(
            angles, energies, **params)),
        "reflectance map, prepared data": lambda: project_linear(prepared, None,
                                                                 reflectance_basis(
            angles, energies, **params, kappa=2e-4)),
    }
    times = {k: [] for k in jobs}
    for _ in range(repeats):
        for name, job in jobs.items():
            t0 = time.perf_counter()
            job()
            times[name].append(time.perf_counter() - t0)
    ref = np.median(times["lorentzian pass (32 x 80 x 600)"])
    for name, t in times.items():
        print(f"{name:34s} median {1e3 * np.median(t):7.2f} ms  min {1e3 * min(t):7.2f} ms"
              f"  ratio {np.median(t) / ref:5.2f}")


if __name__ == "__main__":  # pragma: no cover
    _benchmark()
