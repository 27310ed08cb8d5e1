"""The compiled peak-table likelihood against the numpy path and a loop written from its definition.

``DispersionProblem.table_log_likelihood`` computes the branch poles in numpy and then, when
the compiled kernels are on, matches table peaks to branches and sums the chi-square in
:func:`polkit.numerics.table_kernels.table_chi2`; otherwise a numpy path does the same on
``(W, A, P, K)`` arrays.  Both must give the same log-likelihood on the bundled demo maps
(emission and reflectance; two and three oscillators; weak coupling; Lorentzian and Voigt
peak tables, the latter without a centre-response table) and on invented tables where
branches are missing at some angles, so that the best-match rule runs beside the ordered one.

Tolerance.  The two paths do the same float64 operations per term; only the order of the
final sum over at most a few hundred non-negative terms (and, with a centre-response table,
of a two- or three-term dot product) differs, which bounds the difference by about
``n u chi2`` with ``u = 2^-53`` (Higham, Accuracy and Stability of Numerical Algorithms,
2nd ed., section 3.1): below 1e-13 relative here.  The checks allow 1e-12 relative.
"""

from __future__ import annotations

import math
from functools import cache
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from polkit.errors import DataError
from polkit.jobs.dispersion.parameters import default_space
from polkit.jobs.dispersion.problem import DispersionProblem, table_centre_response
from polkit.jobs.dispersion.run import prepare_dispersion
from polkit.models import spectral
from polkit.models.dispersion import cavity_energy, two_mode_eigenvalues
from polkit.models.green import photon_green
from polkit.models.simulate import simulate_map
from polkit.numerics import kernels as _kernels
from polkit.numerics import table_kernels as _table_kernels

pytestmark = pytest.mark.skipif(not _kernels.available(),
                                reason="numba does not import: only the numpy path exists")

DEMO = Path(__file__).resolve().parents[2] / "data_examples"
REL = 1e-12
MEV = 1e-3


@pytest.fixture
def switch():
    """``switch(flag)`` forces the compiled path on or off; the setting is restored after."""
    previous = _kernels.use_compiled(None)
    yield _kernels.use_compiled
    _kernels.use_compiled(previous)


def both_paths(problem: DispersionProblem, theta: np.ndarray, switch) -> tuple:
    switch(True)
    compiled = problem.table_log_likelihood(theta)
    switch(False)
    plain = problem.table_log_likelihood(theta)
    return compiled, plain


def spread_walkers(x0: np.ndarray, space, n: int, rel: float, seed: int) -> np.ndarray:
    """``n`` walkers scattered around ``x0`` (relative spread ``rel``), kept inside the prior."""
    rng = np.random.default_rng(seed)
    theta = x0 + rel * np.abs(x0) * rng.standard_normal((n, x0.size))
    inside = np.isfinite(space.log_prior(theta))
    assert inside.sum() >= n // 2, "the walkers left the prior: spread too wide for the test"
    return theta[inside]


# --------------------------------------------------------------------------------------
# a loop-based peak-table chi-square, written from the likelihood's definition
# --------------------------------------------------------------------------------------
def loop_chi2(problem: DispersionProblem, theta: np.ndarray) -> tuple[np.ndarray, int]:
    """Chi-square per walker and the number of observations, one term at a time.

    Definition (the docstring of ``table_log_likelihood``): every found peak contributes
    ``((E - centre) / dE)^2``, plus ``((w - 2 h) / dw)^2`` where its width and width error
    are usable.  ``centre = Re eps - h beta`` (``beta = Im r / Re r`` of the branch's photon
    residue, 0 where ``Re r <= 0``), or ``Re eps + R[a, p, p] beta`` with a centre-response
    table ``R``.  Where the table has one column per branch and every branch is found, peak
    ``p`` is branch ``p`` (with ``R``, its centre is ``Re eps_p + sum_k R[a, p, k] beta_k``);
    elsewhere each peak takes the branch with the smallest contribution.
    """
    tab = problem.table
    axis = problem.axis
    e = tab["energy"].transpose(axis, ...).values
    de = tab["energy_error"].transpose(axis, ...).values
    w = tab["fwhm"].transpose(axis, ...).values * MEV
    dw = tab["fwhm_error"].transpose(axis, ...).values * MEV
    resp = None
    if problem.kind == "emission":
        resp = table_centre_response(tab, problem.energy, problem.inv_var)
    p_phys = problem.physics(theta)
    poles, res = spectral.branch_poles(
        problem.in_plane, **{k: v for k, v in p_phys.items() if k != "axis"}, axis=axis)
    n_w, n_a, n_k = poles.shape
    n_p = e.shape[1]
    chi2 = np.zeros(n_w)
    n_obs = 0
    for a in range(n_a):
        for p in range(n_p):
            if math.isfinite(e[a, p]) and math.isfinite(de[a, p]) and de[a, p] > 0:
                n_obs += 1
                if math.isfinite(w[a, p]) and math.isfinite(dw[a, p]) and dw[a, p] > 0:
                    n_obs += 1
    for i in range(n_w):
        total = 0.0
        for a in range(n_a):
            found = [math.isfinite(e[a, p]) and math.isfinite(de[a, p]) and de[a, p] > 0
                     for p in range(n_p)]
            ordered = n_p == n_k and sum(found) == n_k
            eps = [complex(poles[i, a, k]) for k in range(n_k)]
            r = [complex(res[i, a, k]) for k in range(n_k)]
            beta = [rk.imag / rk.real if rk.real > 0 else 0.0 for rk in r]
            for p in range(n_p):
                if not found[p]:
                    continue
                width_ok = math.isfinite(w[a, p]) and math.isfinite(dw[a, p]) and dw[a, p] > 0
                terms = []
                for k in range(n_k):
                    if ordered and k != p:
                        continue
                    half_width = -eps[k].imag
                    if resp is None:
                        centre = eps[k].real - half_width * beta[k]
                    elif ordered:
                        centre = eps[k].real + sum(resp[a, p, j] * beta[j] for j in range(n_k))
                    else:
                        centre = eps[k].real + resp[a, p, p] * beta[k]
                    value = ((e[a, p] - centre) / de[a, p]) ** 2
                    if width_ok:
                        value += ((w[a, p] - 2.0 * half_width) / dw[a, p]) ** 2
                    terms.append(value)
                total += min(terms)
        chi2[i] = total
    return chi2, n_obs


