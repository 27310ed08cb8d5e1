"""Compiled kernels of the peak-table likelihood (numba), each with a numpy reference.

The peak-table likelihood (``DispersionProblem.table_log_likelihood``) has a kernel of
its own, :func:`table_chi2`: given the branch poles and residue ratios of every walker
(computed in numpy by :func:`polkit.models.spectral.branch_poles`), it matches the table
peaks to branches and sums the Gaussian chi-square in one pass, instead of a dozen numpy
operations on small ``(W, A, P, K)`` arrays whose cost is call overhead, not arithmetic.
For one exciton (two branches) :func:`two_mode_table_chi2` goes further and starts from
the sampled parameters: cavity energy, closed-form poles and photon residues per walker and
angle (the formulas of :func:`polkit.models.dispersion.cavity_energy`,
:func:`polkit.models.dispersion.two_mode_eigenvalues` and ``spectral._poles_flat``, the
numpy functions that stay their reference), then the same chi-square, in one compiled call
without intermediate arrays.

These kernels keep strict IEEE arithmetic (no fastmath): they give the same numbers as
the numpy peak-table path.  Whether they are used follows the switch of
:mod:`polkit.numerics.kernels` (:func:`~polkit.numerics.kernels.enabled`); the caller asks
it.
"""

from __future__ import annotations

import cmath
import math

import numpy as np

from polkit.numerics.kernels import _f64, _numba

__all__ = [
    "table_chi2",
    "table_chi2_prepared",
    "TWO_MODE_PARAMETERS",
    "in_plane_terms",
    "parameter_map",
    "table_operands",
    "two_mode_poles",
    "two_mode_table_chi2",
]


# --------------------------------------------------------------------------------------
# kernels (numba compiles them on first use and caches the machine code on disk)
# --------------------------------------------------------------------------------------
def _peak_term(e, de, pos, w_ok, wr, wd, h):
    """One peak against one branch: ``((e - pos) / de)^2 + [w_ok] ((wr - 2 h) / wd)^2``."""
    r = (e - pos) / de
    term = r * r
    if w_ok:
        q = (wr - 2.0 * h) / wd
        term += q * q
    return term


def _table_walker_chi2(pr, h, ratio, t_e, t_de, t_wr, t_wd, t_w_ok, t_own, t_resp, t_all,
                       t_found, has_resp):
    """Peak-table chi-square of one walker: peaks matched to branches, Gaussian terms summed.

    ``pr``, ``h`` and ``ratio`` are the walker's ``(A, K)`` rows.  The same arithmetic as the
    numpy path of ``DispersionProblem.table_log_likelihood``.  Peak ``p`` at angle ``a``
    compared with branch ``k`` contributes::

        ((e - pos) / de)^2 + [w_ok] ((wr - 2 h) / wd)^2

    with ``pos = Re eps - h beta`` (no response table) or ``Re eps + R[a, p, p] beta``
    (``beta`` the residue ratio of branch ``k``).  Where every branch is found at an angle
    and the table has one column per branch, peak ``p`` is branch ``p``, and with a
    response table its centre carries the joint response ``sum_k R[a, p, k] beta_k``;
    elsewhere each found peak takes the branch with the smallest term (NaN if any term is
    NaN, as ``numpy.min``).  Peaks not found contribute nothing.
    """
    n_a, n_k = pr.shape
    n_p = t_e.shape[1]
    ordered_ok = n_p == n_k
    acc = 0.0
    for a in range(n_a):
        ordered = ordered_ok and t_all[a]
        for p in range(n_p):
            if not t_found[a, p]:
                continue
            e = t_e[a, p]
            de = t_de[a, p]
            if ordered:
                if has_resp:
                    shift = 0.0
                    for k in range(n_k):
                        shift += t_resp[a, p, k] * ratio[a, k]
                    pos = pr[a, p] + shift
                else:
                    pos = pr[a, p] - h[a, p] * ratio[a, p]
                term = _peak_term(e, de, pos, t_w_ok[a, p], t_wr[a, p], t_wd[a, p], h[a, p])
            else:
                term = np.inf
                for k in range(n_k):
                    if has_resp:
                        pos = pr[a, k] + t_own[a, p] * ratio[a, k]
                    else:
                        pos = pr[a, k] - h[a, k] * ratio[a, k]
                    v = _peak_term(e, de, pos, t_w_ok[a, p], t_wr[a, p], t_wd[a, p], h[a, k])
                    if v != v:  # NaN wins, as in numpy.min
                        term = v
                        break
                    if v < term:
                        term = v
            acc += term
    return acc


