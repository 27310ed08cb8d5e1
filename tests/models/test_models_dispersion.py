"""Checks of polkit.models.dispersion against closed forms, CODATA and independent solvers."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import constants

from polkit.errors import DataError
from polkit.models.dispersion import (
    angle_to_k,
    cavity_energy,
    cavity_energy_parabolic,
    coupled_modes,
    hopfield_fractions,
    k_to_angle,
    lifetime_ps,
    lp_effective_mass,
    photon_mass,
    quality_factor,
    two_mode_eigenvalues,
)

# Invented sample-like numbers (eV), not a real device.
E_X = 1.530
G = 0.0017  # Rabi splitting 3.4 meV


def hamiltonian(e_c, e_x, g, gamma_c, gamma_x):
    return np.array([[e_c - 0.5j * gamma_c, g], [g, e_x - 0.5j * gamma_x]])


# ---------------------------------------------------------------- cavity dispersion
def test_angle_and_k_forms_agree():
    # Source: planar cavity, k = E sin(theta) / (hbar c) (CODATA via scipy.constants)
    angles = np.linspace(0.0, 40.0, 9)
    e_c = cavity_energy(1.52, 3.3, angle_deg=angles)
    k = e_c * np.sin(np.deg2rad(angles)) * constants.e / (constants.hbar * constants.c) * 1e-6
    np.testing.assert_allclose(cavity_energy(1.52, 3.3, k=k), e_c, rtol=1e-13)


def test_angle_to_k_constant_and_round_trip():
    # Source: CODATA via scipy.constants; k[1/um] = 5.0677 E[eV] sin(theta) (value from memory)
    per_ev = constants.e / (constants.hbar * constants.c) * 1e-6
    assert angle_to_k(90.0, 1.0) == pytest.approx(per_ev, rel=1e-12)
    assert per_ev == pytest.approx(5.0677, abs=1e-4)  # value from memory
    angles = np.linspace(-60, 60, 13)
    np.testing.assert_allclose(k_to_angle(angle_to_k(angles, 1.5), 1.5), angles, atol=1e-11)


def test_k_outside_light_cone_is_refused():
    with pytest.raises(DataError, match="light cone"):
        k_to_angle(np.array([1.0, 9.0]), 1.5)


def test_cavity_energy_needs_exactly_one_axis():
    with pytest.raises(DataError, match="exactly one"):
        cavity_energy(1.5, 3.3)
    with pytest.raises(DataError, match="both"):
        cavity_energy(1.5, 3.3, angle_deg=1.0, k=1.0)


def test_photon_mass_matches_codata():
    # Source: m_C = E_C0 n_eff^2 / c^2 (Kavokin et al., Microcavities, 2nd ed., 2017), CODATA via
    # scipy.constants
    e_c0, n_eff = 1.527, 3.35
    expected = e_c0 * constants.e * n_eff**2 / constants.c**2 / constants.m_e
    assert photon_mass(e_c0, n_eff) == pytest.approx(expected, rel=1e-12)


def test_curvature_of_exact_dispersion_is_photon_mass():
    # Source: E = hbar^2 k^2 / (2 m) near k = 0, CODATA via scipy.constants; the
    # second difference of the exact form is an independent route to the mass
    e_c0, n_eff = 1.527, 3.35
    dk = 1e-2  # 1/um
    e = cavity_energy(e_c0, n_eff, k=np.array([-dk, 0.0, dk]))
    curvature = (e[0] - 2 * e[1] + e[2]) / dk**2  # eV um^2
    hbar2 = (constants.hbar**2 / constants.e) * 1e12  # eV um^2 kg
    mass = hbar2 / curvature / constants.m_e
    assert mass == pytest.approx(photon_mass(e_c0, n_eff), rel=1e-6)


def test_parabolic_limit_agrees_at_small_k():
    # Source: Taylor expansion sqrt(1 + x^2) = 1 + x^2/2 - x^4/8 + O(x^6)
    e_c0, n_eff = 1.527, 3.35
    k = np.array([0.05, 0.1, 0.2])
    x = constants.hbar * constants.c / constants.e * 1e6 * k / n_eff / e_c0
    diff = cavity_energy(e_c0, n_eff, k=k) - cavity_energy_parabolic(e_c0, n_eff, k=k)
    np.testing.assert_allclose(diff, -e_c0 * x**4 / 8, rtol=1e-3)
    s = np.sin(np.deg2rad(np.array([0.5, 1.0, 2.0]))) / n_eff
    diff = (cavity_energy(e_c0, n_eff, angle_deg=[0.5, 1.0, 2.0])
            - cavity_energy_parabolic(e_c0, n_eff, angle_deg=[0.5, 1.0, 2.0]))
    np.testing.assert_allclose(diff, e_c0 * 3 * s**4 / 8, rtol=1e-3)  # (1-s^2)^-1/2 series


# ---------------------------------------------------------------- two coupled modes
def test_zero_detuning_splitting_and_half_fractions():
    # Source: Hopfield, Phys. Rev. 112, 1555 (1958): at resonance the splitting is 2g
    # and both branches are half exciton, half photon
    lo, up = two_mode_eigenvalues(E_X, E_X, G)
    assert (up - lo).real == pytest.approx(2 * G, rel=1e-12)
    x2, c2 = hopfield_fractions(E_X, E_X, G)
    assert x2 == pytest.approx(0.5) and c2 == pytest.approx(0.5)


def test_hermitian_branches_match_closed_form_and_eigvalsh():
    # Source: Hopfield, Phys. Rev. 112, 1555 (1958), E = (E_C+E_X)/2 -/+ sqrt(delta^2+4g^2)/2;
    # numpy.linalg.eigvalsh as an independent solver
    e_c = np.linspace(1.50, 1.56, 31)
    lo, up = two_mode_eigenvalues(e_c, E_X, G)
    delta = e_c - E_X
    np.testing.assert_allclose(lo.real, (e_c + E_X) / 2 - np.sqrt(delta**2 + 4 * G**2) / 2,
                               rtol=0, atol=1e-14)
    np.testing.assert_allclose(lo.imag, 0.0, atol=0)
    ref = np.linalg.eigvalsh(np.stack([hamiltonian(c, E_X, G, 0, 0).real for c in e_c]))
    np.testing.assert_allclose(np.stack([lo.real, up.real], -1), ref, atol=1e-14)


def test_far_detuning_returns_bare_modes():
    # Source: second-order perturbation theory, shift g^2/|delta|
    for delta in (-0.2, 0.2):
        lo, up = two_mode_eigenvalues(E_X + delta, E_X, G, 0.0004, 0.0006)
        bare_lo, bare_up = sorted([E_X + delta, E_X])
        assert abs(lo.real - bare_lo) == pytest.approx(G**2 / abs(delta), rel=1e-3)
        assert abs(up.real - bare_up) == pytest.approx(G**2 / abs(delta), rel=1e-3)
        x2, c2 = hopfield_fractions(E_X + delta, E_X, G)
        assert (x2 if delta > 0 else c2) == pytest.approx(1.0, abs=G**2 / delta**2 * 1.01)


def test_non_hermitian_matches_eig_and_reduces_to_hermitian():
    # Source: numpy.linalg.eigvals of the 2x2 complex Hamiltonian (independent solver)
    rng = np.random.default_rng(11)
    e_c = rng.uniform(1.52, 1.54, 50)
    gc, gx = rng.uniform(0, 0.003, 50), rng.uniform(0, 0.003, 50)
    lo, up = two_mode_eigenvalues(e_c, E_X, G, gc, gx)
    ref = np.linalg.eigvals(
        np.stack([hamiltonian(c, E_X, G, a, b) for c, a, b in zip(e_c, gc, gx, strict=True)]))
    ref = np.take_along_axis(ref, np.argsort(ref.real, axis=-1), axis=-1)
    np.testing.assert_allclose(np.stack([lo, up], -1), ref, atol=1e-13)
    assert np.all(lo.real <= up.real)
    lo0, up0 = two_mode_eigenvalues(e_c, E_X, G, 0.0, 0.0)
    herm = np.linalg.eigvalsh(np.stack([hamiltonian(c, E_X, G, 0, 0).real for c in e_c]))
    np.testing.assert_allclose(np.stack([lo0, up0], -1), herm, atol=1e-14)


def test_exceptional_point():
    # Source: Savona et al., Solid State Commun. 93, 733 (1995) [mem]: at zero detuning the real
    # parts split only if
    # g > |gamma_C - gamma_X| / 4, by 2 sqrt(g^2 - (gamma_C - gamma_X)^2 / 16)
    gc, gx = 0.004, 0.0004
    g_ep = abs(gc - gx) / 4
    for g in (1.2 * g_ep, 2 * g_ep):
        lo, up = two_mode_eigenvalues(E_X, E_X, g, gc, gx)
        assert (up - lo).real == pytest.approx(2 * np.sqrt(g**2 - g_ep**2), rel=1e-10)
        assert lo.imag == pytest.approx(up.imag, rel=1e-12)  # equal widths above the EP
    for g in (0.5 * g_ep, 0.9 * g_ep):
        lo, up = two_mode_eigenvalues(E_X, E_X, g, gc, gx)
        assert (up - lo).real == pytest.approx(0.0, abs=1e-15)
        assert abs((up - lo).imag) == pytest.approx(2 * np.sqrt(g_ep**2 - g**2), rel=1e-10)


@pytest.mark.parametrize("g_over_ep", [0.5, 3.0])
def test_branch_labels_are_continuous_in_detuning(g_over_ep):
    # common practice, no published source: the real parts must not jump when the
    # detuning is scanned finely, in weak and in strong coupling (their slope stays
    # of order 1, a relabelling would jump by ~ g or ~ |gamma_C - gamma_X|)
    gc, gx = 0.003, 0.0005
    g = g_over_ep * abs(gc - gx) / 4
    e_c = np.linspace(E_X - 0.01, E_X + 0.01, 4001)
    lo, up = two_mode_eigenvalues(e_c, E_X, g, gc, gx)
    step = e_c[1] - e_c[0]
    assert np.max(np.abs(np.diff(lo.real))) < 3 * step  # step = 5 ueV, a jump >= 125 ueV
    assert np.max(np.abs(np.diff(up.real))) < 3 * step
    assert np.all(lo.real <= up.real)


@settings(max_examples=60, deadline=None)
@given(
    e_c=st.floats(1.4, 1.7), e_x=st.floats(1.4, 1.7), g=st.floats(0, 0.02),
    gc=st.floats(0, 0.01), gx=st.floats(0, 0.01),
)
def test_eigenvalues_satisfy_trace_and_determinant(e_c, e_x, g, gc, gx):
    # Source: Vieta's formulas for the characteristic polynomial of H
    lo, up = two_mode_eigenvalues(e_c, e_x, g, gc, gx)
    h = hamiltonian(e_c, e_x, g, gc, gx)
    assert abs((lo + up) - np.trace(h)) < 1e-12
    assert abs(lo * up - np.linalg.det(h)) < 1e-11
    assert lo.real <= up.real


def test_hopfield_fractions_match_eigenvectors():
    # Source: Hopfield (1958): fractions are the squared eigenvector components;
    # numpy.linalg.eigh as an independent solver
    e_c = np.linspace(1.51, 1.55, 17)
    x2, c2 = hopfield_fractions(e_c, E_X, G)
    xu, cu = hopfield_fractions(e_c, E_X, G, branch="upper")
    _, vecs = np.linalg.eigh(np.stack([hamiltonian(c, E_X, G, 0, 0).real for c in e_c]))
    np.testing.assert_allclose(c2, vecs[:, 0, 0] ** 2, atol=1e-13)
    np.testing.assert_allclose(x2, vecs[:, 1, 0] ** 2, atol=1e-13)
    np.testing.assert_allclose(cu, vecs[:, 0, 1] ** 2, atol=1e-13)
    np.testing.assert_allclose(xu, c2, atol=1e-15)
    with pytest.raises(DataError, match="upper"):
        hopfield_fractions(1.5, 1.5, G, branch="middle")


# ---------------------------------------------------------------- N coupled modes
def test_coupled_modes_one_exciton_matches_closed_form():
    # Source: closed-form two-mode eigenvalues (Hopfield, Phys. Rev. 112, 1555 (1958))
    e_c = np.linspace(1.52, 1.54, 21)[:, None]
    modes = coupled_modes(e_c, E_X, G, 0.0008, 0.0005)
    lo, up = two_mode_eigenvalues(e_c, E_X, G, 0.0008, 0.0005)
    np.testing.assert_allclose(modes.energies, np.stack([lo, up], axis=-1), atol=1e-14)
    np.testing.assert_allclose(modes.residues.sum(-1), 1.0, atol=1e-12)


def test_three_modes_reduce_to_two_when_second_coupling_vanishes():
    # Source: closed-form two-mode solution; a decoupled exciton keeps its bare energy
    e_c = np.linspace(1.50, 1.56, 25)
    e_x2 = 1.545
    modes = coupled_modes(e_c, [E_X, e_x2], [G, 0.0], 0.0008, [0.0005, 0.0007])
    lo, up = two_mode_eigenvalues(e_c, E_X, G, 0.0008, 0.0005)
    expected = np.stack([lo, up, np.full_like(lo, e_x2 - 0.00035j)], axis=-1)
    expected = np.take_along_axis(expected, np.argsort(expected.real, -1), -1)
    np.testing.assert_allclose(modes.energies, expected, atol=1e-13)
    np.testing.assert_allclose(modes.residues.sum(-1), 1.0, atol=1e-12)
    # the bare second exciton carries no photon
    bare = np.isclose(modes.energies.real, e_x2, atol=1e-12)
    np.testing.assert_allclose(modes.photon_fraction[bare], 0.0, atol=1e-20)


def test_hermitian_three_modes_fractions_and_residues():
    # Source: for a Hermitian H the photon residue equals the photon fraction, and
    # fractions sum to 1 per branch and per component (unitarity)
    e_c = np.linspace(1.50, 1.56, 13)
    modes = coupled_modes(e_c, [E_X, 1.545], [G, 0.001])
    np.testing.assert_allclose(modes.residues.imag, 0.0, atol=1e-13)
    np.testing.assert_allclose(modes.residues.real, modes.photon_fraction, atol=1e-12)
    total = modes.photon_fraction + modes.exciton_fraction.sum(axis=-2)
    np.testing.assert_allclose(total, 1.0, atol=1e-12)
    np.testing.assert_allclose(modes.photon_fraction.sum(-1), 1.0, atol=1e-12)
    ref = np.linalg.eigvalsh(np.stack([
        [[c, G, 0.001], [G, E_X, 0.0], [0.001, 0.0, 1.545]] for c in e_c]))
    np.testing.assert_allclose(modes.energies.real, ref, atol=1e-13)


def test_coupled_modes_broadcast_walkers_against_angles():
    # common practice, no published source: a (W, 1) batch against (A,) equals a loop
    w_g = np.array([0.001, 0.002, 0.003])[:, None]
    e_c = cavity_energy(1.525, 3.3, angle_deg=np.linspace(0, 20, 5))
    modes = coupled_modes(e_c, E_X, w_g, 0.0008, 0.0005)
    assert modes.energies.shape == (3, 5, 2)
    for i, g in enumerate(w_g[:, 0]):
        one = coupled_modes(e_c, E_X, g, 0.0008, 0.0005)
        np.testing.assert_allclose(modes.energies[i], one.energies, atol=1e-15)


def test_coupled_modes_refuses_mismatched_lists():
    with pytest.raises(DataError, match="one coupling"):
        coupled_modes(1.5, [1.5, 1.52], [0.001], 0.0, 0.0)


# ---------------------------------------------------------------- derived quantities
def test_lp_mass_is_branch_curvature():
    # Source: second difference of the Hermitian lower branch with the exact cavity
    # dispersion (independent of the Hopfield-weighted formula), exciton mass infinite
    e_c0, n_eff = 1.527, 3.3
    dk = 2e-2
    k = np.array([-dk, 0.0, dk])
    lo, _ = two_mode_eigenvalues(cavity_energy(e_c0, n_eff, k=k), E_X, G)
    curvature = (lo[0] - 2 * lo[1] + lo[2]).real / dk**2
    mass = (constants.hbar**2 / constants.e) * 1e12 / curvature / constants.m_e
    assert lp_effective_mass(e_c0, n_eff, E_X, G, m_x=np.inf) == pytest.approx(mass, rel=1e-4)
    # at resonance the mass doubles (|C|^2 = 1/2)
    assert lp_effective_mass(E_X, n_eff, E_X, G, m_x=np.inf) == pytest.approx(
        2 * photon_mass(E_X, n_eff), rel=1e-12)
    # a finite exciton mass changes it by ~1e-4 relative only
    assert lp_effective_mass(E_X, n_eff, E_X, G) == pytest.approx(
        2 * photon_mass(E_X, n_eff), rel=5e-4)


def test_lifetime_and_quality_factor():
    # Source: tau = hbar / gamma with CODATA hbar via scipy.constants (1 meV <-> 0.658 ps)
    hbar_mev_ps = constants.hbar / constants.e * 1e15
    assert lifetime_ps(1.0) == pytest.approx(hbar_mev_ps, rel=1e-12)
    assert lifetime_ps(1.0) == pytest.approx(0.658, abs=5e-4)  # value from memory
    # Source: Q = E / gamma
    assert quality_factor(1.5, 0.15) == pytest.approx(1.0e4, rel=1e-12)
