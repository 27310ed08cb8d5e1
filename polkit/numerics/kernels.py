"""Compiled, fused kernels for the whole-map variable projection (numba), with a numpy fallback.

Unrolled on purpose: ``_lorentz2`` and ``_lorentz3`` repeat the general loop of
``_lorentz`` written out for two and three branches, and the Gram kernels repeat the line
formula rather than call a shared helper.  That repetition is the point of this module:
it keeps every sum of a row in a register and the per-pixel loops free of calls, which is
where the speed of the hot path comes from (and the compiled arithmetic, fixed by the
tests, stays exactly as it is).  Do not fold it back into loops or helpers.  The solve,
which runs once per row rather than per pixel and keeps strict IEEE arithmetic, is
written in steps.

The hot path of a whole-map fit is :func:`polkit.numerics.projection.project_linear` on a
lazily evaluated :class:`~polkit.numerics.projection.MapBasis`: for every walker ``w`` and
in-plane point ``a`` it needs the weighted Gram blocks::

    G[w, a, k, l] = sum_E s(E)^2 B_k(E) B_l(E)          (basis x basis)
    H[w, a, k, j] = sum_E s(E) B_k(E) R_j(E)            (basis x [background, data])

with ``s = sqrt(weight)`` and ``R = s * [background columns, y]`` (the prepared map).  The
kernels evaluate the basis of one ``(w, a)`` row and accumulate the sums in the same pass
over the energy axis (for two or three branches and a constant background every sum
stays in a register; otherwise the row's ``K x E`` values go through a buffer of a few
kB that stays in the level-1 cache): no ``W x A x K x E`` array is ever formed, and the
data row of an angle is reused by every walker while it is in cache (angles outer,
walkers inner).

Three basis families are covered, the same formulas as the numpy blocks of
:mod:`polkit.models.spectral` (pole form, eV throughout):

* ``lorentz``: ``B_k = (ah_k - b_k u) / (u^2 + h2_k)``, ``u = E - x_k`` (branch lines of
  the Lorentzian model, emission);
* ``disorder``: those lines rescaled by ``A_C^sigma / sum_k B_k`` with
  ``A_C^sigma = -Im[1 / (base(E) - E_C)] / pi`` (emission with Gaussian exciton disorder;
  ``base`` is the walker's self-energy row, computed in numpy with the Faddeeva function);
* ``reflectance``: ``|1 - i kappa / (base(E) - E_C)|^2`` (one column).

The peak-table likelihood has kernels of its own, in :mod:`polkit.numerics.table_kernels`
(they share the switch below).

Switch: the compiled path is used when numba imports and the environment variable
``POLKIT_COMPILED`` is not ``0``; :func:`use_compiled` switches it at run time (tests run
both paths).  The kernels run on one thread: on a shared two-core machine (load about 3)
numba's parallel loops (threading layer GNU OpenMP) made the 32 walkers x 80 x 600
benchmark call about four times slower (8 ms against 2 ms), and a wafer survey already
runs one fit per core.
"""

from __future__ import annotations

import logging
import os

import numpy as np

__all__ = [
    "ENV_SWITCH",
    "available",
    "enabled",
    "use_compiled",
    "gram_lorentz",
    "gram_disorder",
    "gram_reflectance",
    "solve_rows",
    "MAX_SOLVE_COLUMNS",
]

logger = logging.getLogger(__name__)

#: environment variable: ``0`` forces the numpy path
ENV_SWITCH = "POLKIT_COMPILED"

_state: dict = {"forced": None}


def available() -> bool:
    """True if numba imports on this machine (else the reason is logged once at INFO)."""
    if _numba is None and not _state.get("logged"):
        _state["logged"] = True
        logger.info("numba unavailable (%s); the numpy projection path is used", _IMPORT_ERROR)
    return _numba is not None


def enabled() -> bool:
    """True if the compiled kernels will be used (whole-map projection and peak table).

    Order: :func:`use_compiled` if it was called, else ``POLKIT_COMPILED`` (``0`` means no),
    and in any case only if numba imports.
    """
    forced = _state["forced"]
    wanted = forced if forced is not None else os.environ.get(ENV_SWITCH, "1").strip() != "0"
    return bool(wanted) and available()