def _table_chi2(pr, h, ratio, t_e, t_de, t_wr, t_wd, t_w_ok, t_own, t_resp, t_all, t_found,
                has_resp, chi2_out):
    """Peak-table chi-square per walker from branch poles given as ``(W, A, K)`` arrays."""
    for w in range(pr.shape[0]):
        chi2_out[w] = _table_walker_chi2(pr[w], h[w], ratio[w], t_e, t_de, t_wr, t_wd, t_w_ok,
                                         t_own, t_resp, t_all, t_found, has_resp)


def _two_mode_rows(ec0, n_eff, e_x, g, gamma_c, gamma_x, grid, k_axis, pr, h, rr, ri):
    """Branch poles and photon residues of one walker, one exciton, along the in-plane axis.

    Fills the ``(A, 2)`` rows ``pr = Re eps``, ``h = -Im eps`` and ``rr + i ri = r`` (lower,
    upper branch).  The numpy functions it mirrors stay the reference (the tests hold the
    two together):

    * :func:`polkit.models.dispersion.cavity_energy`, operation for operation:
      ``E_C = E_C0 / sqrt(1 - s2 / n^2)`` with ``grid = s2 = sin^2(angle)`` (angle axis), or
      ``E_C = sqrt(E_C0^2 + (q / n)^2)`` with ``grid = q = hbar c k`` in eV (k axis);
    * :func:`polkit.models.dispersion.two_mode_eigenvalues`, operation for operation:
      ``eps = mean -/+ root``, ``mean = (E_C + E_X)/2 - i (gamma_C + gamma_X)/4``, ``root``
      the principal square root (``cmath.sqrt``, real part >= 0) of ``g^2 + half^2``,
      ``half = (E_C - E_X)/2 - i (gamma_C - gamma_X)/4``.  A zero imaginary part of the
      radicand is +0, as numpy's complex addition of ``g^2 + 0j`` leaves it, so below the
      exceptional point at zero detuning the lower label goes to the broader pole there too;
    * the photon residues of :func:`polkit.models.spectral.branch_poles`,
      ``r_lo = (eps_lo - E_X + i gamma_X/2) / (eps_lo - eps_up)`` and ``r_up = 1 - r_lo``,
      in the equal form ``r_lo = (root - half) / (2 root)``, ``r_up = (root + half) /
      (2 root)``, where whichever of ``root -/+ half`` is the smaller comes from
      ``(root - half)(root + half) = g^2``.  The numpy form subtracts energies of order
      1 eV to get the residue of an exciton-like branch, which loses about
      ``u |eps| / |eps_up - eps_lo|`` (u = 2^-53); at ``g = 0`` it is all rounding and
      ``Im r / Re r`` becomes noise, while here the residues of uncoupled modes are
      exactly 0 and 1.
    """
    mean_i = 0.0 - 0.25 * (gamma_c + gamma_x)
    half_i = 0.5 * (0.0 - 0.5 * (gamma_c - gamma_x))
    half_i2 = half_i * half_i
    gg = g * g
    nn = n_eff * n_eff
    for a in range(grid.size):
        if k_axis:
            q = grid[a] / n_eff
            ec = math.sqrt(ec0 * ec0 + q * q)
        else:
            ec = ec0 / math.sqrt(1.0 - grid[a] / nn)
        mean_r = 0.5 * (ec + e_x)
        half_r = 0.5 * (ec - e_x)
        z_r = gg + (half_r * half_r - half_i2)
        z_i = 0.0 + (half_r * half_i + half_i * half_r)  # -0 becomes +0, as in numpy
        root = cmath.sqrt(complex(z_r, z_i))
        lo_r = mean_r - root.real
        lo_i = mean_i - root.imag
        up_r = mean_r + root.real
        up_i = mean_i + root.imag
        pr[a, 0] = lo_r
        pr[a, 1] = up_r
        h[a, 0] = -lo_i
        h[a, 1] = -up_i
        # photon residues r_lo = (root - half) / (2 root), r_up = (root + half) / (2 root)
        # (= (lo - x) / (lo - up) and 1 - r_lo); the factor of the two that cancels is
        # taken from (root - half)(root + half) = g^2 instead
        m_r = root.real - half_r
        m_i = root.imag - half_i
        p_r = root.real + half_r
        p_i = root.imag + half_i
        p2 = p_r * p_r + p_i * p_i
        m2 = m_r * m_r + m_i * m_i
        if p2 >= m2:  # m = g^2 / p = g^2 conj(p) / |p|^2
            f = gg / p2
            m_r = f * p_r
            m_i = -f * p_i
        else:
            f = gg / m2
            p_r = f * m_r
            p_i = -f * m_i
        # 1 / (2 root) = conj(root) / (2 |root|^2); inf or nan at root = 0, as numpy's
        f = 0.5 / (root.real * root.real + root.imag * root.imag)
        inv_r = f * root.real
        inv_i = -f * root.imag
        rr[a, 0] = m_r * inv_r - m_i * inv_i
        ri[a, 0] = m_r * inv_i + m_i * inv_r
        rr[a, 1] = p_r * inv_r - p_i * inv_i
        ri[a, 1] = p_r * inv_i + p_i * inv_r


