"""Compiled branch poles and photon residues of one cavity photon coupled to two excitons.

The three-oscillator model of :func:`polkit.models.dispersion.coupled_modes` has the
non-Hermitian matrix (eV; every ``gamma`` a FWHM)::

    H = [[c,  g1, g2],        c   = E_C  - i gamma_C  / 2
         [g1, x1, 0 ],        x_j = E_Xj - i gamma_Xj / 2
         [g2, 0,  x2]]

whose numpy path is :func:`numpy.linalg.eig` on a ``(W, A, 3, 3)`` stack, then the
inverse of the eigenvector matrix for the photon residues.  Here the same numbers come
from the characteristic polynomial, per walker and in-plane point, in one compiled loop:

* ``D(z) = det(z - H) = (z - c)(z - x1)(z - x2) - g1^2 (z - x2) - g2^2 (z - x1)``
  (expansion of the determinant along the first row).  It is written in the variable
  ``w = z - s`` about the mean diagonal ``s = (c + x1 + x2) / 3``, so every number the
  root finder handles is of the size of the splittings (meV), not of the levels (eV).
* Roots: Cardano's formula for the cubic (the cube root taken of whichever of
  ``-q/2 +- sqrt((q/2)^2 + (p/3)^3)`` is larger in modulus, so the sum does not cancel),
  then Newton steps on ``D`` evaluated in the product form above (each step kept only if
  it lowers ``|D|``), which brings every simple root to the rounding level of ``D``.
  Source: Cardano's formula, e.g. Abramowitz and Stegun, Handbook of Mathematical
  Functions (1964), 3.8.2; Newton's method, e.g. Press et al., Numerical Recipes, 3rd ed.,
  2007, section 9.4.
* Photon residues: ``G_CC(z) = 1 / (z - c - g1^2 / (z - x1) - g2^2 / (z - x2))
  = (z - x1)(z - x2) / D(z)`` (the photon entry of the resolvent ``(z - H)^-1``), so the
  residue at a simple root ``z_k`` is ``r_k = (z_k - x1)(z_k - x2) / D'(z_k)`` with
  ``D'(z) = (z - x1)(z - x2) + (z - c)(z - x2) + (z - c)(z - x1) - g1^2 - g2^2``.  For a
  monic cubic ``D'(z_k) = prod_{j != k} (z_k - z_j)``, so this equals the numpy path's
  ``V[0, k] (V^-1)[k, 0]`` for a diagonalisable ``H``.  An uncoupled exciton (``g_j = 0``)
  at ``z_k = x_j`` gets a residue of exactly 0; an exciton-like branch keeps its small
  residue's relative precision (no level of 1 eV is subtracted).
* A coupling that is exactly 0 (the lower prior bound) decouples its exciton exactly: it
  stays at ``x_j`` with residue 0, and the other two modes come from the closed-form
  two-mode pair (:func:`_pair`), so two uncoupled, degenerate excitons are exact too.
* Order: by real part (ties by imaginary part; LAPACK's order decides ties on the numpy
  path), as ``coupled_modes`` sorts.

A row where ``D'(z_k) = 0`` (an exact exceptional point, or two uncoupled modes exactly
degenerate) or where anything is not finite is flagged; the caller recomputes those rows
on the numpy path, which is the reference.  Switch: the same as :mod:`._kernels`
(``POLKIT_COMPILED=0`` or :func:`polkit.numerics.kernels.use_compiled`).
"""

from __future__ import annotations

import cmath
import math

import numpy as np

from polkit.numerics import kernels as _kernels

__all__ = ["three_mode_poles", "enabled"]

#: Newton steps at most per root (Cardano's start is already close; one step is the rule)
_NEWTON_STEPS = 2


def enabled() -> bool:
    """True if the compiled three-oscillator poles will be used (see :func:`_kernels.enabled`)."""
    return _kernels.enabled() and bool(_KERNELS)


def _char(w, a0, a1, a2, s1, s2):
    """``D`` and ``D'`` at ``w`` (shifted variable) in the product form."""
    u0 = w - a0
    u1 = w - a1
    u2 = w - a2
    f = u0 * u1 * u2 - s1 * u2 - s2 * u1
    fp = u1 * u2 + u0 * u2 + u0 * u1 - s1 - s2
    return f, fp


def _polish(w, a0, a1, a2, s1, s2):
    """Newton steps on ``D`` from ``w``; a step is kept only if it lowers ``|D|``."""
    f, fp = _char(w, a0, a1, a2, s1, s2)
    f2 = f.real * f.real + f.imag * f.imag
    for _ in range(_NEWTON_STEPS):
        if f2 == 0.0 or fp == 0.0:
            break
        step = f / fp
        wn = w - step
        fn, fpn = _char(wn, a0, a1, a2, s1, s2)
        fn2 = fn.real * fn.real + fn.imag * fn.imag
        if not fn2 < f2:
            break
        w, f, fp, f2 = wn, fn, fpn, fn2
        st2 = step.real * step.real + step.imag * step.imag
        if st2 <= 1e-30 * (w.real * w.real + w.imag * w.imag):
            break
    return w