def use_compiled(flag: bool | None) -> bool | None:
    """Force the compiled path on (``True``) or off (``False``); ``None`` follows the environment.

    Returns the previous setting, so a caller can restore it.
    """
    previous = _state["forced"]
    _state["forced"] = None if flag is None else bool(flag)
    return previous


# --------------------------------------------------------------------------------------
# kernels (numba compiles them on first use and caches the machine code on disk)
# --------------------------------------------------------------------------------------
#: floating-point freedoms given to the compiler: reassociation (vectorised sums) and
#: fused multiply-add; NaN and infinity semantics are kept (a broken basis must give NaN)
_FASTMATH = {"reassoc", "contract", "nsz"}

try:
    import numba as _numba
except Exception as _exc:  # ImportError, or a broken llvmlite/numpy pairing
    _numba = None
    _IMPORT_ERROR = repr(_exc)
else:
    _IMPORT_ERROR = ""


def _lorentz2(en, xr, h2, ah, b, sw, rhs, g, c):
    """Two branches and one background column, in one pass.

    The common case (one exciton, constant background) with every sum in a register.
    """
    n_w, n_a = xr.shape[0], xr.shape[1]
    n_e = en.size
    for row in range(n_w * n_a):
        a = row // n_w  # angles outer: the data row of an angle stays in cache
        w = row - a * n_w
        x0, x1 = xr[w, a, 0], xr[w, a, 1]
        d0, d1 = h2[w, a, 0], h2[w, a, 1]
        p0, p1 = ah[w, a, 0], ah[w, a, 1]
        q0, q1 = b[w, a, 0], b[w, a, 1]
        s00 = s01 = s11 = 0.0
        c00 = c01 = c10 = c11 = 0.0
        for e in range(n_e):
            u0 = en[e] - x0
            u1 = en[e] - x1
            v0 = (p0 - q0 * u0) / (u0 * u0 + d0) * sw[a, e]
            v1 = (p1 - q1 * u1) / (u1 * u1 + d1) * sw[a, e]
            r0 = rhs[a, 0, e]
            r1 = rhs[a, 1, e]
            s00 += v0 * v0
            s01 += v0 * v1
            s11 += v1 * v1
            c00 += v0 * r0
            c01 += v0 * r1
            c10 += v1 * r0
            c11 += v1 * r1
        g[w, a, 0, 0] = s00
        g[w, a, 0, 1] = s01
        g[w, a, 1, 0] = s01
        g[w, a, 1, 1] = s11
        c[w, a, 0, 0] = c00
        c[w, a, 0, 1] = c01
        c[w, a, 1, 0] = c10
        c[w, a, 1, 1] = c11


def _lorentz3(en, xr, h2, ah, b, sw, rhs, g, c):
    """Three branches and one background column, in one pass."""
    n_w, n_a = xr.shape[0], xr.shape[1]
    n_e = en.size
    for row in range(n_w * n_a):
        a = row // n_w
        w = row - a * n_w
        x0, x1, x2 = xr[w, a, 0], xr[w, a, 1], xr[w, a, 2]
        d0, d1, d2 = h2[w, a, 0], h2[w, a, 1], h2[w, a, 2]
        p0, p1, p2 = ah[w, a, 0], ah[w, a, 1], ah[w, a, 2]
        q0, q1, q2 = b[w, a, 0], b[w, a, 1], b[w, a, 2]
        s00 = s01 = s02 = s11 = s12 = s22 = 0.0
        c00 = c01 = c10 = c11 = c20 = c21 = 0.0
        for e in range(n_e):
            u0 = en[e] - x0
            u1 = en[e] - x1
            u2 = en[e] - x2
            v0 = (p0 - q0 * u0) / (u0 * u0 + d0) * sw[a, e]
            v1 = (p1 - q1 * u1) / (u1 * u1 + d1) * sw[a, e]
            v2 = (p2 - q2 * u2) / (u2 * u2 + d2) * sw[a, e]
            r0 = rhs[a, 0, e]
            r1 = rhs[a, 1, e]
            s00 += v0 * v0
            s01 += v0 * v1
            s02 += v0 * v2
            s11 += v1 * v1
            s12 += v1 * v2
            s22 += v2 * v2
            c00 += v0 * r0
            c01 += v0 * r1
            c10 += v1 * r0
            c11 += v1 * r1
            c20 += v2 * r0
            c21 += v2 * r1
        g[w, a, 0, 0] = s00
        g[w, a, 1, 1] = s11
        g[w, a, 2, 2] = s22
        g[w, a, 0, 1] = g[w, a, 1, 0] = s01
        g[w, a, 0, 2] = g[w, a, 2, 0] = s02
        g[w, a, 1, 2] = g[w, a, 2, 1] = s12
        c[w, a, 0, 0] = c00
        c[w, a, 0, 1] = c01
        c[w, a, 1, 0] = c10
        c[w, a, 1, 1] = c11
        c[w, a, 2, 0] = c20
        c[w, a, 2, 1] = c21