def _walker_physics(theta, w, columns, scales, phys):
    """Physics parameters of walker ``w``: ``theta[w, columns[j]] * scales[j]`` (0 if -1)."""
    for j in range(columns.size):
        c = columns[j]
        phys[j] = theta[w, c] * scales[j] if c >= 0 else 0.0


def _in_domain(phys, n_eff_limit):
    """The checks of ``spectral._check_physics``: g >= 0, levels and widths > 0, n_eff > limit.

    ``phys`` is ``(e_c0, n_eff, e_x, g, gamma_c, gamma_x)``; NaN fails every test.
    """
    return (phys[3] >= 0.0 and phys[0] > 0.0 and phys[2] > 0.0 and phys[4] > 0.0
            and phys[5] > 0.0 and phys[1] > n_eff_limit)


def _two_mode_poles(theta, columns, scales, grid, k_axis, pr, h, rr, ri):
    """Poles and residues of every walker, ``(W, A, 2)`` arrays (for the tests)."""
    phys = np.empty(6)
    for w in range(theta.shape[0]):
        _walker_physics(theta, w, columns, scales, phys)
        _two_mode_rows(phys[0], phys[1], phys[2], phys[3], phys[4], phys[5], grid, k_axis,
                       pr[w], h[w], rr[w], ri[w])