def loop_log_likelihood(problem: DispersionProblem, theta: np.ndarray) -> np.ndarray:
    chi2, n_obs = loop_chi2(problem, theta)
    s = theta[:, problem.space.names.index("noise_scale")]
    return -0.5 * chi2 / (s * s) - n_obs * np.log(s)


# --------------------------------------------------------------------------------------
# the bundled demo maps (invented data, see data_examples/README.md)
# --------------------------------------------------------------------------------------
@cache
def demo_problem(name: str, model: str, profile: str):
    problem, start = prepare_dispersion(DEMO / name, model=model, profile=profile)
    return problem, start.x0


DEMO_CASES = [
    (name, model, profile)
    for name in ("ds1_p1_emission.nc", "ds1_p2_emission_nm.txt")
    for model in ("two", "three")
    for profile in ("lorentzian", "voigt")
] + [("ds1_p1_reflectance.npz", "two", "lorentzian"),
     ("ds1_p2_emission_nm.txt", "weak", "lorentzian")]


@pytest.mark.parametrize(("name", "model", "profile"), DEMO_CASES)
def test_compiled_and_numpy_paths_agree_on_the_demo_tables(name, model, profile, switch):
    # common practice, no published source: the compiled kernel reproduces the numpy path
    problem, x0 = demo_problem(name, model, profile)
    # near the start and far from it (walkers that put branches away from the peaks)
    theta = np.vstack([spread_walkers(x0, problem.space, 16, 1e-4, 1),
                       spread_walkers(x0, problem.space, 16, 3e-3, 2)])
    compiled, plain = both_paths(problem, theta, switch)
    assert np.all(np.isfinite(plain))
    np.testing.assert_allclose(compiled, plain, rtol=REL, atol=0)


@pytest.mark.parametrize(("name", "model", "profile"), [
    ("ds1_p2_emission_nm.txt", "two", "lorentzian"),  # ordered, with the response table
    ("ds1_p2_emission_nm.txt", "two", "voigt"),  # ordered, first-order centre
    ("ds1_p1_emission.nc", "three", "lorentzian"),  # best match, with the response table
])
def test_demo_table_chi2_matches_the_loop_definition(name, model, profile, switch):
    # common practice, no published source: the Gaussian chi-square summed term by term
    problem, x0 = demo_problem(name, model, profile)
    theta = spread_walkers(x0, problem.space, 6, 1e-3, 3)
    expected = loop_log_likelihood(problem, theta)
    compiled, plain = both_paths(problem, theta, switch)
    np.testing.assert_allclose(compiled, expected, rtol=REL, atol=0)
    np.testing.assert_allclose(plain, expected, rtol=REL, atol=0)


# --------------------------------------------------------------------------------------
# invented tables with missing branches
# --------------------------------------------------------------------------------------
# Invented, sample-like parameters: a GaAs-like cavity and excitons, not a real device.
TRUTH_TWO = {"exciton_energy": 1.545, "cavity_energy": 1.541, "n_eff": 3.4,
             "rabi_splitting": 12.0, "cavity_linewidth": 0.3, "exciton_linewidth": 0.8}
TRUTH_THREE = dict(TRUTH_TWO, exciton2_energy=1.552, rabi_splitting2=6.0,
                   exciton2_linewidth=1.1)
ANGLES = np.linspace(-20.0, 20.0, 13)
ENERGIES = np.linspace(1.525, 1.570, 400)


K_GRID = np.linspace(-2.7, 2.7, 13)  # 1/um, about the same range as ANGLES near 1.54 eV


