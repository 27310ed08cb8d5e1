"""Variable projection of a whole map: the linear amplitudes solved for every walker and row.

A map (angle or k) x energy is modelled as a sum of a few *basis* columns per in-plane
point, each a fixed function of energy for given nonlinear parameters, times amplitudes
that enter linearly, plus a background::

    y(a, E) ~ sum_k n_k(a) B_k(a, E) + sum_j c_j(a) C_j(E)

For fixed nonlinear parameters the amplitudes and the background are solved by weighted
linear least squares per in-plane point (variable projection: Golub and Pereyra, SIAM J.
Numer. Anal. 10, 413, 1973), so the sampler only sees the nonlinear parameters.  The
bases themselves (the physics) come from :mod:`polkit.models.spectral` and
:mod:`polkit.models.bare_modes`; this module knows nothing of them beyond their shape.

Memory layout
-------------
A basis is an ndarray of shape ``S + (A, K, E)`` or a :class:`MapBasis`, a lazily
evaluated ``(W, A, K, E)`` array that stores only per-``(W, A, K)`` numbers and evaluates
blocks of rows on demand.  :func:`project_linear` consumes it block by block, so the full
``(W, A, K, E)`` array is never formed and each block stays in the processor cache while
its Gram matrices are accumulated.  ``numpy.asarray(basis)`` materialises the whole array
when wanted.

Compiled path
-------------
A :class:`MapBasis` built by :mod:`polkit.models.spectral` also carries the few numbers a
compiled kernel needs (:mod:`polkit.numerics.kernels`, numba): it evaluates each row's
line shapes and accumulates its Gram sums in one pass over the energy axis, then solves
the small problems in closed form, with the same formulas as the numpy path (the tests
hold the two to rounding).  It is used whenever numba imports; ``POLKIT_COMPILED=0`` (or
``polkit.numerics.kernels.use_compiled(False)``) selects the numpy path.  A basis built
another way (an ndarray, or a :class:`MapBasis` without kernel numbers) always takes the
numpy path.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from itertools import combinations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit.errors import DataError

__all__ = [
    "MapBasis",
    "LinearSolution",
    "WeightedMap",
    "prepare_map",
    "project_linear",
]

#: number of float64 elements per evaluated basis block (~400 kB, fits in L2 cache)
_BLOCK_ELEMENTS = 48_000
#: relative pivot below which a sub-problem of the projection counts as singular
_RTOL_SINGULAR = 1e-10


# --------------------------------------------------------------------------------------
# Lazily evaluated bases
# --------------------------------------------------------------------------------------
class MapBasis:
    """A ``(W, A, K, E)`` basis evaluated lazily in blocks of rows.

    Parameters
    ----------
    batch_shape
        Batch shape ``S`` of the physics parameters (``W = prod(S)``).
    n_in_plane, n_columns, energy_ev
        ``A``, ``K`` and the energy axis (eV, length ``E``).
    block
        ``block(walkers: slice, angles: slice) -> ndarray (w, a, K, E)`` on the flattened
        walker axis.  Each call returns a fresh array the caller may overwrite.
    kind
        ``"emission"`` or ``"reflectance"``.
    columns
        Names of the ``K`` columns (e.g. ``("lower", "upper")``).
    """

    #: ``(mode, arguments)`` of a compiled kernel of :mod:`polkit.numerics.kernels` that
    #: gives the same weighted Gram sums as the blocks (set by the basis builders), or None
    _fused: tuple | None = None

    def __init__(
        self,
        batch_shape: tuple[int, ...],
        n_in_plane: int,
        n_columns: int,
        energy_ev: NDArray,
        block: Callable[[slice, slice], NDArray],
        *,
        kind: str,
        columns: tuple[str, ...],
    ):
        self.batch_shape = tuple(batch_shape)
        self.n_walkers = int(np.prod(self.batch_shape)) if self.batch_shape else 1
        self.n_in_plane = int(n_in_plane)
        self.n_columns = int(n_columns)
        self.energy_ev = np.asarray(energy_ev, float)
        self.kind = kind
        self.columns = tuple(columns)
        self._block = block

    @property
    def shape(self) -> tuple[int, ...]:
        """``S + (A, K, E)``."""
        return self.batch_shape + (self.n_in_plane, self.n_columns, self.energy_ev.size)

    def block(self, walkers: slice, in_plane: slice) -> NDArray:
        """Evaluate rows ``[walkers, in_plane]`` of the flattened ``(W, A, K, E)`` basis."""
        return self._block(walkers, in_plane)

    def to_array(self) -> NDArray:
        """The whole basis as an ndarray of shape :attr:`shape`."""
        full = self._block(slice(None), slice(None))
        return full.reshape(self.shape)

    def __array__(self, dtype=None, copy=None):
        out = self.to_array()
        return out if dtype is None else out.astype(dtype)


# --------------------------------------------------------------------------------------
# Variable projection
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class LinearSolution:
    """Result of :func:`project_linear` with ``return_parts=True``.

    Attributes
    ----------
    chi2
        Weighted sum of squared residuals per walker, shape ``S``.
    chi2_per_angle
        The same per in-plane point, shape ``S + (A,)``.
    amplitudes
        Basis amplitudes, shape ``S + (A, K)`` (signal units times eV for an emission
        basis in 1/eV; signal units for a reflectance basis).
    background
        Background coefficients, shape ``S + (A, m)``: ``m = 0`` (none), 1 (constant) or
        2 (constant, then the slope per *half energy window*: the linear column is
        ``(E - E_mid) / (E_max - E_mid)``).
    model
        The best-fit map, shape ``S + (A, E)`` (also at masked pixels).
    """

    chi2: NDArray
    chi2_per_angle: NDArray
    amplitudes: NDArray
    background: NDArray
    model: NDArray


def _background_columns(energy: NDArray, background: str) -> NDArray:
    if background == "none":
        return np.empty((energy.size, 0))
    if background == "constant":
        return np.ones((energy.size, 1))
    if background == "linear":
        mid = 0.5 * (energy[0] + energy[-1])
        half = 0.5 * (energy[-1] - energy[0]) or 1.0
        return np.stack([np.ones_like(energy), (energy - mid) / half], axis=-1)
    raise DataError(
        f"expected background 'constant', 'linear' or 'none', found {background!r}.",
        field="background",
    )


@dataclass(frozen=True)
class WeightedMap:
    """A map prepared once for repeated :func:`project_linear` calls (see :func:`prepare_map`).

    Holds the masked data, the square-root weights, the background columns and every
    walker-independent Gram block, so that a likelihood evaluated thousands of times
    on the same map does not redo them.
    """

    shape: tuple[int, int]
    energy_ev: NDArray | None
    background_kind: str
    columns: NDArray  # (E, m) background columns
    sqrt_weight: NDArray  # (A, E)
    weighted_rhs: NDArray  # (A, m + 1, E): sqrt(w) * [columns..., y]
    background_pinv: NDArray  # (A, m, m)
    h_background: NDArray  # (A, m)
    chi2_background: NDArray  # (A,): chi^2 of the background-only fit


def _check_data(y, inv_var):
    y = np.asarray(y, dtype=float)
    if y.ndim != 2:
        raise DataError(
            f"expected a map of shape (in-plane, energy), found shape {y.shape}.", field="y")
    try:
        iv = np.broadcast_to(np.asarray(inv_var, dtype=float), y.shape)
    except ValueError as exc:
        raise DataError(
            f"expected inverse variances broadcastable to the map shape {y.shape}, found "
            f"shape {np.shape(inv_var)}.", field="inv_var") from exc
    masked = np.isnan(y)
    n_inf = int(np.isinf(y).sum())
    if n_inf:
        raise DataError(
            f"expected finite values or NaN (masked) in the map, found {n_inf} infinite "
            "pixel(s). Replace them by NaN to mask them.", field="y")
    used = ~masked
    bad = used & ~(np.isfinite(iv) & (iv >= 0))
    if bad.any():
        raise DataError(
            "expected finite, non-negative inverse variances at every unmasked pixel, found "
            f"{int(bad.sum())} bad value(s) (e.g. {iv[bad][0]!r}). Give zero weight (or NaN in "
            "the map) to pixels to ignore.", field="inv_var")
    return np.where(used, y, 0.0), np.where(used, iv, 0.0)


def prepare_map(
    y: ArrayLike,
    inv_var: ArrayLike,
    *,
    background: str = "constant",
    energy_ev: ArrayLike | None = None,
) -> WeightedMap:
    """Validate a map and precompute everything :func:`project_linear` needs from it alone.

    Parameters
    ----------
    y
        The map, shape ``(A, E)``; NaN pixels are masked (zero weight).
    inv_var
        Inverse variances, broadcastable to ``(A, E)``; finite and >= 0 at every unmasked
        pixel (zero removes a pixel).
    background
        ``"constant"`` (default), ``"linear"`` or ``"none"``.
    energy_ev
        Energy axis (eV) for the linear background column; without it the pixel index
        is used (the same line for a uniform axis).

    Returns
    -------
    WeightedMap

    Raises
    ------
    DataError
        On infinities in the map, bad inverse variances or a mismatched energy axis.
    """
    y0, weight = _check_data(y, inv_var)
    n_a, n_e = y0.shape
    energy = None
    if energy_ev is not None:
        energy = np.asarray(energy_ev, dtype=float)
        if energy.shape != (n_e,):
            raise DataError(
                f"expected an energy axis of length {n_e} (the map's), found shape "
                f"{energy.shape}.", field="energy_ev")
    cols = _background_columns(np.arange(n_e, dtype=float) if energy is None else energy,
                               background)
    m = cols.shape[1]
    sw = np.sqrt(weight)
    rhs = np.empty((n_a, m + 1, n_e))
    rhs[:, :m, :] = cols.T[None] * sw[:, None, :]
    rhs[:, m, :] = sw * y0
    outer = np.einsum("aie,aje->aij", rhs, rhs)
    g_cc, h_c, ywy = outer[:, :m, :m], outer[:, :m, m], outer[:, m, m]
    pinv = np.linalg.pinv(g_cc) if m else np.zeros((n_a, 0, 0))
    c0 = ywy - np.einsum("ai,aij,aj->a", h_c, pinv, h_c)
    return WeightedMap(
        shape=(n_a, n_e), energy_ev=energy, background_kind=str(background), columns=cols,
        sqrt_weight=sw, weighted_rhs=rhs, background_pinv=pinv, h_background=h_c,
        chi2_background=c0,
    )


def _solve_subset(gram: NDArray, rhs: NDArray, scale: NDArray):
    """Solve the small symmetric systems ``gram x = rhs`` (batch, p, p) in closed form.

    Returns ``(x, ok)`` with ``ok`` False where the system is numerically singular
    (determinant below ``_RTOL_SINGULAR`` times the product of the un-reduced diagonal).
    """
    p = gram.shape[-1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if p == 1:
            d = gram[..., 0, 0]
            ok = d > _RTOL_SINGULAR * scale[..., 0]
            return (rhs / np.where(ok, d, 1.0)[..., None]), ok
        if p == 2:
            a, b, c = gram[..., 0, 0], gram[..., 0, 1], gram[..., 1, 1]
            det = a * c - b * b
            ok = det > _RTOL_SINGULAR * scale[..., 0] * scale[..., 1]
            inv = 1.0 / np.where(ok, det, 1.0)
            x0 = (c * rhs[..., 0] - b * rhs[..., 1]) * inv
            x1 = (a * rhs[..., 1] - b * rhs[..., 0]) * inv
            return np.stack([x0, x1], axis=-1), ok
        if p == 3:
            g = gram
            c00 = g[..., 1, 1] * g[..., 2, 2] - g[..., 1, 2] * g[..., 2, 1]
            c01 = g[..., 1, 2] * g[..., 2, 0] - g[..., 1, 0] * g[..., 2, 2]
            c02 = g[..., 1, 0] * g[..., 2, 1] - g[..., 1, 1] * g[..., 2, 0]
            c11 = g[..., 0, 0] * g[..., 2, 2] - g[..., 0, 2] * g[..., 2, 0]
            c12 = g[..., 0, 1] * g[..., 2, 0] - g[..., 0, 0] * g[..., 2, 1]
            c22 = g[..., 0, 0] * g[..., 1, 1] - g[..., 0, 1] * g[..., 1, 0]
            det = g[..., 0, 0] * c00 + g[..., 0, 1] * c01 + g[..., 0, 2] * c02
            ok = det > _RTOL_SINGULAR * scale.prod(axis=-1)
            inv = 1.0 / np.where(ok, det, 1.0)
            r0, r1, r2 = rhs[..., 0], rhs[..., 1], rhs[..., 2]
            x0 = (c00 * r0 + c01 * r1 + c02 * r2) * inv
            x1 = (c01 * r0 + c11 * r1 + c12 * r2) * inv
            x2 = (c02 * r0 + c12 * r1 + c22 * r2) * inv
            return np.stack([x0, x1, x2], axis=-1), ok
        # p > 3: symmetric eigen-decomposition, singular where the smallest
        # eigenvalue is tiny relative to the diagonal scale
        vals, vecs = np.linalg.eigh(gram)
        ok = vals[..., 0] > _RTOL_SINGULAR * scale.max(axis=-1)
        coef = np.einsum("...ji,...j->...i", vecs, rhs) / np.where(ok[..., None], vals, 1.0)
        return np.einsum("...ij,...j->...i", vecs, coef), ok


def _solve_rows(g_bb: NDArray, cross: NDArray, data: WeightedMap, nonneg: bool):
    """Background elimination and exact small solves (numpy); ``(chi2 (W, A), amps)``."""
    n_w, n_a, n_k = g_bb.shape[:3]
    m = data.columns.shape[1]
    c0 = data.chi2_background
    if m:  # eliminate the background per angle (Schur complement)
        g_bc = cross[..., :m]
        t = g_bc @ data.background_pinv  # (W, A, K, m)
        g_red = g_bb - t @ g_bc.swapaxes(-1, -2)
        h_red = cross[..., m] - np.einsum("waki,ai->wak", t, data.h_background)
    else:
        g_red = g_bb
        h_red = cross[..., 0]
    diag = np.diagonal(g_bb, axis1=-2, axis2=-1)  # un-reduced scale (W, A, K)

    best = np.broadcast_to(c0, (n_w, n_a)).copy()
    amps = np.zeros((n_w, n_a, n_k))
    for size in range(1, n_k + 1):
        for subset in combinations(range(n_k), size):
            idx = np.array(subset)
            sub_h = h_red[..., idx]
            x, ok = _solve_subset(g_red[..., idx[:, None], idx[None, :]], sub_h, diag[..., idx])
            if nonneg:
                ok &= np.all(x >= 0.0, axis=-1)
            chi = c0 - np.einsum("...i,...i->...", np.where(ok[..., None], x, 0.0), sub_h)
            better = ok & (chi < best)
            best = np.where(better, chi, best)
            if size == n_k:
                amps = np.where(better[..., None], x, amps)
            else:
                full = np.zeros_like(amps)
                full[..., idx] = x
                amps = np.where(better[..., None], full, amps)
    # a non-finite basis (e.g. parameters exactly at an exceptional point) must not be
    # silently replaced by the background-only fit: give NaN, which the sampler reports
    broken = ~(np.isfinite(g_bb).all(axis=(-2, -1)) & np.isfinite(cross).all(axis=(-2, -1)))
    best[broken] = np.nan
    return np.where(best < 0.0, 0.0, best), amps  # rounding below zero, NaN kept


def _iter_blocks(n_walkers: int, n_angle: int, row_elements: int):
    per_walker = n_angle * row_elements
    if per_walker <= _BLOCK_ELEMENTS:
        step_w = max(1, _BLOCK_ELEMENTS // per_walker)
        for w0 in range(0, n_walkers, step_w):
            yield slice(w0, min(w0 + step_w, n_walkers)), slice(0, n_angle)
    else:
        step_a = max(1, _BLOCK_ELEMENTS // max(row_elements, 1))
        for w0 in range(n_walkers):
            for a0 in range(0, n_angle, step_a):
                yield slice(w0, w0 + 1), slice(a0, min(a0 + step_a, n_angle))


def _compiled_kernels(basis):
    """The compiled-kernel module if it should evaluate this basis, else None."""
    if getattr(basis, "_fused", None) is None:
        return None
    from polkit.numerics import kernels as _kernels  # imported on first use: it loads numba

    return _kernels if _kernels.enabled() else None


if hasattr(np, "vecdot"):  # numpy >= 2.0: a fused gufunc, ~3x faster here than matmul
    _rowdot = np.vecdot
else:  # pragma: no cover - older numpy
    def _rowdot(a, b):
        return np.einsum("...e,...e->...", a, b)


def project_linear(
    y: ArrayLike | WeightedMap,
    inv_var: ArrayLike | None,
    basis: MapBasis | ArrayLike,
    *,
    nonneg: bool = True,
    background: str | None = None,
    return_parts: bool = False,
    energy_ev: ArrayLike | None = None,
) -> NDArray | LinearSolution:
    """Solve the linear amplitudes of a map model for every walker and in-plane point.

    For each walker and in-plane point (row) it minimises::

        chi^2 = sum_E w(E) (y(E) - sum_b a_b B_b(E) - sum_j c_j C_j(E))^2

    over basis amplitudes ``a`` (non-negative if ``nonneg``) and background
    coefficients ``c`` (unconstrained; columns ``C`` are 1 and, for
    ``background="linear"``, a line in energy).  This is the variable-projection
    reduction of a separable least-squares problem (Golub and Pereyra, SIAM J. Numer.
    Anal. 10, 413, 1973): the sampler sees ``chi^2`` as a function of the nonlinear
    parameters alone.

    Method: the Gram blocks ``B^T W B`` and ``B^T W [C, y]`` are accumulated over
    cache-sized blocks of rows with fused row dot products; the background columns
    (which do not depend on the walker) are eliminated per angle by their Schur
    complement; the problem in the K <= 3 remaining unknowns is solved exactly by
    enumerating all ``2^K`` active sets in closed form (vectorised over walkers and
    angles) and keeping the admissible solution with the smallest ``chi^2``: with
    ``nonneg`` this is the constrained optimum of the convex problem, without it the
    ordinary least-squares optimum (robust to a singular column).  For the bases of
    :func:`emission_basis` and :func:`reflectance_basis` the Gram sums and the small
    solves run in compiled kernels when numba is available (module notes).  Numerically
    singular sub-problems (e.g. a branch lying entirely in masked pixels) are
    skipped; such amplitudes are 0.  A basis with NaN or infinite values gives a NaN
    ``chi^2`` for that walker (never a silent finite value).

    Parameters
    ----------
    y
        The map, shape ``(A, E)`` (NaN pixels are masked), or a :class:`WeightedMap`
        from :func:`prepare_map` (then ``inv_var``, ``background`` and ``energy_ev`` are
        taken from it: leave them None).
    inv_var
        Inverse variances, broadcastable to ``(A, E)``; finite and >= 0 at every
        unmasked pixel (zero removes a pixel).
    basis
        A :class:`MapBasis` or an array of shape ``S + (A, K, E)`` (``S`` may be empty).
    nonneg
        Constrain the basis amplitudes to be >= 0 (emission occupations, reflectance
        scale).  The background is never constrained.
    background
        ``"constant"`` (the default for a raw map), ``"linear"`` or ``"none"``; with a
        :class:`WeightedMap` leave it ``None`` (the prepared map fixes it).
    return_parts
        If True return a :class:`LinearSolution` (amplitudes, background, model map)
        instead of ``chi2`` alone.
    energy_ev
        Energy axis (eV) for the linear background column; by default the basis's own
        (a :class:`MapBasis` carries one) or else the pixel index.

    Returns
    -------
    ndarray or LinearSolution
        ``chi2`` of shape ``S``, or the full solution.

    Raises
    ------
    DataError
        If the map, the inverse variances or the basis do not fit together, or contain
        infinities / negative weights.
    """
    rows = _basis_rows(basis)
    if energy_ev is None and isinstance(basis, MapBasis):
        energy_ev = basis.energy_ev
    data = _weighted_map(y, inv_var, basis, rows, background, energy_ev)
    kernels = _compiled_kernels(basis)
    g_bb, cross = _gram_sums(basis, rows, data, kernels)
    if kernels is not None and rows.n_k <= kernels.MAX_SOLVE_COLUMNS:
        chi2_angle, amps = kernels.solve_rows(
            g_bb, cross, data.background_pinv, data.h_background, data.chi2_background,
            nonneg=nonneg, rtol=_RTOL_SINGULAR)
    else:
        chi2_angle, amps = _solve_rows(g_bb, cross, data, nonneg)
    chi2 = chi2_angle.sum(axis=-1).reshape(rows.batch)
    if not return_parts:
        return chi2
    return _solution(rows, data, cross, amps, chi2, chi2_angle)


@dataclass(frozen=True)
class _Rows:
    """A basis seen as ``(W, A, K, E)`` rows: its sizes and a block reader."""

    batch: tuple[int, ...]
    n_w: int
    n_a: int
    n_k: int
    n_e: int
    get: Callable[[slice, slice], NDArray]


def _basis_rows(basis: MapBasis | ArrayLike) -> _Rows:
    """The sizes of a basis and ``get(walkers, in_plane)``, a fresh block the caller may scale."""
    if isinstance(basis, MapBasis):
        return _Rows(basis.batch_shape, basis.n_walkers, basis.n_in_plane, basis.n_columns,
                     basis.energy_ev.size, basis.block)
    arr = np.asarray(basis, dtype=float)
    if arr.ndim < 3:
        raise DataError(
            f"expected a basis of shape (..., in-plane, columns, energy), found {arr.shape}.",
            field="basis")
    batch = arr.shape[:-3]
    n_a, n_k, n_e = arr.shape[-3:]
    n_w = int(np.prod(batch)) if batch else 1
    flat_arr = arr.reshape((n_w, n_a, n_k, n_e))

    def get(ws: slice, as_: slice) -> NDArray:
        return flat_arr[ws, as_].copy()

    return _Rows(batch, n_w, n_a, n_k, n_e, get)


def _weighted_map(y, inv_var, basis, rows: _Rows, background, energy_ev) -> WeightedMap:
    """The map prepared for the projection, checked against the basis it meets."""
    n_a, n_e = rows.n_a, rows.n_e
    if isinstance(y, WeightedMap):
        data = y
        found = data.shape
    else:
        y = np.asarray(y, dtype=float)
        found = y.shape
    if found != (n_a, n_e):
        raise DataError(
            f"expected the map to have shape (in-plane, energy) = ({n_a}, {n_e}) like the "
            f"basis, found {found}. Build the basis on the map's own axes.", field="y")
    if not isinstance(y, WeightedMap):
        data = prepare_map(y, inv_var, background=background or "constant",
                           energy_ev=energy_ev)
    elif background is not None and background != data.background_kind:
        raise DataError(
            f"expected background=None with a prepared map (it was prepared with "
            f"{data.background_kind!r}), found {background!r}. Call prepare_map with the "
            "background wanted.", field="background")
    elif (data.energy_ev is not None and isinstance(basis, MapBasis)
          and data.energy_ev is not basis.energy_ev
          and not np.allclose(data.energy_ev, basis.energy_ev, rtol=0, atol=1e-12)):
        raise DataError("expected the prepared map and the basis to share one energy axis, "
                        "found different axes. Prepare the map with the basis's energies.",
                        field="energy_ev")
    return data


def _gram_sums(basis, rows: _Rows, data: WeightedMap, kernels):
    """Weighted Gram blocks ``B^T W B`` (W, A, K, K) and ``B^T W [C, y]`` (W, A, K, m + 1)."""
    sw, rhs = data.sqrt_weight, data.weighted_rhs
    if kernels is not None:  # fused compiled pass: line shapes and Gram sums together
        mode, args = basis._fused
        gram = {"lorentz": kernels.gram_lorentz, "disorder": kernels.gram_disorder,
                "reflectance": kernels.gram_reflectance}[mode]
        return gram(*args, sw, rhs)
    n_w, n_a, n_k, n_e = rows.n_w, rows.n_a, rows.n_k, rows.n_e
    m = data.columns.shape[1]
    g_bb = np.empty((n_w, n_a, n_k, n_k))
    cross = np.empty((n_w, n_a, n_k, m + 1))
    for ws, as_ in _iter_blocks(n_w, n_a, n_k * n_e):
        blk = rows.get(ws, as_)
        blk *= sw[as_, None, :]
        g_bb[ws, as_] = _rowdot(blk[..., :, None, :], blk[..., None, :, :])
        cross[ws, as_] = _rowdot(blk[..., :, None, :], rhs[as_, None, :, :])
    return g_bb, cross


def _solution(rows: _Rows, data: WeightedMap, cross, amps, chi2, chi2_angle) -> LinearSolution:
    """Background coefficients and the best-fit map of solved amplitudes."""
    batch, n_w, n_a, n_k, n_e = rows.batch, rows.n_w, rows.n_a, rows.n_k, rows.n_e
    m = data.columns.shape[1]
    if m:
        resid_h = data.h_background[None] - np.einsum("wakj,wak->waj", cross[..., :m], amps)
        coef = np.einsum("aij,waj->wai", data.background_pinv, resid_h)
    else:
        coef = np.zeros((n_w, n_a, 0))
    model = np.einsum("waj,ej->wae", coef, data.columns)
    for ws, as_ in _iter_blocks(n_w, n_a, n_k * n_e):
        model[ws, as_] += np.einsum("wak,wake->wae", amps[ws, as_], rows.get(ws, as_))
    return LinearSolution(
        chi2=chi2,
        chi2_per_angle=chi2_angle.reshape(batch + (n_a,)),
        amplitudes=amps.reshape(batch + (n_a, n_k)),
        background=coef.reshape(batch + (n_a, m)),
        model=model.reshape(batch + (n_a, n_e)),
    )