def _two_mode_table(theta, columns, scales, grid, k_axis, n_eff_limit, t_e, t_de, t_wr, t_wd,
                    t_w_ok, t_own, t_resp, t_all, t_found, has_resp, chi2_out):
    """Peak-table chi-square per walker for one exciton, from the sampled parameters.

    Per walker: the physics columns, the domain test (a walker outside it gets NaN and is
    counted; the caller then takes the numpy path, which raises), the branch rows of
    :func:`_two_mode_rows` and the chi-square of :func:`_table_walker_chi2`.  Returns the
    number of walkers outside the domain.
    """
    n_a = grid.size
    pr = np.empty((n_a, 2))
    h = np.empty((n_a, 2))
    rr = np.empty((n_a, 2))
    ri = np.empty((n_a, 2))
    ratio = np.empty((n_a, 2))
    phys = np.empty(6)
    outside = 0
    for w in range(theta.shape[0]):
        _walker_physics(theta, w, columns, scales, phys)
        if not _in_domain(phys, n_eff_limit):
            outside += 1
            chi2_out[w] = np.nan
            continue
        _two_mode_rows(phys[0], phys[1], phys[2], phys[3], phys[4], phys[5], grid, k_axis,
                       pr, h, rr, ri)
        for a in range(n_a):
            for k in range(2):
                # Im r / Re r where Re r > 0, else 0 (numpy.divide with where=)
                ratio[a, k] = ri[a, k] / rr[a, k] if rr[a, k] > 0.0 else 0.0
        chi2_out[w] = _table_walker_chi2(pr, h, ratio, t_e, t_de, t_wr, t_wd, t_w_ok, t_own,
                                         t_resp, t_all, t_found, has_resp)
    return outside


if _numba is not None:
    # the peak-table helpers keep strict IEEE arithmetic (no fastmath)
    _strict = _numba.njit(cache=True, error_model="numpy")
    _peak_term = _strict(_peak_term)
    _table_walker_chi2 = _strict(_table_walker_chi2)
    _two_mode_rows = _strict(_two_mode_rows)
    _walker_physics = _strict(_walker_physics)
    _in_domain = _strict(_in_domain)
    _KERNELS = {
        # strict IEEE arithmetic too: the same numbers as the numpy peak-table path
        "table": _strict(_table_chi2),
        "two_mode_poles": _strict(_two_mode_poles),
        "two_mode_table": _strict(_two_mode_table),
    }
else:  # pragma: no cover - only where numba does not import
    _KERNELS = {}


def _flag(a) -> np.ndarray:
    """``a`` as a C-contiguous boolean array."""
    if type(a) is np.ndarray and a.dtype == np.bool_ and a.flags.c_contiguous:
        return a
    return np.array(a, dtype=np.bool_, order="C")


def table_chi2(pole_energy, half_width, residue_ratio, table_energy, table_energy_error,
               table_width, table_width_error, width_ok, own_response, response, all_found,
               found) -> np.ndarray:
    """Chi-square of a peak table against the branches of every walker, shape ``(W,)``.

    Each found peak is compared with a branch through its centre and width::

        chi2 = sum_(a, p found) ((e - pos) / de)^2 + [width_ok] ((wr - 2 h) / wd)^2

    ``pos = Re eps - h beta`` without a response table, ``Re eps + R[a, p, p] beta`` with
    one, ``beta = Im r / Re r`` the branch's residue ratio.  Where every branch is found at
    an angle (``all_found``) and the table has one column per branch, peak ``p`` is matched
    to branch ``p`` (with the joint centre ``Re eps_p + sum_k R[a, p, k] beta_k`` when
    ``response`` is given); elsewhere each peak takes the branch that gives the smallest
    term.

    Parameters
    ----------
    pole_energy, half_width, residue_ratio
        ``Re eps`` (eV), ``h = -Im eps`` (eV) and ``Im r / Re r`` (0 where ``Re r <= 0``)
        of the branches, shape ``(W, A, K)``, branches in energy order.
    table_energy, table_energy_error
        Peak centres and their standard errors (eV), shape ``(A, P)``; only the entries
        where ``found`` is true are read.
    table_width, table_width_error, width_ok
        Peak FWHM and its standard error (eV), and where the width is usable, ``(A, P)``.
    own_response, response
        ``R[a, p, p]`` as ``(A, P)`` and ``R`` as ``(A, P, P)`` (eV per unit ``beta``; see
        ``dispersion_model.table_centre_response``), or both None for the first-order
        centre of a uniform-weight fit.
    all_found, found
        ``(A,)``: every branch found at that angle; ``(A, P)``: the peak was found.

    Returns
    -------
    ndarray
        Chi-square per walker (NaN where a compared branch was NaN).
    """
    operands = table_operands(table_energy, table_energy_error, table_width,
                              table_width_error, width_ok, own_response, response, all_found,
                              found)
    return table_chi2_prepared(pole_energy, half_width, residue_ratio, operands)