def invented_problem(n_excitons: int, kind: str, n_peaks: int, seed: int, *,
                     axis: str = "angle", coupling: str = "strong"):
    """A problem whose peak table comes from known branches, with holes.

    Peaks sit at the branches' fitted centres plus noise; at some angles a branch is
    missing (lower, upper, or everything), some widths are unusable, and with
    ``n_peaks > K`` a spurious extra peak is listed.  ``axis="k"`` puts the table on an
    in-plane wavevector axis; ``coupling="weak"`` is the uncoupled-modes model (g = 0, the
    centres are the bare modes' energies).
    """
    truth = TRUTH_TWO if n_excitons == 1 else TRUTH_THREE
    grid = ANGLES if axis == "angle" else K_GRID
    rng = np.random.default_rng(seed)
    guess = dict(truth)
    space = default_space(ENERGIES, guess, n_excitons=n_excitons, kind=kind, coupling=coupling)
    if kind == "reflectance":
        guess["mirror_fraction"] = 0.4
    guess["noise_scale"] = 1.0
    x_true = np.array([guess[n] for n in space.names])
    n_k = n_excitons + 1
    n_a = grid.size
    # a provisional problem only to map theta onto the physics
    dummy = DispersionProblem(axis=axis, in_plane=grid, energy=ENERGIES,
                              y=np.zeros((n_a, ENERGIES.size)),
                              inv_var=np.ones((n_a, ENERGIES.size)), space=space,
                              n_excitons=n_excitons, kind=kind, coupling=coupling)
    phys = dummy.physics(x_true)
    poles, res = spectral.branch_poles(grid, **{k: v for k, v in phys.items() if k != "axis"},
                                       axis=axis)
    poles, res = poles[0], res[0]
    h = -poles.imag
    if coupling == "weak":  # uncoupled modes: photon residues 0 and 1, symmetric lines
        centre = poles.real
    else:
        centre = poles.real - h * np.divide(res.imag, res.real, out=np.zeros_like(h),
                                            where=res.real > 0)
    e = np.full((n_a, n_peaks), np.nan)
    de = np.full((n_a, n_peaks), np.nan)
    fw = np.full((n_a, n_peaks), np.nan)
    dfw = np.full((n_a, n_peaks), np.nan)
    de_true = rng.uniform(0.05e-3, 0.3e-3, (n_a, n_k))
    dw_true = rng.uniform(0.02, 0.2, (n_a, n_k))  # meV
    e[:, :n_k] = centre + de_true * rng.standard_normal((n_a, n_k))
    de[:, :n_k] = de_true
    fw[:, :n_k] = 2.0 * h / MEV + dw_true * rng.standard_normal((n_a, n_k))
    dfw[:, :n_k] = dw_true
    if n_peaks > n_k:  # a spurious line between the branches at a few angles
        extra = np.arange(n_a) % 4 == 1
        e[extra, n_k] = centre[extra].mean(axis=1)
        de[extra, n_k] = 0.5e-3
        fw[extra, n_k] = 1.0
        dfw[extra, n_k] = 0.3
    # holes: lower branch missing, upper missing (its column left empty or filled by the
    # lower one), nothing found, an error of zero (not a peak), unusable widths
    e[1, 0] = np.nan
    e[2, n_k - 1] = np.nan
    e[3, 0], de[3, 0], fw[3, 0], dfw[3, 0] = e[3, n_k - 1], de[3, n_k - 1], fw[3, n_k - 1], \
        dfw[3, n_k - 1]
    e[3, n_k - 1] = np.nan
    e[4, :] = np.nan
    de[5, 0] = 0.0
    dfw[6, 0] = np.nan
    fw[7, n_k - 1] = np.nan
    dfw[8, 0] = 0.0
    found = np.isfinite(e) & np.isfinite(de) & (de > 0)
    area = np.where(found, rng.uniform(0.5, 3.0, e.shape), np.nan)  # signal x meV
    table = xr.Dataset(
        {
            "energy": (("angle", "peak"), e, {"units": "eV"}),
            "energy_error": (("angle", "peak"), de, {"units": "eV"}),
            "fwhm": (("angle", "peak"), fw, {"units": "meV"}),
            "fwhm_error": (("angle", "peak"), dfw, {"units": "meV"}),
            "area": (("angle", "peak"), area, {"units": "counts meV"}),
            "background": (("angle",), np.full(n_a, 10.0), {"units": "counts"}),
            "found": (("angle", "peak"), found.astype(np.int8)),
        },
        coords={"angle": ("angle", grid, {"units": "degree" if axis == "angle" else "1/um"}),
                "peak": np.arange(n_peaks)},
        attrs={"profile": "lorentzian", "source": "invented"},
    )
    table = table.rename({"angle": axis}) if axis != "angle" else table
    inv_var = 1.0 / (10.0 + 40.0 * rng.uniform(size=(n_a, ENERGIES.size)))
    problem = DispersionProblem(axis=axis, in_plane=grid, energy=ENERGIES,
                                y=np.zeros((n_a, ENERGIES.size)), inv_var=inv_var,
                                space=space, n_excitons=n_excitons, kind=kind, table=table,
                                coupling=coupling)
    return problem, x_true


