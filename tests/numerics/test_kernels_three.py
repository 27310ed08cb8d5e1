"""Checks of the compiled three-oscillator poles and residues (polkit.numerics.kernels3).

The compiled path solves ``det(z - H) = 0`` for the 3 x 3 non-Hermitian matrix of one photon
and two excitons (Cardano, then Newton) and takes the photon residues from the
characteristic polynomial.  References from outside that code: ``numpy.linalg.eig`` (and
the inverse of the eigenvector matrix) on the same matrices, sum rules of the photon
Green's function, and closed forms of the special cases (uncoupled modes, one exciton
uncoupled, two degenerate excitons).

Tolerances.  Both sides compute in float64.  LAPACK's eigenvalues are backward stable: the
computed poles are exact for a matrix perturbed by about ``u ||H||`` (u = 2^-53, ||H|| about
1.6 eV here), i.e. about 4e-16 eV, so on well-separated poles (gaps of meV) the two paths
can differ by ~1e-15 eV absolute and the residues by ~u ||H|| / gap ~ 1e-13 (Golub and
Van Loan, Matrix Computations, 4th ed., section 7.2.2).  The checks allow 1e-10 relative
(poles relative to their size, residues relative to the total photon weight of 1), which
leaves three orders of magnitude of margin; near an exceptional point the residues are
ill-conditioned (they diverge like 1 / gap), and the allowance there is scaled by the
measured (gap / splitting)^-2.
"""

from __future__ import annotations

import numpy as np
import pytest

from polkit.jobs.dispersion.run import prepare_dispersion
from polkit.models import spectral
from polkit.models.dispersion import cavity_energy
from polkit.numerics import kernels as _kernels
from polkit.numerics import kernels3 as _kernels3

pytestmark = pytest.mark.skipif(not _kernels.available(),
                                reason="numba does not import: only the numpy path exists")

REL = 1e-10


def reference(e_c, gamma_c, e_x, g, gamma_x):
    """numpy.linalg.eig on the 3 x 3 stack, sorted by real part; residues V[0,b] (V^-1)[b,0].

    Written here from the matrix (not through polkit), as a user of numpy would.
    """
    e_c = np.asarray(e_c, dtype=float)
    w = e_c.shape[0]
    h = np.zeros(e_c.shape + (3, 3), dtype=complex)
    h[..., 0, 0] = e_c - 0.5j * np.asarray(gamma_c)[:, None]
    for j in range(2):
        h[..., j + 1, j + 1] = (np.asarray(e_x[j]) - 0.5j * np.asarray(gamma_x[j]))[:, None]
        h[..., 0, j + 1] = h[..., j + 1, 0] = np.broadcast_to(
            np.asarray(g[j], dtype=float)[:, None], e_c.shape)
    vals, vecs = np.linalg.eig(h)
    order = np.argsort(vals.real, axis=-1, kind="stable")
    vals = np.take_along_axis(vals, order, axis=-1)
    vecs = np.take_along_axis(vecs, order[..., None, :], axis=-1)
    res = vecs[..., 0, :] * np.linalg.inv(vecs)[..., :, 0]
    assert vals.shape == (w, e_c.shape[1], 3)
    return vals, res


def compiled(e_c, gamma_c, e_x, g, gamma_x):
    poles, res, bad = _kernels3.three_mode_poles(e_c, gamma_c, e_x, g, gamma_x)
    return poles, res, bad


def random_cases(rng, n_w=40, n_a=25):
    """Invented, sample-like batches: GaAs-like levels (eV), couplings 0-10 meV, widths."""
    e_c = 1.541 + 0.012 * rng.standard_normal((n_w, n_a))
    gamma_c = rng.uniform(5e-5, 3e-3, n_w)
    e_x = (1.545 + 0.004 * rng.standard_normal(n_w), 1.556 + 0.004 * rng.standard_normal(n_w))
    g = (rng.uniform(0.0, 0.01, n_w), rng.uniform(0.0, 0.01, n_w))
    gamma_x = (rng.uniform(5e-5, 3e-3, n_w), rng.uniform(5e-5, 3e-3, n_w))
    return e_c, gamma_c, e_x, g, gamma_x


@pytest.fixture
def numpy_path():
    previous = _kernels.use_compiled(False)
    yield
    _kernels.use_compiled(previous)