def table_chi2_prepared(pole_energy, half_width, residue_ratio, operands) -> np.ndarray:
    """:func:`table_chi2` with the table side already converted by :func:`table_operands`.

    For a likelihood called thousands of times per fit: the table is converted once.
    """
    pole_energy = _f64(pole_energy)
    chi2 = np.empty(pole_energy.shape[0])
    _KERNELS["table"](pole_energy, _f64(half_width), _f64(residue_ratio), *operands, chi2)
    return chi2


# --------------------------------------------------------------------------------------
# peak table, one exciton: from the sampled parameters to the chi-square in one call
# --------------------------------------------------------------------------------------
#: order of the physics parameters the one-exciton kernels read from ``theta``
TWO_MODE_PARAMETERS = ("e_c0", "n_eff", "e_x", "g", "gamma_c", "gamma_x")


def in_plane_terms(in_plane, axis: str) -> tuple[np.ndarray, bool, float]:
    """What the one-exciton kernels need of the in-plane axis, computed once per fit.

    Parameters
    ----------
    in_plane
        1-D angle (degree) or k (1/um) axis.
    axis
        ``"angle"`` or ``"k"``.

    Returns
    -------
    grid : ndarray
        ``sin^2(angle)`` per angle (angle axis), or ``hbar c k`` in eV (k axis), computed as
        :func:`polkit.models.dispersion.cavity_energy` computes them.
    k_axis : bool
        True for the k axis.
    n_eff_limit : float
        ``max |sin(angle)|`` (0 on the k axis or an empty axis): ``n_eff`` must exceed it,
        the test of ``spectral._check_physics``.
    """
    from polkit.constants import HBARC_EV_UM

    x = np.asarray(in_plane, dtype=float)
    if axis == "angle":
        s = np.sin(np.deg2rad(x))
        limit = float(np.abs(s).max()) if x.size else 0.0
        return np.ascontiguousarray(s * s), False, limit
    if axis == "k":
        return np.ascontiguousarray(HBARC_EV_UM * x), True, 0.0
    raise ValueError(f"expected axis 'angle' or 'k', found {axis!r}")


def table_operands(table_energy, table_energy_error, table_width, table_width_error,
                   width_ok, own_response, response, all_found, found) -> tuple:
    """The table side of the peak-table kernels, converted once per fit.

    Arguments as in :func:`table_chi2`; the result is passed whole to
    :func:`two_mode_table_chi2` (an absent response table becomes zeros and a flag).
    """
    table_energy = _f64(table_energy)
    n_a, n_p = table_energy.shape
    has_resp = response is not None
    if has_resp:
        own = _f64(own_response)
        resp = _f64(response)
    else:
        own = np.zeros((n_a, n_p))
        resp = np.zeros((n_a, n_p, n_p))
    return (table_energy, _f64(table_energy_error), _f64(table_width),
            _f64(table_width_error), _flag(width_ok), own, resp, _flag(all_found),
            _flag(found), has_resp)


def parameter_map(columns, scales, n_parameters: int) -> tuple[np.ndarray, np.ndarray, int]:
    """How the one-exciton kernels read the physics from ``theta``, checked once per fit.

    Parameters
    ----------
    columns
        For each of :data:`TWO_MODE_PARAMETERS` (``e_c0``, ``n_eff``, ``e_x``, ``g``,
        ``gamma_c``, ``gamma_x``) its column of ``theta``, or -1 for the value 0 (``g`` of
        the uncoupled-modes model).
    scales
        The factor that turns each column into eV (1 for ``n_eff``; ``0.5e-3`` turns a
        Rabi splitting in meV into ``g`` in eV).
    n_parameters
        Number of columns of ``theta``.

    Returns
    -------
    tuple
        ``(columns int64 (6,), scales float64 (6,), n_parameters)`` for
        :func:`two_mode_poles` and :func:`two_mode_table_chi2`.
    """
    columns = np.array(columns, dtype=np.int64)
    scales = np.array(scales, dtype=np.float64)
    n = len(TWO_MODE_PARAMETERS)
    if (columns.shape != (n,) or scales.shape != (n,) or columns.min() < -1
            or columns.max() >= n_parameters):
        raise ValueError(f"expected {n} column indices in [-1, {n_parameters}) and {n} scales, "
                         f"in the order {TWO_MODE_PARAMETERS}; found {columns!r}, {scales!r}")
    return columns, scales, int(n_parameters)


