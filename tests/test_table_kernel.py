"""The compiled peak-table likelihood against the numpy path and a loop written from its definition.

``DispersionProblem.table_log_likelihood`` computes the branch poles in numpy and then, when
the compiled kernels are on, matches table peaks to branches and sums the chi-square in
:func:`polkit.models._kernels.table_chi2`; otherwise a numpy path does the same on
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

from polkit.models import _kernels, spectral
from polkit.workflows.dispersion import prepare_dispersion
from polkit.workflows.dispersion_model import (
    DispersionProblem,
    default_space,
    table_centre_response,
)

pytestmark = pytest.mark.skipif(not _kernels.available(),
                                reason="numba does not import: only the numpy path exists")

DEMO = Path(__file__).resolve().parent.parent / "data_examples"
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


def invented_problem(n_excitons: int, kind: str, n_peaks: int, seed: int):
    """A problem whose peak table comes from known branches, with holes.

    Peaks sit at the branches' fitted centres plus noise; at some angles a branch is
    missing (lower, upper, or everything), some widths are unusable, and with
    ``n_peaks > K`` a spurious extra peak is listed.
    """
    truth = TRUTH_TWO if n_excitons == 1 else TRUTH_THREE
    rng = np.random.default_rng(seed)
    guess = dict(truth)
    space = default_space(ENERGIES, guess, n_excitons=n_excitons, kind=kind)
    if kind == "reflectance":
        guess["mirror_fraction"] = 0.4
    guess["noise_scale"] = 1.0
    x_true = np.array([guess[n] for n in space.names])
    n_k = n_excitons + 1
    n_a = ANGLES.size
    # a provisional problem only to map theta onto the physics
    dummy = DispersionProblem(axis="angle", in_plane=ANGLES, energy=ENERGIES,
                              y=np.zeros((n_a, ENERGIES.size)),
                              inv_var=np.ones((n_a, ENERGIES.size)), space=space,
                              n_excitons=n_excitons, kind=kind)
    phys = dummy.physics(x_true)
    poles, res = spectral.branch_poles(ANGLES, **{k: v for k, v in phys.items() if k != "axis"})
    poles, res = poles[0], res[0]
    h = -poles.imag
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
        coords={"angle": ("angle", ANGLES, {"units": "degree"}), "peak": np.arange(n_peaks)},
        attrs={"profile": "lorentzian", "source": "invented"},
    )
    inv_var = 1.0 / (10.0 + 40.0 * rng.uniform(size=(n_a, ENERGIES.size)))
    problem = DispersionProblem(axis="angle", in_plane=ANGLES, energy=ENERGIES,
                                y=np.zeros((n_a, ENERGIES.size)), inv_var=inv_var,
                                space=space, n_excitons=n_excitons, kind=kind, table=table)
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
    chi2 = _kernels.table_chi2(poles.real, h, ratio, *problem._t_kernel)
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
    compiled = _kernels.table_chi2(poles.real, h, ratio, *problem._t_kernel)
    plain = problem._table_chi2_numpy(poles, h, ratio)
    assert np.isnan(compiled[1]) and np.isnan(plain[1])
    assert np.isnan(compiled[2]) and np.isnan(plain[2])
    np.testing.assert_allclose(compiled[[0, 3]], plain[[0, 3]], rtol=REL, atol=0)


def test_the_switch_chooses_the_path(monkeypatch, switch):
    # common practice, no published source: POLKIT_COMPILED=0 (or use_compiled(False))
    # leaves the kernel unused, so the equivalence checks above compare two paths
    problem, x_true = invented_problem(1, "emission", 2, seed=9)
    calls = []
    kernel = _kernels.table_chi2

    def spy(*args):
        calls.append(1)
        return kernel(*args)

    monkeypatch.setattr(_kernels, "table_chi2", spy)
    theta = x_true[None]
    switch(None)
    monkeypatch.setenv(_kernels.ENV_SWITCH, "0")
    problem.table_log_likelihood(theta)
    assert calls == []
    monkeypatch.delenv(_kernels.ENV_SWITCH)
    problem.table_log_likelihood(theta)
    assert calls == [1]
    switch(False)
    problem.table_log_likelihood(theta)
    assert calls == [1]