INVENTED = [
    (1, "emission", 2),  # P == K: ordered where complete, best match at the holes
    (2, "emission", 3),  # three branches, joint response where complete
    (1, "reflectance", 2),  # no response table
    (1, "emission", 3),  # P > K: best match everywhere
    (2, "reflectance", 3),
]


@pytest.mark.parametrize(("n_excitons", "kind", "n_peaks"), INVENTED)
def test_paths_agree_and_match_the_loop_on_tables_with_missing_branches(
        n_excitons, kind, n_peaks, switch):
    # common practice, no published source: equivalence of the two paths and with the
    # chi-square summed term by term from its definition
    problem, x_true = invented_problem(n_excitons, kind, n_peaks, seed=10 + n_peaks)
    all_found = problem._tfound.sum(axis=1) == n_excitons + 1
    assert all_found.any() and not all_found.all()  # both rules run
    if kind == "emission":
        assert problem._t_resp is not None and np.any(problem._t_resp != 0.0)
    theta = np.vstack([x_true, spread_walkers(x_true, problem.space, 11, 2e-3, 4)])
    expected = loop_log_likelihood(problem, theta)
    assert np.all(np.isfinite(expected))
    compiled, plain = both_paths(problem, theta, switch)
    np.testing.assert_allclose(compiled, expected, rtol=REL, atol=0)
    np.testing.assert_allclose(plain, expected, rtol=REL, atol=0)


def test_kernel_chi2_is_the_loop_chi2():
    # common practice, no published source: the kernel's own output, before the noise scale
    problem, x_true = invented_problem(2, "emission", 3, seed=7)
    theta = spread_walkers(x_true, problem.space, 8, 1e-3, 5)
    phys = problem.physics(theta)
    poles, res = spectral.branch_poles(
        ANGLES, **{k: v for k, v in phys.items() if k != "axis"})
    h = -poles.imag
    ratio = np.divide(res.imag, res.real, out=np.zeros_like(h), where=res.real > 0)
    chi2 = _table_kernels.table_chi2(poles.real, h, ratio, *problem._t_kernel)
    expected, n_obs = loop_chi2(problem, theta)
    assert n_obs == problem._t_nobs
    np.testing.assert_allclose(chi2, expected, rtol=REL, atol=0)


def test_a_nan_branch_gives_nan_on_both_paths():
    # common practice, no published source: NaN is never hidden by the matching (numpy.min
    # propagates it), so the sampler's NaN check sees a broken walker
    problem, x_true = invented_problem(1, "emission", 2, seed=8)
    theta = spread_walkers(x_true, problem.space, 4, 1e-3, 6)
    phys = problem.physics(theta)
    poles, res = spectral.branch_poles(
        ANGLES, **{k: v for k, v in phys.items() if k != "axis"})
    poles[1, 1, 1] = complex(np.nan, poles[1, 1, 1].imag)  # best-match angle (branch missing)
    poles[2, 0, 0] = complex(np.nan, poles[2, 0, 0].imag)  # ordered angle
    h = -poles.imag
    ratio = np.divide(res.imag, res.real, out=np.zeros_like(h), where=res.real > 0)
    compiled = _table_kernels.table_chi2(poles.real, h, ratio, *problem._t_kernel)
    plain = problem._table_chi2_numpy(poles, h, ratio)
    assert np.isnan(compiled[1]) and np.isnan(plain[1])
    assert np.isnan(compiled[2]) and np.isnan(plain[2])
    np.testing.assert_allclose(compiled[[0, 3]], plain[[0, 3]], rtol=REL, atol=0)


@pytest.mark.parametrize(("n_excitons", "route"), [(1, "two_mode_table_chi2"),
                                                   (2, "table_chi2_prepared")])
def test_the_switch_chooses_the_path(monkeypatch, switch, n_excitons, route):
    # common practice, no published source: POLKIT_COMPILED=0 (or use_compiled(False))
    # leaves the kernels unused, so the equivalence checks compare different code; with
    # them on, one exciton takes the fused kernel and three oscillators the matching kernel
    problem, x_true = invented_problem(n_excitons, "emission", n_excitons + 1, seed=9)
    calls = []

    def spy(name):
        kernel = getattr(_table_kernels, name)

        def wrapped(*args):
            calls.append(name)
            return kernel(*args)
        return wrapped

    for name in ("table_chi2", "table_chi2_prepared", "two_mode_table_chi2"):
        monkeypatch.setattr(_table_kernels, name, spy(name))
    theta = x_true[None]
    switch(None)
    monkeypatch.setenv(_kernels.ENV_SWITCH, "0")
    problem.table_log_likelihood(theta)
    assert calls == []
    monkeypatch.delenv(_kernels.ENV_SWITCH)
    problem.table_log_likelihood(theta)
    assert calls == [route]
    switch(False)
    problem.table_log_likelihood(theta)
    assert calls == [route]