def _lorentz(en, xr, h2, ah, b, sw, rhs, g, c):
    """Lorentzian branch lines ``(ah - b u) / (u^2 + h2)``, ``u = E - x``, and their sums."""
    n_w, n_a, n_k = xr.shape
    n_e = en.size
    if rhs.shape[1] == 2 and n_k == 2:
        _lorentz2(en, xr, h2, ah, b, sw, rhs, g, c)
        return
    if rhs.shape[1] == 2 and n_k == 3:
        _lorentz3(en, xr, h2, ah, b, sw, rhs, g, c)
        return
    buf = np.empty((n_k, n_e))
    for row in range(n_w * n_a):
        a = row // n_w
        w = row - a * n_w
        for k in range(n_k):
            x = xr[w, a, k]
            hh = h2[w, a, k]
            p = ah[w, a, k]
            q = b[w, a, k]
            for e in range(n_e):
                u = en[e] - x
                buf[k, e] = (p - q * u) / (u * u + hh) * sw[a, e]
        _accumulate(buf, rhs, a, g, c, w)


def _disorder(en, xr, h2, ah, b, base_re, base_im, e_c, sw, rhs, g, c):
    """Emission lines with exciton disorder: Lorentzian lines rescaled to ``A_C^sigma``."""
    n_w, n_a, n_k = xr.shape
    n_e = en.size
    inv_pi = 1.0 / np.pi
    buf = np.empty((n_k, n_e))
    share = np.empty(n_e)
    for row in range(n_w * n_a):
        a = row // n_w
        w = row - a * n_w
        share[:] = 0.0
        for k in range(n_k):
            x = xr[w, a, k]
            hh = h2[w, a, k]
            p = ah[w, a, k]
            q = b[w, a, k]
            for e in range(n_e):
                u = en[e] - x
                v = (p - q * u) / (u * u + hh)
                buf[k, e] = v
                share[e] += v
        ec = e_c[w, a]
        for e in range(n_e):
            dr = base_re[w, e] - ec
            di = base_im[w, e]
            a_sigma = di / (dr * dr + di * di) * inv_pi  # -Im[1 / (dr + i di)] / pi
            s = share[e]
            share[e] = (a_sigma / s if s != 0.0 else 0.0) * sw[a, e]
        for k in range(n_k):
            for e in range(n_e):
                buf[k, e] *= share[e]
        _accumulate(buf, rhs, a, g, c, w)


def _reflectance(base_re, base_im, e_c, kap, sw, rhs, g, c):
    """Reflectance column ``|1 - i kappa / (base - E_C)|^2`` and its sums."""
    n_w, n_a = e_c.shape
    n_e = base_re.shape[1]
    buf = np.empty((1, n_e))
    for row in range(n_w * n_a):
        a = row // n_w
        w = row - a * n_w
        ec = e_c[w, a]
        kw = kap[w]
        for e in range(n_e):
            dr = base_re[w, e] - ec
            di = base_im[w, e]
            f = kw / (dr * dr + di * di)
            re = 1.0 - f * di  # 1 - i kappa (dr - i di) / |d|^2
            im = f * dr
            buf[0, e] = (re * re + im * im) * sw[a, e]
        _accumulate(buf, rhs, a, g, c, w)


def _accumulate(buf, rhs, a, g, c, w):
    """Gram sums of one row: ``buf`` holds ``s B_k`` (K, E); ``rhs[a]`` holds ``s R_j``."""
    n_k, n_e = buf.shape
    n_j = rhs.shape[1]
    for k in range(n_k):
        for j in range(n_j):
            acc = 0.0
            for e in range(n_e):
                acc += buf[k, e] * rhs[a, j, e]
            c[w, a, k, j] = acc
        for q in range(k + 1):
            acc = 0.0
            for e in range(n_e):
                acc += buf[k, e] * buf[q, e]
            g[w, a, k, q] = acc
            g[w, a, q, k] = acc