def test_random_matrices_match_numpy_eig():
    # Source: numpy.linalg.eig (LAPACK zgeev) on the same matrices
    rng = np.random.default_rng(11)
    args = random_cases(rng)
    poles, res, bad = compiled(*args)
    ref_poles, ref_res = reference(*args)
    assert not bad.any()
    np.testing.assert_allclose(poles, ref_poles, rtol=REL, atol=0)
    # residues relative to the total photon weight (sum_b r_b = 1)
    assert np.max(np.abs(res - ref_res)) <= REL
    # and relative to themselves where they are not tiny
    big = np.abs(ref_res) > 1e-3
    np.testing.assert_allclose(res[big], ref_res[big], rtol=REL, atol=0)


def test_sum_rules_of_the_photon_green_function():
    # Source: G_CC(z) = 1/z + H_CC/z^2 + ... for large z (moments of the resolvent,
    # e.g. Economou, Green's Functions in Quantum Physics, 3rd ed., 2006, section 1.1):
    # sum_b r_b = 1 and sum_b r_b eps_b = H_CC = E_C - i gamma_C / 2
    rng = np.random.default_rng(12)
    e_c, gamma_c, e_x, g, gamma_x = random_cases(rng)
    poles, res, _ = compiled(e_c, gamma_c, e_x, g, gamma_x)
    np.testing.assert_allclose(res.sum(axis=-1), 1.0, rtol=0, atol=1e-12)
    first = (res * (poles - 1.5)).sum(axis=-1)  # about the level 1.5 eV, to keep digits
    h_cc = e_c - 1.5 - 0.5j * gamma_c[:, None]
    np.testing.assert_allclose(first, h_cc, rtol=0, atol=1e-14)
    # the product of the poles is det H (Vieta), relative
    det = ((e_c - 0.5j * gamma_c[:, None]) * (e_x[0] - 0.5j * gamma_x[0])[:, None]
           * (e_x[1] - 0.5j * gamma_x[1])[:, None]
           - (g[0] ** 2)[:, None] * (e_x[1] - 0.5j * gamma_x[1])[:, None]
           - (g[1] ** 2)[:, None] * (e_x[0] - 0.5j * gamma_x[0])[:, None])
    np.testing.assert_allclose(poles.prod(axis=-1), det, rtol=1e-14)


def test_uncoupled_modes_are_the_diagonal_with_all_weight_on_the_photon():
    # Source: with g1 = g2 = 0 the matrix is diagonal: poles are its entries, G_CC = 1/(z - c)
    e_c = np.array([[1.541, 1.550, 1.560]])
    args = (e_c, np.array([3e-4]), (np.array([1.545]), np.array([1.556])),
            (np.array([0.0]), np.array([0.0])), (np.array([8e-4]), np.array([1.1e-3])))
    poles, res, bad = compiled(*args)
    assert not bad.any()
    for a, ec in enumerate(e_c[0]):
        diag = sorted([ec - 1.5e-4j, 1.545 - 4e-4j, 1.556 - 5.5e-4j], key=lambda z: z.real)
        np.testing.assert_allclose(poles[0, a], diag, rtol=1e-15)
        expected = [1.0 if abs(d.real - ec) < 1e-12 else 0.0 for d in diag]
        np.testing.assert_allclose(res[0, a], expected, rtol=0, atol=1e-15)