# --------------------------------------------------------------------------------------
# one exciton: the fused kernel (poles, residues and chi-square in one compiled call)
# --------------------------------------------------------------------------------------
def noise_term(problem: DispersionProblem, theta: np.ndarray, chi2: np.ndarray) -> np.ndarray:
    s = theta[:, problem.space.names.index("noise_scale")]
    return -0.5 * chi2 / (s * s) - problem._t_nobs * np.log(s)


def pole_routes(problem: DispersionProblem, theta: np.ndarray, *,
                uncoupled: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Log-likelihood from the numpy poles, matched by the compiled and the numpy chi-square.

    These are the routes the likelihood took before the fused kernel: ``branch_poles``, then
    ``_table_kernels.table_chi2`` (compiled) or ``_table_chi2_numpy``.  ``uncoupled=True`` uses
    the exact photon residues of uncoupled modes (0 for the exciton, 1 for the cavity, so
    ``Im r / Re r = 0`` on both branches) instead of the numpy residues.
    """
    phys = problem.physics(theta)
    poles, res = spectral.branch_poles(
        problem.in_plane, **{k: v for k, v in phys.items() if k != "axis"}, axis=problem.axis)
    h = -poles.imag
    if uncoupled:
        ratio = np.zeros_like(h)
    else:
        ratio = np.divide(res.imag, res.real, out=np.zeros_like(h), where=res.real > 0)
    return (noise_term(problem, theta, _table_kernels.table_chi2(poles.real, h, ratio,
                                                           *problem._t_kernel)),
            noise_term(problem, theta, problem._table_chi2_numpy(poles, h, ratio)))


def fused(problem: DispersionProblem, theta: np.ndarray, switch) -> np.ndarray:
    """The likelihood with the compiled path on, checked to run the fused kernel."""
    assert problem._t_fused is not None
    switch(True)
    chi2, outside = _table_kernels.two_mode_table_chi2(theta, *problem._t_fused)
    assert outside == 0
    value = problem.table_log_likelihood(theta)
    np.testing.assert_array_equal(value, noise_term(problem, theta, chi2))
    return value


@pytest.mark.parametrize(("name", "profile", "response"), [
    ("ds1_p2_emission_nm.txt", "lorentzian", True),
    ("ds1_p2_emission_nm.txt", "voigt", False),
    ("ds1_p1_emission.nc", "lorentzian", True),
    ("ds1_p1_reflectance.npz", "lorentzian", False),
])
def test_fused_kernel_equals_the_pole_routes_on_the_demo_tables(name, profile, response,
                                                                  switch):
    # common practice, no published source: the fused kernel against the numpy poles with
    # the compiled matching and with the numpy matching (the two routes it replaces)
    problem, x0 = demo_problem(name, "two", profile)
    assert (problem._t_resp is not None) == response
    theta = np.vstack([spread_walkers(x0, problem.space, 16, 1e-4, 11),
                       spread_walkers(x0, problem.space, 16, 3e-3, 12)])
    value = fused(problem, theta, switch)
    assert np.all(np.isfinite(value))
    with_kernel, with_numpy = pole_routes(problem, theta)
    np.testing.assert_allclose(value, with_kernel, rtol=REL, atol=0)
    np.testing.assert_allclose(value, with_numpy, rtol=REL, atol=0)
    switch(False)
    np.testing.assert_allclose(value, problem.table_log_likelihood(theta), rtol=REL, atol=0)


@pytest.mark.parametrize("profile", ["lorentzian", "voigt"])
def test_fused_kernel_on_the_weak_demo_equals_the_uncoupled_pole_routes(profile, switch):
    # Source: analytic limit: at g = 0 the exciton and cavity poles are the bare modes and
    # their photon residues are exactly 0 and 1 (Savona et al., Solid State Commun. 93, 733
    # (1995), closed-form G_CC with g = 0); equivalence with the numpy routes given those
    # residues: common practice
    problem, x0 = demo_problem("ds1_p2_emission_nm.txt", "weak", profile)
    assert "rabi_splitting" not in problem.space.names
    theta = np.vstack([spread_walkers(x0, problem.space, 16, 1e-4, 13),
                       spread_walkers(x0, problem.space, 16, 3e-3, 14)])
    value = fused(problem, theta, switch)
    assert np.all(np.isfinite(value))
    for route in pole_routes(problem, theta, uncoupled=True):
        np.testing.assert_allclose(value, route, rtol=REL, atol=0)


K_AXIS_CASES = [
    (1, "emission", 2, "strong"),  # ordered where complete, response table
    (1, "reflectance", 2, "strong"),  # no response table
    (1, "emission", 3, "strong"),  # best match everywhere
    (1, "emission", 2, "weak"),
]


@pytest.mark.parametrize(("n_excitons", "kind", "n_peaks", "coupling"), K_AXIS_CASES)
def test_fused_kernel_on_a_k_axis_problem(n_excitons, kind, n_peaks, coupling, switch):
    # common practice, no published source: the k-axis cavity E_C = sqrt(E_C0^2 +
    # (hbar c k / n_eff)^2) in the kernel against the numpy routes and the term-by-term sum
    problem, x_true = invented_problem(n_excitons, kind, n_peaks, seed=20 + n_peaks,
                                       axis="k", coupling=coupling)
    assert problem.axis == "k" and problem._t_fused[1][1]
    assert (problem._t_resp is not None) == (kind == "emission")
    theta = np.vstack([x_true, spread_walkers(x_true, problem.space, 11, 2e-3, 15)])
    value = fused(problem, theta, switch)
    assert np.all(np.isfinite(value))
    weak = coupling == "weak"
    for route in pole_routes(problem, theta, uncoupled=weak):
        np.testing.assert_allclose(value, route, rtol=REL, atol=0)
    if not weak:
        np.testing.assert_allclose(value, loop_log_likelihood(problem, theta), rtol=REL,
                                   atol=0)
        switch(False)
        np.testing.assert_allclose(value, problem.table_log_likelihood(theta), rtol=REL,
                                   atol=0)


@pytest.mark.parametrize(("n_excitons", "kind", "n_peaks"), INVENTED[:1] + INVENTED[2:4])
def test_fused_kernel_on_tables_with_missing_branches(n_excitons, kind, n_peaks, switch):
    # common practice, no published source: holes in the table (best-match rule beside the
    # ordered one) through the fused kernel, against the term-by-term sum
    problem, x_true = invented_problem(n_excitons, kind, n_peaks, seed=10 + n_peaks)
    theta = np.vstack([x_true, spread_walkers(x_true, problem.space, 11, 2e-3, 4)])
    value = fused(problem, theta, switch)
    np.testing.assert_allclose(value, loop_log_likelihood(problem, theta), rtol=REL, atol=0)


# -- the domain of the model: the same DataError on both paths -------------------------
def domain_error(problem: DispersionProblem, theta: np.ndarray, switch, compiled: bool) -> str:
    switch(compiled)
    with pytest.raises(DataError) as info:
        problem.table_log_likelihood(theta)
    return str(info.value)


@pytest.mark.parametrize(("axis", "name", "value", "field"), [
    ("angle", "n_eff", "below_sin", "n_eff"),  # n_eff below sin of the largest angle
    ("angle", "rabi_splitting", -0.5, "g"),
    ("angle", "cavity_linewidth", 0.0, "gamma_c"),
    ("angle", "exciton_linewidth", -1.0, "gamma_x"),
    ("angle", "cavity_energy", 0.0, "e_c0"),
    ("angle", "exciton_energy", np.nan, "e_x"),
    ("k", "n_eff", 0.0, "n_eff"),
    ("k", "n_eff", -3.4, "n_eff"),
])
def test_domain_errors_are_the_same_on_both_paths(axis, name, value, field, switch):
    # common practice, no published source: a walker outside the model's domain (here one
    # of eight) stops the call with the numpy path's DataError, compiled or not
    problem, x_true = invented_problem(1, "emission", 2, seed=30, axis=axis)
    theta = np.tile(x_true, (8, 1))
    if value == "below_sin":
        value = 0.9 * np.abs(np.sin(np.deg2rad(ANGLES))).max()
    theta[5, problem.space.names.index(name)] = value
    compiled = domain_error(problem, theta, switch, True)
    plain = domain_error(problem, theta, switch, False)
    assert compiled == plain
    assert f"field '{field}'" in compiled
    with pytest.raises(DataError, match="expected n_eff > |sin" if field == "n_eff" else
                       f"expected {field} "):
        problem.table_log_likelihood(theta)
    # the other walkers alone are inside the domain and take the fused kernel
    switch(True)
    chi2, outside = _table_kernels.two_mode_table_chi2(theta, *problem._t_fused)
    assert outside == 1 and np.isnan(chi2[5]) and np.all(np.isfinite(np.delete(chi2, 5)))
    # the whole-map likelihood refuses the same walker with the same words on both paths
    refusals = []
    for flag in (True, False):
        switch(flag)
        with pytest.raises(DataError) as info:
            problem.log_likelihood(theta)
        refusals.append(str(info.value))
    assert refusals[0] == refusals[1] and f"field '{field}'" in refusals[0]


@pytest.mark.parametrize("axis", ["angle", "k"])
def test_whole_map_likelihood_is_the_same_with_compiled_poles(axis, switch):
    # common practice, no published source: the compiled one-exciton poles and residues
    # (the closed forms, checked against numpy below) feed the same emission basis, so the
    # whole-map log-likelihood agrees with the numpy path to rounding
    problem, x_true = invented_problem(1, "emission", 2, seed=31, axis=axis)
    # a map to fit: both branches at the truth plus a background, with Gaussian noise
    physics = {k: v for k, v in problem.physics(x_true).items() if k != "axis"}
    mean = simulate_map(problem.in_plane, problem.energy, amplitudes=[1.0, 0.4],
                        background=0.02, axis=axis, **physics).signal[0]
    sigma = 0.01 * mean.max()
    problem.y = mean + sigma * np.random.default_rng(8).standard_normal(mean.shape)
    problem.set_noise(np.full(mean.shape, sigma ** -2))
    theta = spread_walkers(x_true, problem.space, 16, 1e-3, seed=4)
    switch(True)
    assert problem._whole_map_compiled()
    compiled = problem.log_likelihood(theta)
    switch(False)
    assert not problem._whole_map_compiled()
    plain = problem.log_likelihood(theta)
    assert np.all(np.isfinite(plain))
    np.testing.assert_allclose(compiled, plain, rtol=REL, atol=0)


# -- poles and residues against the numpy closed forms ----------------------------------
# Invented parameters in eV: widths gamma_C = 0.2 meV and gamma_X = 1.0 meV put the
# exceptional point at g = |gamma_C - gamma_X| / 4 = 0.2 meV.
POLE_CASES = {
    "strong": dict(g=6e-3, gamma_c=0.2e-3, gamma_x=1.0e-3),
    "below the exceptional point": dict(g=0.1e-3, gamma_c=0.2e-3, gamma_x=1.0e-3),
    "below, broader cavity": dict(g=0.1e-3, gamma_c=1.0e-3, gamma_x=0.2e-3),
    "equal widths": dict(g=2e-3, gamma_c=0.5e-3, gamma_x=0.5e-3),
    "uncoupled": dict(g=0.0, gamma_c=0.2e-3, gamma_x=1.0e-3),
}


def kernel_poles(axis: str, grid: np.ndarray, e_c0, n_eff, e_x, g, gamma_c, gamma_x):
    """Poles and residues of the fused kernel for walkers given directly in eV."""
    theta = np.column_stack(np.broadcast_arrays(e_c0, n_eff, e_x, g, gamma_c, gamma_x))
    parameters = _table_kernels.parameter_map(range(6), np.ones(6), 6)
    terms = _table_kernels.in_plane_terms(grid, axis)
    return _table_kernels.two_mode_poles(theta, parameters, terms)


@pytest.mark.parametrize("case", list(POLE_CASES))
@pytest.mark.parametrize("axis", ["angle", "k"])
def test_kernel_poles_and_residues_at_zero_detuning(case, axis):
    # Source: closed form of the 2x2 non-Hermitian eigenvalues with the principal root,
    # Savona et al., Solid State Commun. 93, 733 (1995) (two_mode_eigenvalues and
    # branch_poles); at zero detuning the numpy residues have no cancellation either, so
    # both are compared to 1e-13; the labels below the exceptional point (equal real
    # parts) follow the sign convention of the principal root
    grid = np.array([0.0])  # normal incidence: E_C = E_C0 exactly
    par = POLE_CASES[case]
    e = np.array([1.5421, 1.5421, 1.6])
    n = np.array([3.4, 2.9, 3.4])
    poles, res = kernel_poles(axis, grid, e, n, e, **par)
    ref_poles, ref_res = spectral.branch_poles(grid, e_c0=e, n_eff=n, e_x=e, axis=axis, **par)
    lo, up = two_mode_eigenvalues(e[:, None], e[:, None], par["g"], par["gamma_c"],
                                  par["gamma_x"])
    np.testing.assert_array_equal(ref_poles, np.stack([lo, up], axis=-1))
    np.testing.assert_allclose(poles.real, ref_poles.real, rtol=1e-13, atol=0)
    np.testing.assert_allclose(poles.imag, ref_poles.imag, rtol=1e-13, atol=0)
    if par["g"] > 0:
        np.testing.assert_allclose(res, ref_res, rtol=0, atol=1e-13)
    below = par["g"] < abs(par["gamma_c"] - par["gamma_x"]) / 4
    if below:  # equal energies, the lower label on the broader pole
        np.testing.assert_allclose(poles.real[..., 0], poles.real[..., 1], rtol=1e-15)
        assert np.all(poles.imag[..., 0] < poles.imag[..., 1])


@pytest.mark.parametrize("case", list(POLE_CASES))
@pytest.mark.parametrize("axis", ["angle", "k"])
def test_kernel_poles_and_residues_along_the_axis(case, axis):
    # Source: closed forms as above (Savona et al., Solid State Commun. 93, 733 (1995));
    # residues checked against an extended-precision evaluation of the same partial
    # fractions (numpy longdouble), against branch_poles, against the sum rule
    # r_lo + r_up = 1, and against the closed-form G_CC of photon_green at a few energies
    grid = np.linspace(-20.0, 20.0, 41) if axis == "angle" else np.linspace(-2.7, 2.7, 41)
    par = POLE_CASES[case]
    e_x = np.array([1.5450, 1.5450, 1.5300])
    e_c0 = np.array([1.5450, 1.5420, 1.5470])  # resonance at normal incidence, red, blue
    n = np.array([3.4, 3.1, 2.2])
    poles, res = kernel_poles(axis, grid, e_c0, n, e_x, **par)
    ref_poles, ref_res = spectral.branch_poles(grid, e_c0=e_c0, n_eff=n, e_x=e_x, axis=axis,
                                               **par)
    np.testing.assert_allclose(poles.real, ref_poles.real, rtol=1e-13, atol=0)
    np.testing.assert_allclose(poles.imag, ref_poles.imag, rtol=1e-13, atol=0)
    np.testing.assert_allclose(res.sum(axis=-1), 1.0, rtol=0, atol=1e-13)
    # extended precision: the numpy formulas of branch_poles in longdouble
    ld = np.longdouble
    if np.finfo(ld).eps < 1e-18:
        kw = {"angle_deg": grid} if axis == "angle" else {"k": grid}
        e_c = cavity_energy(e_c0[:, None], n[:, None], **kw).astype(ld)
        x = e_x[:, None].astype(ld)
        mean = (e_c + x) / 2 - 1j * ld(par["gamma_c"] + par["gamma_x"]) / 4
        half = (e_c - x) / 2 - 1j * (ld(par["gamma_c"]) - ld(par["gamma_x"])) / 4
        root = np.sqrt(ld(par["g"]) ** 2 + half * half)
        lo, up = mean - root, mean + root
        r_lo = (lo - (x - 1j * ld(par["gamma_x"]) / 2)) / (lo - up)
        np.testing.assert_allclose(res[..., 0], r_lo.astype(complex), rtol=0, atol=1e-13)
        np.testing.assert_allclose(res[..., 1], (1 - r_lo).astype(complex), rtol=0, atol=1e-13)
    # branch_poles forms the residues without cancellation too: the same to 1e-13
    np.testing.assert_allclose(ref_res, res, rtol=0, atol=1e-13)
    if par["g"] > 0:
        # partial fractions reproduce the closed-form photon Green's function
        kw = {"angle_deg": grid} if axis == "angle" else {"k": grid}
        e_c = cavity_energy(e_c0[:, None], n[:, None], **kw)
        energy = np.array([1.52, 1.5435, 1.56])[:, None, None]
        partial = np.sum(res[None] / (energy[..., None] - poles[None]), axis=-1)
        closed = photon_green(energy, e_c[None], e_x[None, :, None], par["g"], par["gamma_c"],
                              par["gamma_x"])
        np.testing.assert_allclose(partial, closed, rtol=1e-10, atol=0)
    else:  # uncoupled: the bare modes and residues exactly 0 (exciton) and 1 (cavity)
        kw = {"angle_deg": grid} if axis == "angle" else {"k": grid}
        e_c = cavity_energy(e_c0[:, None], n[:, None], **kw)
        bare_c = e_c - 0.5j * par["gamma_c"]
        bare_x = np.broadcast_to(e_x[:, None] - 0.5j * par["gamma_x"], e_c.shape)
        # at resonance the real parts are equal and the lower label is the broader pole
        cavity_up = (e_c > e_x[:, None]) | ((e_c == e_x[:, None])
                                            & (par["gamma_c"] < par["gamma_x"]))
        assert np.any(e_c == e_x[:, None])  # the resonance is on the grid
        np.testing.assert_allclose(poles[..., 1], np.where(cavity_up, bare_c, bare_x),
                                   rtol=1e-15, atol=0)
        np.testing.assert_allclose(poles[..., 0], np.where(cavity_up, bare_x, bare_c),
                                   rtol=1e-15, atol=0)
        photon = np.where(cavity_up[..., None], [0.0, 1.0], [1.0, 0.0])
        np.testing.assert_allclose(res, photon, rtol=0, atol=1e-15)
        assert np.all(res.imag[photon == 0.0] == 0.0) and np.all(res.real[photon == 0] == 0)


def test_parameter_map_and_axis_terms_refuse_what_the_kernel_cannot_read():
    # common practice, no published source: the kernel reads theta without bounds checks,
    # so the column map is checked once, when it is built
    with pytest.raises(ValueError, match="column indices"):
        _table_kernels.parameter_map([0, 1, 2, 3, 4, 7], np.ones(6), 7)
    with pytest.raises(ValueError, match="column indices"):
        _table_kernels.parameter_map([0, 1, 2, -2, 4, 5], np.ones(6), 7)
    with pytest.raises(ValueError, match="column indices"):
        _table_kernels.parameter_map([0, 1, 2, 3], np.ones(4), 7)
    parameters = _table_kernels.parameter_map(range(6), np.ones(6), 6)
    with pytest.raises(ValueError, match=r"shape \(W, 6\)"):
        _table_kernels.two_mode_poles(np.ones((3, 5)), parameters,
                                _table_kernels.in_plane_terms(ANGLES, "angle"))
    with pytest.raises(ValueError, match="axis"):
        _table_kernels.in_plane_terms(ANGLES, "energy")