def _row_is_finite(g, cross, w, a):
    """True if the Gram blocks of row ``(w, a)`` are finite (a broken basis gives NaN)."""
    n_k = g.shape[2]
    n_j = cross.shape[3]
    finite = True
    for k in range(n_k):
        for q in range(n_k):
            if not np.isfinite(g[w, a, k, q]):
                finite = False
        for j in range(n_j):
            if not np.isfinite(cross[w, a, k, j]):
                finite = False
    return finite


def _eliminate_background(g, cross, pinv, hb, w, a, t, gr, hr):
    """Schur complement of the background columns of row ``(w, a)`` into ``gr`` and ``hr``."""
    n_k = g.shape[2]
    m = cross.shape[3] - 1
    for k in range(n_k):
        for i in range(m):
            acc = 0.0
            for j in range(m):
                acc += cross[w, a, k, j] * pinv[a, j, i]
            t[k, i] = acc
    for k in range(n_k):
        for q in range(n_k):
            acc = 0.0
            for i in range(m):
                acc += t[k, i] * cross[w, a, q, i]
            gr[k, q] = g[w, a, k, q] - acc
        acc = 0.0
        for i in range(m):
            acc += t[k, i] * hb[a, i]
        hr[k] = cross[w, a, k, m] - acc


def _solve_subset(gr, hr, g, w, a, subset, p, rtol, x):
    """Closed-form solve of the active set ``subset[:p]`` into ``x``; False if singular."""
    i0 = subset[0]
    if p == 1:
        d = gr[i0, i0]
        ok = d > rtol * g[w, a, i0, i0]
        x[0] = hr[i0] / (d if ok else 1.0)
    elif p == 2:
        i1 = subset[1]
        ga, gb, gc = gr[i0, i0], gr[i0, i1], gr[i1, i1]
        det = ga * gc - gb * gb
        ok = det > rtol * g[w, a, i0, i0] * g[w, a, i1, i1]
        inv = 1.0 / (det if ok else 1.0)
        x[0] = (gc * hr[i0] - gb * hr[i1]) * inv
        x[1] = (ga * hr[i1] - gb * hr[i0]) * inv
    else:
        i1 = subset[1]
        i2 = subset[2]
        g00, g01, g02 = gr[i0, i0], gr[i0, i1], gr[i0, i2]
        g10, g11, g12 = gr[i1, i0], gr[i1, i1], gr[i1, i2]
        g20, g21, g22 = gr[i2, i0], gr[i2, i1], gr[i2, i2]
        c00 = g11 * g22 - g12 * g21
        c01 = g12 * g20 - g10 * g22
        c02 = g10 * g21 - g11 * g20
        c11 = g00 * g22 - g02 * g20
        c12 = g01 * g20 - g00 * g21
        c22 = g00 * g11 - g01 * g10
        det = g00 * c00 + g01 * c01 + g02 * c02
        scale = g[w, a, i0, i0] * g[w, a, i1, i1] * g[w, a, i2, i2]
        ok = det > rtol * scale
        inv = 1.0 / (det if ok else 1.0)
        r0, r1, r2 = hr[i0], hr[i1], hr[i2]
        x[0] = (c00 * r0 + c01 * r1 + c02 * r2) * inv
        x[1] = (c01 * r0 + c11 * r1 + c12 * r2) * inv
        x[2] = (c02 * r0 + c12 * r1 + c22 * r2) * inv
    return ok