def test_one_uncoupled_exciton_reduces_to_the_two_mode_closed_form():
    # Source: Hopfield, Phys. Rev. 112, 1555 (1958): two coupled modes,
    # eps = (c + x)/2 -/+ sqrt(g^2 + ((c - x)/2)^2), r_lo = (eps_lo - x) / (eps_lo - eps_up);
    # the uncoupled exciton keeps its complex energy and no photon weight
    rng = np.random.default_rng(13)
    n_w, n_a = 8, 30
    e_c = 1.541 + 0.01 * rng.standard_normal((n_w, n_a))
    gc = rng.uniform(1e-4, 1e-3, n_w)
    x1, w1 = rng.uniform(1.54, 1.55, n_w), rng.uniform(1e-4, 2e-3, n_w)
    x2, w2 = np.full(n_w, 1.575), rng.uniform(1e-4, 2e-3, n_w)  # above every branch
    g1 = rng.uniform(1e-3, 8e-3, n_w)
    poles, res, bad = compiled(e_c, gc, (x1, x2), (g1, np.zeros(n_w)), (w1, w2))
    assert not bad.any()
    c = e_c - 0.5j * gc[:, None]
    x = (x1 - 0.5j * w1)[:, None]
    root = np.sqrt(g1[:, None] ** 2 + (0.5 * (c - x)) ** 2)
    lo, up = 0.5 * (c + x) - root, 0.5 * (c + x) + root
    r_lo = (lo - x) / (lo - up)
    np.testing.assert_allclose(poles[..., 0], lo, rtol=REL)
    np.testing.assert_allclose(poles[..., 1], up, rtol=REL)
    np.testing.assert_allclose(poles[..., 2], np.broadcast_to((x2 - 0.5j * w2)[:, None],
                                                              lo.shape), rtol=REL)
    np.testing.assert_allclose(res[..., 0], r_lo, rtol=0, atol=REL)
    np.testing.assert_allclose(res[..., 1], 1.0 - r_lo, rtol=0, atol=REL)
    np.testing.assert_array_equal(res[..., 2], 0.0)  # (z - x2) is exactly zero there


def test_degenerate_excitons_give_a_dark_state_and_a_bright_two_mode_pair():
    # Source: two identical excitons couple to the photon only through the bright
    # combination (g1 X1 + g2 X2) / G with G = sqrt(g1^2 + g2^2); the orthogonal (dark)
    # combination stays at the exciton energy with no photon weight (e.g. Kavokin et al.,
    # Microcavities, 2nd ed., 2017, ch. 5, for N identical oscillators)
    rng = np.random.default_rng(14)
    n_w, n_a = 6, 20
    e_c = 1.545 + 0.01 * rng.standard_normal((n_w, n_a))
    gc = np.full(n_w, 3e-4)
    x, wx = np.full(n_w, 1.545), np.full(n_w, 8e-4)
    g1, g2 = rng.uniform(2e-3, 6e-3, n_w), rng.uniform(1e-3, 4e-3, n_w)
    poles, res, bad = compiled(e_c, gc, (x, x), (g1, g2), (wx, wx))
    assert not bad.any()
    big_g = np.hypot(g1, g2)[:, None]
    c, xc = e_c - 0.5j * gc[:, None], (x - 0.5j * wx)[:, None]
    root = np.sqrt(big_g**2 + (0.5 * (c - xc)) ** 2)
    lo, up = 0.5 * (c + xc) - root, 0.5 * (c + xc) + root
    np.testing.assert_allclose(poles[..., 0], lo, rtol=REL)
    np.testing.assert_allclose(poles[..., 2], up, rtol=REL)
    np.testing.assert_allclose(poles[..., 1], np.broadcast_to(xc, lo.shape), rtol=REL)
    assert np.max(np.abs(res[..., 1])) <= 1e-12
    np.testing.assert_allclose(res[..., 0], (lo - xc) / (lo - up), rtol=0, atol=REL)
    # numpy's eig agrees on the same matrices
    ref_poles, ref_res = reference(e_c, gc, (x, x), (g1, g2), (wx, wx))
    np.testing.assert_allclose(poles, ref_poles, rtol=REL)
    assert np.max(np.abs(res - ref_res)) <= REL


@pytest.mark.parametrize("distance", [1e-2, 1e-3, 1e-4])
def test_near_an_exceptional_point_the_paths_agree_within_the_conditioning(distance):
    # Source: two coupled modes at zero detuning have an exceptional point at
    # g = |gamma_C - gamma_X| / 4 (Heiss, J. Phys. A 45, 444016, 2012); the second exciton
    # is placed far away.  Residues there scale like 1/gap, their error like u ||H|| / gap^2
    gc, wx = 2e-3, 2e-4
    g_ep = abs(gc - wx) / 4.0
    n_a = 12
    e_c = np.full((1, n_a), 1.545) + np.linspace(-2e-5, 2e-5, n_a)[None]
    g1 = np.array([g_ep * (1.0 + distance)])
    args = (e_c, np.array([gc]), (np.array([1.545]), np.array([1.60])),
            (g1, np.array([2e-3])), (np.array([wx]), np.array([1e-3])))
    poles, res, bad = compiled(*args)
    ref_poles, ref_res = reference(*args)
    assert not bad.any()
    gap = np.abs(poles[..., 1] - poles[..., 0]).min()
    cond = (g_ep / gap) ** 2
    np.testing.assert_allclose(poles, ref_poles, rtol=REL)
    assert np.max(np.abs(res - ref_res)) <= REL * max(cond, 1.0)
    np.testing.assert_allclose(res.sum(axis=-1), 1.0, rtol=0, atol=1e-12 * max(cond, 1.0))