def _sorted3(z0, z1, z2):
    """Three complex numbers by real part, ties by imaginary part."""
    if z1.real < z0.real or (z1.real == z0.real and z1.imag < z0.imag):
        z0, z1 = z1, z0
    if z2.real < z1.real or (z2.real == z1.real and z2.imag < z1.imag):
        z1, z2 = z2, z1
        if z1.real < z0.real or (z1.real == z0.real and z1.imag < z0.imag):
            z0, z1 = z1, z0
    return z0, z1, z2


def _roots(a0, a1, a2, s1, s2):
    """The three roots of ``D`` in the shifted variable (Cardano, then Newton), sorted."""
    # D(w) = w^3 + B w^2 + C w + E, then t = w + B / 3: t^3 + p t + q
    bb = -(a0 + a1 + a2)
    cc = a0 * a1 + a0 * a2 + a1 * a2 - s1 - s2
    ee = -(a0 * a1 * a2) + s1 * a2 + s2 * a1
    b3 = bb / 3.0
    p = cc - bb * b3
    q = ee - b3 * cc + 2.0 * b3 * b3 * b3
    disc = cmath.sqrt(0.25 * q * q + p * p * p / 27.0)
    m1 = -0.5 * q + disc
    m2 = -0.5 * q - disc
    big = m1 if (m1.real * m1.real + m1.imag * m1.imag
                 >= m2.real * m2.real + m2.imag * m2.imag) else m2
    if big == 0.0:  # p = q = 0: a triple root
        z0 = z1 = z2 = -b3
    else:
        u = cmath.exp(cmath.log(big) / 3.0)
        v = p / (3.0 * u)
        # the other cube roots are u omega^k, omega = exp(2 pi i / 3), and
        # p / (3 u omega^k) = v conj(omega)^k
        omega = complex(-0.5, 0.5 * math.sqrt(3.0))
        z0 = u - v - b3
        u = u * omega
        v = v * omega.conjugate()
        z1 = u - v - b3
        u = u * omega
        v = v * omega.conjugate()
        z2 = u - v - b3
    z0 = _polish(z0, a0, a1, a2, s1, s2)
    z1 = _polish(z1, a0, a1, a2, s1, s2)
    z2 = _polish(z2, a0, a1, a2, s1, s2)
    return _sorted3(z0, z1, z2)


def _pair(c, x, gg):
    """Poles and photon residues of the 2 x 2 block ``[[c, g], [g, x]]`` (``gg = g^2``).

    ``eps = (c + x)/2 -/+ root``, ``root = sqrt(g^2 + half^2)``, ``half = (c - x)/2``
    (Hopfield, Phys. Rev. 112, 1555, 1958); ``r_lo = (root - half) / (2 root)``,
    ``r_up = (root + half) / (2 root)``, the smaller of ``root -/+ half`` taken from
    ``(root - half)(root + half) = g^2`` so that no digits cancel (``r = 0`` exactly at g = 0).
    """
    mean = 0.5 * (c + x)
    half = 0.5 * (c - x)
    root = cmath.sqrt(gg + half * half)
    m = root - half
    p = root + half
    if p.real * p.real + p.imag * p.imag >= m.real * m.real + m.imag * m.imag:
        m = gg / p if gg != 0.0 else 0.0 * p
    else:
        p = gg / m
    if root == 0.0:  # an exact double pole (c = x, g = 0): left to the numpy path
        nan = complex(math.nan, math.nan)
        return mean, mean, nan, nan
    inv = 0.5 / root
    return mean - root, mean + root, m * inv, p * inv


def _sorted_pairs(z0, r0, z1, r1, z2, r2):
    """Three (pole, residue) pairs by the real part of the pole, ties by imaginary part."""
    if z1.real < z0.real or (z1.real == z0.real and z1.imag < z0.imag):
        z0, r0, z1, r1 = z1, r1, z0, r0
    if z2.real < z1.real or (z2.real == z1.real and z2.imag < z1.imag):
        z1, r1, z2, r2 = z2, r2, z1, r1
        if z1.real < z0.real or (z1.real == z0.real and z1.imag < z0.imag):
            z0, r0, z1, r1 = z1, r1, z0, r0
    return z0, r0, z1, r1, z2, r2


def _store(pr, pi, rr, ri, w, a, k, z, r):
    """Pole ``z`` and residue ``r`` into row ``(w, a)``, column ``k``; True if all are finite."""
    pr[w, a, k] = z.real
    pi[w, a, k] = z.imag
    rr[w, a, k] = r.real
    ri[w, a, k] = r.imag
    return (math.isfinite(z.real) and math.isfinite(z.imag)
            and math.isfinite(r.real) and math.isfinite(r.imag))