def _solve_rows(g, cross, pinv, hb, c0, subsets, sizes, nonneg, rtol, chi2_out, amps_out):
    """Background elimination and the exact small non-negative solves, row by row.

    The same arithmetic as ``projection.project_linear``'s numpy path: the background
    columns are eliminated by their Schur complement, then every active set (in the
    order of ``subsets``, sizes 1 to K <= 3) is solved in closed form with the same
    singularity test, and the admissible solution with the smallest ``chi^2`` is kept.
    """
    n_w, n_a, n_k = g.shape[0], g.shape[1], g.shape[2]
    m = cross.shape[3] - 1
    t = np.empty((n_k, max(m, 1)))
    gr = np.empty((n_k, n_k))
    hr = np.empty(n_k)
    x = np.empty(3)
    for w in range(n_w):
        for a in range(n_a):
            finite = _row_is_finite(g, cross, w, a)
            _eliminate_background(g, cross, pinv, hb, w, a, t, gr, hr)
            base = c0[a]
            best = base
            for k in range(n_k):
                amps_out[w, a, k] = 0.0
            for s in range(sizes.size):
                p = sizes[s]
                ok = _solve_subset(gr, hr, g, w, a, subsets[s], p, rtol, x)
                if ok and nonneg:
                    for i in range(p):
                        if not x[i] >= 0.0:
                            ok = False
                if not ok:
                    continue
                dot = 0.0
                for i in range(p):
                    dot += x[i] * hr[subsets[s, i]]
                chi = base - dot
                if chi < best:
                    best = chi
                    for k in range(n_k):
                        amps_out[w, a, k] = 0.0
                    for i in range(p):
                        amps_out[w, a, subsets[s, i]] = x[i]
            if not finite:
                best = np.nan
            chi2_out[w, a] = 0.0 if best < 0.0 else best


if _numba is not None:
    _inner = _numba.njit(cache=True, fastmath=_FASTMATH, error_model="numpy")
    _accumulate = _inner(_accumulate)
    _lorentz2 = _inner(_lorentz2)
    _lorentz3 = _inner(_lorentz3)
    _outer = _numba.njit(cache=True, fastmath=_FASTMATH, error_model="numpy")
    # the solve and its steps keep strict IEEE arithmetic (no fastmath); the steps are
    # inlined into the row loop, which stays a single call-free loop once compiled
    _solve_strict = _numba.njit(cache=True, error_model="numpy")
    _solve_step = _numba.njit(cache=True, error_model="numpy", inline="always")
    _row_is_finite = _solve_step(_row_is_finite)
    _eliminate_background = _solve_step(_eliminate_background)
    _solve_subset = _solve_step(_solve_subset)
    _KERNELS = {
        "lorentz": _outer(_lorentz),
        "disorder": _outer(_disorder),
        "reflectance": _outer(_reflectance),
        # the solve keeps strict IEEE arithmetic: it mirrors the numpy closed forms
        "solve": _solve_strict(_solve_rows),
    }
else:  # pragma: no cover - only where numba does not import
    _KERNELS = {}


def _f64(a) -> np.ndarray:
    """``a`` as a C-contiguous, writeable float64 array (one numba signature whatever came in)."""
    if (type(a) is np.ndarray and a.dtype == np.float64 and a.flags.c_contiguous
            and a.flags.writeable):
        return a
    return np.array(a, dtype=np.float64, order="C")


def _outputs(n_w: int, n_a: int, n_k: int, n_j: int) -> tuple[np.ndarray, np.ndarray]:
    return np.empty((n_w, n_a, n_k, n_k)), np.empty((n_w, n_a, n_k, n_j))


def gram_lorentz(energy, xr, h2, ah, b, sqrt_weight, weighted_rhs):
    """Gram blocks of the Lorentzian branch basis ``B_k = (ah - b u) / (u^2 + h2)``.

    Parameters
    ----------
    energy
        Energy axis ``(E,)``, eV.
    xr, h2, ah, b
        Per-row line coefficients, shape ``(W, A, K)`` (pole position eV, squared half
        width eV^2, residue terms; see ``spectral._lorentz_coefficients``).
    sqrt_weight, weighted_rhs
        ``(A, E)`` and ``(A, J, E)`` from :func:`polkit.numerics.projection.prepare_map`.

    Returns
    -------
    gram, cross : ndarray
        ``(W, A, K, K)`` and ``(W, A, K, J)``.
    """
    xr = _f64(xr)
    g, c = _outputs(*xr.shape, weighted_rhs.shape[1])
    _KERNELS["lorentz"](_f64(energy), xr, _f64(h2), _f64(ah), _f64(b), _f64(sqrt_weight),
                        _f64(weighted_rhs), g, c)
    return g, c