def test_rows_it_cannot_finish_are_flagged_and_recomputed_by_numpy(numpy_path):
    # Source: numpy.linalg.eig (the fallback is the numpy path itself).  Uncoupled modes
    # with the second exciton exactly at the cavity's complex energy (normal incidence,
    # equal widths): the closed form's 1 / (2 root) is 1 / 0 there.
    in_plane = np.array([-5.0, 0.0, 5.0])
    kw = dict(e_c0=np.array([1.545, 1.541]), n_eff=np.array([3.4, 3.4]),
              e_x=[np.array([1.552, 1.545]), np.array([1.545, 1.552])],
              g=[np.array([0.0, 0.004]), np.array([0.0, 0.003])],
              gamma_c=np.array([8e-4, 3e-4]),
              gamma_x=[np.array([1e-3, 8e-4]), np.array([8e-4, 1e-3])])
    e_c = cavity_energy(kw["e_c0"][:, None], kw["n_eff"][:, None], angle_deg=in_plane)
    _, _, bad = compiled(e_c, kw["gamma_c"], kw["e_x"], kw["g"], kw["gamma_x"])
    np.testing.assert_array_equal(bad, [[False, True, False], [False, False, False]])
    # the whole-map basis takes the compiled poles, the flagged row from numpy.linalg.eig
    energy = np.linspace(1.53, 1.56, 50)
    plain = np.asarray(spectral.emission_basis(in_plane, energy, **kw))
    _kernels.use_compiled(True)
    fast = np.asarray(spectral.emission_basis(in_plane, energy, **kw))
    np.testing.assert_array_equal(fast[0, 1], plain[0, 1])
    assert np.all(np.isfinite(fast))
    scale = np.abs(plain).max()
    np.testing.assert_allclose(fast, plain, rtol=0, atol=REL * scale)


def test_two_uncoupled_degenerate_excitons_are_exact():
    # Source: with g1 = g2 = 0 the excitons are eigenvectors of H with no photon weight,
    # whatever their degeneracy (here x1 = x2 exactly)
    e_c = np.array([[1.541, 1.545]])
    x = np.array([1.545])
    poles, res, bad = compiled(e_c, np.array([3e-4]), (x, x), (np.zeros(1), np.zeros(1)),
                               (np.array([8e-4]), np.array([8e-4])))
    assert not bad.any()
    np.testing.assert_allclose(poles[0, 0], [1.541 - 1.5e-4j, 1.545 - 4e-4j, 1.545 - 4e-4j],
                               rtol=1e-15)
    np.testing.assert_array_equal(res[0, 0], [1.0, 0.0, 0.0])
    # equal real parts: ordered by imaginary part, the narrower cavity last
    np.testing.assert_allclose(poles[0, 1], [1.545 - 4e-4j, 1.545 - 4e-4j, 1.545 - 1.5e-4j],
                               rtol=1e-15)
    np.testing.assert_array_equal(res[0, 1], [0.0, 0.0, 1.0])


def test_switched_off_path_never_calls_the_three_mode_kernel(numpy_path, monkeypatch):
    # common practice, no published source: POLKIT_COMPILED=0 keeps numpy.linalg.eig
    def boom(*_a, **_k):
        raise AssertionError("compiled three-oscillator kernel called on the numpy path")

    monkeypatch.setattr(_kernels3, "three_mode_poles", boom)
    basis = spectral.emission_basis(np.array([0.0, 10.0]), np.linspace(1.53, 1.56, 20),
                                    e_c0=1.541, n_eff=3.4, e_x=[1.545, 1.552],
                                    g=[0.006, 0.003], gamma_c=3e-4, gamma_x=[8e-4, 1.1e-3])
    assert np.asarray(basis).shape == (2, 3, 20)