def _three_mode_rows(e_c, gamma_c, e_x1, e_x2, g1, g2, gamma_x1, gamma_x2, pr, pi, rr, ri,
                     bad):
    """Poles ``pr + i pi`` and photon residues ``rr + i ri``, ``(W, A, 3)``, every row.

    ``bad[w, a]`` marks the rows where a residue's denominator ``D'`` is zero or a number
    is not finite, for the numpy path; returns how many there are.
    """
    n_w, n_a = e_c.shape
    count = 0
    for w in range(n_w):
        x1 = complex(e_x1[w], -0.5 * gamma_x1[w])
        x2 = complex(e_x2[w], -0.5 * gamma_x2[w])
        hc = -0.5 * gamma_c[w]
        s1 = g1[w] * g1[w]
        s2 = g2[w] * g2[w]
        for a in range(n_a):
            c = complex(e_c[w, a], hc)
            s = (c + x1 + x2) / 3.0
            a0 = c - s
            a1 = x1 - s
            a2 = x2 - s
            if s1 == 0.0 or s2 == 0.0:
                # an uncoupled exciton stays exactly at its level with no photon weight;
                # the rest is the closed-form two-mode pair
                xf, xc, gg = (x1, x2, s2) if s1 == 0.0 else (x2, x1, s1)
                lo, up, r_lo, r_up = _pair(c, xc, gg)
                z0, q0, z1, q1, z2, q2 = _sorted_pairs(lo, r_lo, up, r_up, xf,
                                                       complex(0.0, 0.0))
                ok = True
                for k in range(3):
                    z = z0 if k == 0 else z1 if k == 1 else z2
                    r = q0 if k == 0 else q1 if k == 1 else q2
                    if not _store(pr, pi, rr, ri, w, a, k, z, r):
                        ok = False
                bad[w, a] = not ok
                if not ok:
                    count += 1
                continue
            roots = _roots(a0, a1, a2, s1, s2)
            ok = True
            for k in range(3):
                z = roots[k]
                u0 = z - a0
                u1 = z - a1
                u2 = z - a2
                num = u1 * u2
                den = num + u0 * u2 + u0 * u1 - s1 - s2
                if den == 0.0:
                    ok = False
                    r = num
                else:
                    r = num / den
                if not _store(pr, pi, rr, ri, w, a, k, s + z, r):
                    ok = False
            bad[w, a] = not ok
            if not ok:
                count += 1
    return count


if _kernels._numba is not None:
    # strict IEEE arithmetic: the root polish compares |D| values
    _strict = _kernels._numba.njit(cache=True, error_model="numpy")
    _char = _strict(_char)
    _polish = _strict(_polish)
    _sorted3 = _strict(_sorted3)
    _roots = _strict(_roots)
    _pair = _strict(_pair)
    _sorted_pairs = _strict(_sorted_pairs)
    _store = _strict(_store)
    _KERNELS = {"three_mode": _strict(_three_mode_rows)}
else:  # pragma: no cover - only where numba does not import
    _KERNELS = {}


def _column(v, n_w: int) -> np.ndarray:
    a = np.asarray(v, dtype=np.float64)
    if a.shape != (n_w,):
        a = np.broadcast_to(a, (n_w,))
    return np.ascontiguousarray(a)


def three_mode_poles(e_c, gamma_c, e_x, g, gamma_x) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Branch poles and photon residues of one photon and two excitons, compiled.

    Parameters
    ----------
    e_c
        Cavity energy per walker and in-plane point, eV, shape ``(W, A)``.
    gamma_c
        Cavity FWHM per walker, eV, shape ``(W,)`` (or broadcastable).
    e_x, g, gamma_x
        Pairs ``(first, second)`` of exciton energies, couplings and FWHMs per walker, eV.

    Returns
    -------
    poles, residues : ndarray of complex, shape ``(W, A, 3)``
        Sorted by real part.
    bad : ndarray of bool, shape ``(W, A)``
        Rows the compiled path could not finish (a zero ``D'`` or a number not finite);
        their entries are to be recomputed on the numpy path.
    """
    e_c = np.ascontiguousarray(e_c, dtype=np.float64)
    n_w, n_a = e_c.shape
    cols = [_column(v, n_w) for v in (gamma_c, e_x[0], e_x[1], g[0], g[1], gamma_x[0],
                                      gamma_x[1])]
    pr, pi, rr, ri = (np.empty((n_w, n_a, 3)) for _ in range(4))
    bad = np.empty((n_w, n_a), dtype=np.bool_)
    gc, x1, x2, c1, c2, w1, w2 = cols
    _KERNELS["three_mode"](e_c, gc, x1, x2, c1, c2, w1, w2, pr, pi, rr, ri, bad)
    poles = pr + 1j * pi
    residues = rr + 1j * ri
    return poles, residues, bad