def gram_disorder(energy, xr, h2, ah, b, base, e_c, sqrt_weight, weighted_rhs):
    """Gram blocks of the emission basis with exciton disorder.

    The Lorentzian lines of :func:`gram_lorentz` are rescaled per pixel to
    ``A_C^sigma / sum_k B_k`` with ``A_C^sigma = -Im[1 / (base - E_C)] / pi``.

    Parameters
    ----------
    base
        Complex ``(W, E)``: ``E + i gamma_C / 2 - Sigma(E)`` (self-energy with disorder), eV.
    e_c
        Cavity energy ``(W, A)``, eV.
    energy, xr, h2, ah, b, sqrt_weight, weighted_rhs
        As in :func:`gram_lorentz`.

    Returns
    -------
    gram, cross : ndarray
        ``(W, A, K, K)`` and ``(W, A, K, J)``.
    """
    xr = _f64(xr)
    base = np.asarray(base)
    g, c = _outputs(*xr.shape, weighted_rhs.shape[1])
    _KERNELS["disorder"](_f64(energy), xr, _f64(h2), _f64(ah), _f64(b), _f64(base.real),
                         _f64(base.imag), _f64(e_c), _f64(sqrt_weight), _f64(weighted_rhs),
                         g, c)
    return g, c


def gram_reflectance(base, e_c, kappa, sqrt_weight, weighted_rhs):
    """Gram blocks of the reflectance basis ``|1 - i kappa / (base - E_C)|^2`` (one column).

    Parameters
    ----------
    base
        Complex ``(W, E)``: ``E + i gamma_C / 2 - Sigma(E)``, eV.
    e_c
        Cavity energy ``(W, A)``, eV.
    kappa
        Top-mirror coupling ``(W,)``, eV.
    sqrt_weight, weighted_rhs
        As in :func:`gram_lorentz`.

    Returns
    -------
    gram, cross : ndarray
        ``(W, A, 1, 1)`` and ``(W, A, 1, J)``.
    """
    base = np.asarray(base)
    e_c = _f64(e_c)
    g, c = _outputs(e_c.shape[0], e_c.shape[1], 1, weighted_rhs.shape[1])
    _KERNELS["reflectance"](_f64(base.real), _f64(base.imag), e_c, _f64(kappa),
                            _f64(sqrt_weight), _f64(weighted_rhs), g, c)
    return g, c


#: largest number of basis columns the compiled solve handles (closed forms up to 3 x 3)
MAX_SOLVE_COLUMNS = 3
_SUBSETS: dict = {}


def _subset_table(n_k: int) -> tuple[np.ndarray, np.ndarray]:
    """Active sets in the order of ``itertools.combinations`` by size (padded with -1)."""
    table = _SUBSETS.get(n_k)
    if table is None:
        from itertools import combinations

        sets = [c for size in range(1, n_k + 1) for c in combinations(range(n_k), size)]
        idx = np.full((len(sets), max(n_k, 1)), -1, dtype=np.int64)
        for i, c in enumerate(sets):
            idx[i, : len(c)] = c
        table = _SUBSETS[n_k] = (idx, np.array([len(c) for c in sets], dtype=np.int64))
    return table


def solve_rows(gram, cross, background_pinv, h_background, chi2_background, *, nonneg: bool,
               rtol: float) -> tuple[np.ndarray, np.ndarray]:
    """Per-row background elimination and exact small (non-negative) least squares.

    Parameters
    ----------
    gram, cross
        ``(W, A, K, K)`` and ``(W, A, K, m + 1)`` from one of the ``gram_*`` kernels
        (``K <= 3``).
    background_pinv, h_background, chi2_background
        ``(A, m, m)``, ``(A, m)`` and ``(A,)`` from the prepared map.
    nonneg
        Constrain the basis amplitudes to be >= 0.
    rtol
        Relative pivot below which a sub-problem counts as singular.

    Returns
    -------
    chi2_per_row, amplitudes : ndarray
        ``(W, A)`` (NaN where the basis was not finite) and ``(W, A, K)``.
    """
    n_w, n_a, n_k = gram.shape[:3]
    if n_k > MAX_SOLVE_COLUMNS:
        raise ValueError(f"the compiled solve handles at most {MAX_SOLVE_COLUMNS} columns, "
                         f"found {n_k}")
    subsets, sizes = _subset_table(n_k)
    chi2 = np.empty((n_w, n_a))
    amps = np.empty((n_w, n_a, n_k))
    m = background_pinv.shape[1]
    pinv = _f64(background_pinv) if m else np.zeros((n_a, 1, 1))
    hb = _f64(h_background) if m else np.zeros((n_a, 1))
    _KERNELS["solve"](_f64(gram), _f64(cross), pinv, hb, _f64(chi2_background),
                               subsets, sizes, bool(nonneg), float(rtol), chi2, amps)
    return chi2, amps