def _theta(theta, n_parameters: int) -> np.ndarray:
    theta = _f64(theta)
    if theta.ndim != 2 or theta.shape[1] != n_parameters:
        raise ValueError(f"expected theta of shape (W, {n_parameters}), found {theta.shape}")
    return theta


def two_mode_poles(theta, parameters, axis_terms) -> tuple[np.ndarray, np.ndarray]:
    """Branch poles and photon residues of one exciton from the sampled parameters, compiled.

    The compiled counterpart of :func:`polkit.models.spectral.branch_poles` for one
    exciton (cavity energy of :func:`polkit.models.dispersion.cavity_energy`, closed-form
    poles of :func:`polkit.models.dispersion.two_mode_eigenvalues`, residues
    ``r_lo = (eps_lo - E_X + i gamma_X/2) / (eps_lo - eps_up)``, ``r_up = 1 - r_lo``), the
    kernel that :func:`two_mode_table_chi2` runs (residues in a form without cancellation,
    see ``_two_mode_rows``); no domain check.

    Parameters
    ----------
    theta
        Sampled parameters ``(W, P)``.
    parameters
        ``(columns, scales, P)`` from :func:`parameter_map`: physics value ``j`` (order
        :data:`TWO_MODE_PARAMETERS`) is ``theta[:, columns[j]] * scales[j]``.
    axis_terms
        ``(grid, k_axis, n_eff_limit)`` from :func:`in_plane_terms`.

    Returns
    -------
    poles, residues : ndarray of complex, shape ``(W, A, 2)``
        Lower and upper branch (``Re`` eV, ``-2 Im`` the FWHM in eV).
    """
    columns, scales, n_parameters = parameters
    theta = _theta(theta, n_parameters)
    grid, k_axis, _ = axis_terms
    shape = (theta.shape[0], grid.size, 2)
    pr, h, rr, ri = (np.empty(shape) for _ in range(4))
    _KERNELS["two_mode_poles"](theta, columns, scales, _f64(grid), bool(k_axis), pr, h, rr, ri)
    return pr - 1j * h, rr + 1j * ri


def two_mode_table_chi2(theta, parameters, axis_terms, operands) -> tuple[np.ndarray, int]:
    """Peak-table chi-square per walker for one exciton, from ``theta`` in one compiled call.

    Per walker and in-plane point: the cavity energy, the two complex poles and the photon
    residues (as :func:`two_mode_poles`), then the matching and the chi-square of
    :func:`table_chi2`.  A walker outside the model's domain (``g < 0``, a level or width
    ``<= 0``, ``n_eff <= max |sin(angle)|``, or NaN) gets NaN and is counted, so the caller
    can rerun the numpy path, which names the offending parameter.

    Parameters
    ----------
    theta, parameters, axis_terms
        As in :func:`two_mode_poles`.
    operands
        The table side, from :func:`table_operands`.

    Returns
    -------
    chi2 : ndarray
        ``(W,)`` chi-square (NaN for the walkers outside the domain).
    outside : int
        Number of walkers outside the domain.
    """
    columns, scales, n_parameters = parameters
    theta = _theta(theta, n_parameters)
    chi2 = np.empty(theta.shape[0])
    grid, k_axis, limit = axis_terms
    outside = _KERNELS["two_mode_table"](theta, columns, scales, grid, k_axis, limit,
                                         *operands, chi2)
    return chi2, int(outside)