def test_demo_map_three_oscillator_log_likelihood_equals_the_numpy_path():
    # common practice, no published source: the compiled poles feed the same likelihood.
    # The bundled demo map (invented data, data_examples/README.md), three-oscillator model,
    # walkers near the start and far from it
    from pathlib import Path

    demo = Path(__file__).resolve().parents[2] / "data_examples" / "ds1_p1_emission.nc"
    problem, start = prepare_dispersion(demo, model="three")
    rng = np.random.default_rng(15)
    x0 = start.x0
    width = problem.space.bounds[:, 1] - problem.space.bounds[:, 0]
    theta = np.vstack([x0 + 1e-4 * width * rng.standard_normal((16, x0.size)),
                       x0 + 3e-3 * width * rng.standard_normal((16, x0.size))])
    theta = np.clip(theta, problem.space.bounds[:, 0] + 1e-9, problem.space.bounds[:, 1])
    previous = _kernels.use_compiled(True)
    try:
        fast = problem.log_likelihood(theta)
        _kernels.use_compiled(False)
        plain = problem.log_likelihood(theta)
    finally:
        _kernels.use_compiled(previous)
    assert np.all(np.isfinite(plain))
    np.testing.assert_allclose(fast, plain, rtol=REL, atol=0)


@pytest.mark.skipif(np.finfo(np.longdouble).eps > 1e-18,
                    reason="long double is no wider than double on this platform")
def test_closely_spaced_levels_against_a_long_double_reference():
    # Source: G_CC(z) = (z - x1)(z - x2) / det(z - H) (photon entry of the resolvent),
    # evaluated in 80-bit long double: numpy's roots polished by Newton steps on det(z - H)
    # and the residues (z - x1)(z - x2) / D'(z).  Levels within 10 ueV of each other at
    # 1.5 eV: numpy.linalg.eig's backward error (u x 1.5 eV) is then large against the
    # splittings, the compiled path's (relative to the splittings) is not
    rng = np.random.default_rng(16)
    n_w, n_a, scale = 30, 4, 1e-5
    e_c = 1.5 + scale * rng.standard_normal((n_w, n_a))
    gamma_c = 10 ** rng.uniform(-6, -5, n_w)
    e_x = (1.5 + scale * rng.standard_normal(n_w), 1.5 + scale * rng.standard_normal(n_w))
    g = (10 ** rng.uniform(-7, -5, n_w), 10 ** rng.uniform(-7, -5, n_w))
    gamma_x = (10 ** rng.uniform(-6, -5, n_w), 10 ** rng.uniform(-6, -5, n_w))
    poles, res, bad = compiled(e_c, gamma_c, e_x, g, gamma_x)
    assert not bad.any()
    ref_poles, _ = reference(e_c, gamma_c, e_x, g, gamma_x)
    ld = np.clongdouble
    c = e_c.astype(ld) - 0.5j * gamma_c.astype(ld)[:, None]
    x1 = (e_x[0].astype(ld) - 0.5j * gamma_x[0].astype(ld))[:, None, None]
    x2 = (e_x[1].astype(ld) - 0.5j * gamma_x[1].astype(ld))[:, None, None]
    s1 = (g[0].astype(ld) ** 2)[:, None, None]
    s2 = (g[1].astype(ld) ** 2)[:, None, None]
    c = c[..., None]
    z = ref_poles.astype(ld)
    for _ in range(6):
        u0, u1, u2 = z - c, z - x1, z - x2
        f = u0 * u1 * u2 - s1 * u2 - s2 * u1
        fp = u1 * u2 + u0 * u2 + u0 * u1 - s1 - s2
        z = z - f / fp
    u0, u1, u2 = z - c, z - x1, z - x2
    r_ref = (u1 * u2) / (u1 * u2 + u0 * u2 + u0 * u1 - s1 - s2)
    gaps = np.min(np.abs(ref_poles[..., [0, 0, 1]] - ref_poles[..., [1, 2, 2]]), axis=-1)
    fine = gaps > 1e-3 * scale  # leave out rows at an exceptional point
    assert fine.mean() > 0.9
    pole_err = np.abs(poles - z.astype(complex))[fine]
    res_err = np.abs(res - r_ref.astype(complex))[fine]
    assert pole_err.max() <= 4 * np.finfo(float).eps * 1.5  # a few ulps of 1.5 eV
    assert res_err.max() <= 1e-12
