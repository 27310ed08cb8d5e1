"""Whole-map spectral model: photon Green's function, branch bases, variable projection.

This is the hot path of every dispersion fit.  A map (angle or k) x energy is modelled
as a sum of a few *basis* columns per angle, each a fixed function of energy for given
physics parameters, times amplitudes that enter linearly:

* emission:    ``I(theta, E) = sum_b n_b(theta) B_b(theta, E) + background(theta, E)``
* reflectance: ``R(theta, E) = s(theta) |1 - i kappa G_CC(theta, E)|^2 + b(theta)``

For fixed physics parameters the amplitudes (``n_b``, ``s``) and the background are
solved by weighted linear least squares per angle (variable projection: Golub and
Pereyra, SIAM J. Numer. Anal. 10, 413, 1973), so the sampler only sees the physics
parameters.

Units and shapes
----------------
All energies, couplings and linewidths are in **eV** (``gamma`` always a FWHM); the
workflow converts meV parameters before calling.  Physics parameters are scalars or
arrays of one batch shape ``S`` (typically ``(W,)`` walkers); ``(W, 1)`` and ``(W, 1, 1)``
are accepted as ``(W,)``.  A Python *list or tuple* given for ``e_x``, ``g``, ``gamma_x``
or ``sigma_x`` means *several excitons* (one entry each); pass a walker batch as an
ndarray.  Map-level outputs have shape ``S + (A, [K,] E)`` for ``A``
in-plane points, ``K`` basis columns and ``E`` energies.

Memory layout
-------------
:func:`emission_basis` and :func:`reflectance_basis` return a :class:`MapBasis`, a
lazily evaluated ``(W, A, K, E)`` array: it stores only per-``(W, A, K)`` numbers (pole
positions, widths and residues) and evaluates blocks of rows on demand.
:func:`project_linear` consumes it block by block, so the full ``(W, A, K, E)`` array
is never formed and each block stays in the processor cache while its Gram matrices
are accumulated.  ``numpy.asarray(basis)`` materialises the whole array when wanted.

Compiled path
-------------
The bases built here also carry the few numbers a compiled kernel needs
(:mod:`polkit.numerics.kernels`, numba): it evaluates each row's line shapes and
accumulates its Gram sums in one pass over the energy axis, then solves the small
problems in closed form, with the same formulas as the numpy path (the tests hold the
two to rounding).  For three oscillators (two excitons) the branch poles and photon
residues of the whole-map bases are compiled too (:mod:`polkit.numerics.kernels3`: the
roots of the characteristic cubic and ``(z - x1)(z - x2) / D'(z)``, held to
``numpy.linalg.eig`` to 1e-10 by the tests); :func:`branch_poles` keeps the numpy
eigen-solver as the reference.  It is used whenever numba imports; ``POLKIT_COMPILED=0`` (or
``polkit.numerics.kernels.use_compiled(False)``) selects the numpy path.  A basis built
another way (an ndarray, or a :class:`MapBasis` from elsewhere) always takes the numpy
path.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from itertools import combinations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import wofz

from polkit.errors import DataError
from polkit.models.dispersion import cavity_energy, coupled_modes, two_mode_eigenvalues

__all__ = [
    "exciton_propagator",
    "photon_green",
    "photon_spectral_function",
    "branch_poles",
    "MapBasis",
    "emission_basis",
    "reflectance_basis",
    "LinearSolution",
    "WeightedMap",
    "prepare_map",
    "project_linear",
    "SimulatedMap",
    "simulate_map",
]

logger = logging.getLogger(__name__)

_SQRT_HALF_PI = np.sqrt(0.5 * np.pi)
_SQRT2 = np.sqrt(2.0)
#: number of float64 elements per evaluated basis block (~400 kB, fits in L2 cache)
_BLOCK_ELEMENTS = 48_000
#: relative pivot below which a sub-problem of the projection counts as singular
_RTOL_SINGULAR = 1e-10


# --------------------------------------------------------------------------------------
# Green's function of the photon
# --------------------------------------------------------------------------------------
def _modes(value) -> list:
    return list(value) if isinstance(value, (list, tuple)) else [value]


def _exciton_lists(e_x, g, gamma_x, sigma_x):
    ex, gs, gx = _modes(e_x), _modes(g), _modes(gamma_x)
    sx = [None] if sigma_x is None else _modes(sigma_x)
    n = len(ex)
    if len(gx) == 1:
        gx = gx * n
    if len(sx) == 1:
        sx = sx * n
    if not (len(gs) == len(gx) == len(sx) == n):
        raise DataError(
            f"expected one value per exciton ({n} exciton energies), found {len(gs)} "
            f"coupling(s), {len(gx)} linewidth(s) and {len(sx)} disorder width(s). "
            "Pass lists of equal length (or a single shared linewidth/disorder).",
            field="g",
        )
    return ex, gs, gx, sx


def exciton_propagator(
    energy_ev: ArrayLike,
    e_x: ArrayLike,
    gamma_x: ArrayLike,
    sigma_x: ArrayLike | None = None,
) -> NDArray:
    """Exciton propagator, optionally averaged over a Gaussian distribution of exciton energies.

    Without disorder, ``S(E) = 1 / (E - E_X + i gamma_X / 2)``.  With a Gaussian
    inhomogeneous distribution ``N(x; E_X, sigma)`` of exciton energies::

        S(E) = int N(x; E_X, sigma) / (E - x + i gamma_X/2) dx
             = -i sqrt(pi/2) / sigma * w((E - E_X + i gamma_X/2) / (sqrt(2) sigma))

    with ``w`` the Faddeeva function (:func:`scipy.special.wofz`).  Source: the
    integral representation ``w(z) = (i/pi) int exp(-t^2) / (z - t) dt`` for
    ``Im z > 0`` (Abramowitz and Stegun 7.1.4); the same construction underlies the
    Voigt profile.  Where ``sigma_x == 0`` the Lorentzian form is used.

    Parameters
    ----------
    energy_ev
        Energy, eV.
    e_x
        Mean exciton energy, eV.
    gamma_x
        Homogeneous exciton FWHM, eV.
    sigma_x
        Standard deviation of the Gaussian exciton-energy disorder, eV (``None`` or 0:
        no disorder).

    Returns
    -------
    ndarray of complex
        ``S(E)`` in 1/eV, broadcast over the arguments.
    """
    z = (np.asarray(energy_ev, float) - np.asarray(e_x, float)) + 0.5j * np.asarray(gamma_x, float)
    if sigma_x is None:
        return 1.0 / z
    sigma = np.asarray(sigma_x, float)
    if np.any(sigma < 0):
        raise DataError(f"expected sigma_x >= 0 eV, found min {sigma.min():.3g}.", field="sigma_x")
    positive = sigma > 0
    if np.all(positive):
        return (-1j * _SQRT_HALF_PI / sigma) * wofz(z / (_SQRT2 * sigma))
    safe = np.where(positive, sigma, 1.0)
    averaged = (-1j * _SQRT_HALF_PI / safe) * wofz(z / (_SQRT2 * safe))
    return np.where(positive, averaged, 1.0 / z)


def photon_green(
    energy_ev: ArrayLike,
    e_c: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    *,
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
) -> NDArray:
    """Photon-photon element ``G_CC(E)`` of the resolvent of the coupled-oscillator Hamiltonian.

    One photon coupled to N excitons that couple only to the photon::

        G_CC(E) = 1 / (E - E_C + i gamma_C/2 - sum_j g_j^2 S_j(E))

    with ``S_j`` from :func:`exciton_propagator`.  For one Lorentzian exciton this is
    evaluated in the closed form ``(E - E_X + i gamma_X/2) /
    ((E - E_C + i gamma_C/2)(E - E_X + i gamma_X/2) - g^2)`` (the photon element of the resolvent
    ``(E - H)^-1`` of the coupled-oscillator matrix, by Cramer's rule).
    Source: resolvent of the two-level (N-level) Hamiltonian by the Schur complement,
    e.g. Savona et al., Solid State Commun. 93, 733 (1995).

    Pure broadcasting: the caller lines up the axes (e.g. ``energy_ev`` of shape ``(E,)``
    and parameters of shape ``(W, A, 1)``).

    Parameters
    ----------
    energy_ev
        Energy, eV.
    e_c
        Cavity energy (angle-dependent if wanted), eV.
    e_x, g, gamma_x
        Exciton energy, coupling and FWHM, eV; a list/tuple of arrays for several
        excitons (a single ``gamma_x`` is shared).
    gamma_c
        Cavity FWHM, eV.
    sigma_x
        Gaussian exciton-energy disorder (standard deviation, eV), one shared or a list.

    Returns
    -------
    ndarray of complex
        ``G_CC`` in 1/eV.
    """
    ex, gs, gx, sx = _exciton_lists(e_x, g, gamma_x, sigma_x)
    energy = np.asarray(energy_ev, float)
    cav = energy - np.asarray(e_c, float) + 0.5j * np.asarray(gamma_c, float)
    if len(ex) == 1 and sx[0] is None:
        xt = energy - np.asarray(ex[0], float) + 0.5j * np.asarray(gx[0], float)
        return xt / (cav * xt - np.square(np.asarray(gs[0], float)))
    total = cav
    for e, c, w, s in zip(ex, gs, gx, sx, strict=True):
        total = total - np.square(np.asarray(c, float)) * exciton_propagator(energy, e, w, s)
    return 1.0 / total


def photon_spectral_function(
    energy_ev: ArrayLike,
    e_c: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    *,
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
) -> NDArray:
    """Photon spectral function ``A_C(E) = -Im G_CC(E) / pi`` (1/eV).

    It carries the photon-fraction weight of each branch and integrates to 1 over
    energy (sum rule).  Arguments as in :func:`photon_green`.

    Returns
    -------
    ndarray
        ``A_C`` in 1/eV.
    """
    return -photon_green(energy_ev, e_c, e_x, g, gamma_c, gamma_x, sigma_x=sigma_x).imag / np.pi


# --------------------------------------------------------------------------------------
# Parameters of a map model
# --------------------------------------------------------------------------------------
def _strip(p) -> NDArray:
    a = np.asarray(p, dtype=float)
    while a.ndim > 1 and a.shape[-1] == 1:
        a = a[..., 0]
    return a


def _check_physics(flat: dict, angles) -> None:
    """Refuse parameters outside the model's domain (cheap: (W,) arrays only)."""
    def values(name):
        v = flat.get(name)
        return [] if v is None else (v if isinstance(v, list) else [v])

    # one comparison per group first (this runs at every likelihood call); the loops
    # that name the offending parameter run only when something is wrong
    groups = (("sigma_x", "kappa", "g"), ("e_c0", "e_x", "gamma_c", "gamma_x"))
    lowest = [np.concatenate([v for name in names for v in values(name)]).min()
              for names in groups]
    if not lowest[0] >= 0:  # NaN fails too
        for name in groups[0]:
            for v in values(name):
                if np.any(~(v >= 0)):
                    raise DataError(f"expected {name} >= 0 eV (a width or coupling), found "
                                    f"{v[~(v >= 0)][0]!r}.", field=name)
    # a zero linewidth is a delta line that no pixel grid can represent
    if not lowest[1] > 0:
        for name in groups[1]:
            for v in values(name):
                if np.any(~(v > 0)):
                    raise DataError(f"expected {name} > 0 eV, found {v[~(v > 0)][0]!r}.",
                                    field=name)
    n_eff = flat["n_eff"]
    limit = 0.0 if angles is None or angles.size == 0 else np.abs(np.sin(np.deg2rad(angles))).max()
    if not n_eff.min() > limit:
        raise DataError(
            f"expected n_eff > |sin(angle)| = {limit:.3g} for every angle of the map (and > 0), "
            f"found {n_eff[~(n_eff > limit)][0]!r}.", field="n_eff")


def _prepare(in_plane, energy_ev, axis: str, params: dict):
    """Flatten the parameters to a (W,) batch and compute the cavity energy (W, A)."""
    if axis not in ("angle", "k"):
        raise DataError(f"expected axis 'angle' (degree) or 'k' (1/um), found {axis!r}.",
                        field="axis")
    grid = np.asarray(in_plane, dtype=float)
    if grid.ndim != 1:
        raise DataError(f"expected a 1-D {axis} axis, found shape {grid.shape}.", field=axis)
    energy = None
    if energy_ev is not None:
        energy = np.asarray(energy_ev, dtype=float)
        if energy.ndim != 1:
            raise DataError(f"expected a 1-D energy axis, found shape {energy.shape}.",
                            field="energy")
    flat: dict = {}
    shapes = []
    for name, value in params.items():
        if value is None:
            flat[name] = None
            continue
        if isinstance(value, (list, tuple)):
            flat[name] = [_strip(v) for v in value]
            shapes += [v.shape for v in flat[name]]
        else:
            flat[name] = _strip(value)
            shapes.append(flat[name].shape)
    try:
        batch = shapes[0] if shapes.count(shapes[0]) == len(shapes) else np.broadcast_shapes(
            *shapes)
    except ValueError as exc:
        raise DataError(
            "expected physics parameters of one batch shape (e.g. all (W,)), found shapes "
            f"{sorted(set(shapes))}.", field="parameters") from exc
    n = int(np.prod(batch)) if batch else 1

    def one(x):  # read-only views of the caller's arrays
        x = x.reshape(n) if x.shape == batch else np.broadcast_to(x, batch).reshape(n)
        if x.flags.writeable:
            x = x.view()
            x.flags.writeable = False
        return x

    def flatten(v):
        if v is None:
            return None
        if isinstance(v, list):
            return [one(x) for x in v]
        return one(v)

    flat = {k: flatten(v) for k, v in flat.items()}
    _check_physics(flat, grid if axis == "angle" else None)
    kw = {"angle_deg": grid} if axis == "angle" else {"k": grid}
    e_c = cavity_energy(flat["e_c0"][:, None], flat["n_eff"][:, None], **kw)
    return batch, n, grid, energy, flat, e_c


def _poles_flat(e_c, flat, compiled: bool = False):
    """Poles (W, A, K) and photon residues of the Lorentzian model.

    ``compiled`` lets three oscillators take the compiled poles of
    :mod:`polkit.numerics.kernels3` (when the kernels are on); the whole-map bases ask for
    it.  :func:`branch_poles` does not: it stays the numpy reference (``numpy.linalg.eig``)
    that the peak-table path and the figures read.
    """
    ex, gs, gx, _ = _exciton_lists(flat["e_x"], flat["g"], flat["gamma_x"], None)
    gc = flat["gamma_c"][:, None]
    if len(ex) == 1:
        x, g, w = ex[0][:, None], gs[0][:, None], gx[0][:, None]
        lo, up = two_mode_eigenvalues(e_c, x, g, gc, w)
        # r_lo = (lo - E_X + i gamma_X/2) / (lo - up) = (root - half) / (2 root) and
        # r_up = (root + half) / (2 root), with half the complex half-detuning and root
        # the square root of two_mode_eigenvalues (the same operations, so the same
        # bits).  Written that way, and with the smaller factor taken from
        # (root - half)(root + half) = g^2, no eV-sized energies are subtracted: far from
        # resonance (and at g = 0) the small residue keeps its full relative precision.
        half = 0.5 * ((e_c - x) - 0.5j * (gc - w))
        root = np.sqrt(g * g + half * half)
        minus, plus = root - half, root + half
        gg = (g * g).astype(complex)
        with np.errstate(divide="ignore", invalid="ignore"):
            plus_larger = np.abs(plus) >= np.abs(minus)
            minus = np.where(plus_larger, gg / plus, minus)
            plus = np.where(plus_larger, plus, gg / minus)
            residues = np.stack([minus / (2.0 * root), plus / (2.0 * root)], axis=-1)
        poles = np.stack([lo, up], axis=-1)
        return poles, residues
    if len(ex) == 2 and compiled:
        three = _compiled_three_modes()
        if three is not None:
            # compiled: Cardano's roots of det(z - H), Newton-polished, and the residues
            # (z - x1)(z - x2) / D'(z); rows it flags go through numpy.linalg.eig below
            poles, residues, bad = three.three_mode_poles(e_c, flat["gamma_c"], ex, gs, gx)
            if bad.any():
                wi, ai = np.nonzero(bad)
                modes = coupled_modes(
                    e_c[wi, ai], [x[wi] for x in ex], [c[wi] for c in gs], gc[wi, 0],
                    [w[wi] for w in gx])
                poles[wi, ai] = modes.energies
                residues[wi, ai] = modes.residues
            return poles, residues
    modes = coupled_modes(
        e_c, [x[:, None] for x in ex], [c[:, None] for c in gs], gc, [w[:, None] for w in gx]
    )
    return modes.energies, modes.residues


def _compiled_three_modes():
    """The compiled three-oscillator pole module if it should be used, else None."""
    from polkit.numerics import kernels3 as _kernels3  # imported on first use: it loads numba

    return _kernels3 if _kernels3.enabled() else None


def branch_poles(
    in_plane: ArrayLike,
    *,
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    axis: str = "angle",
) -> tuple[NDArray, NDArray]:
    """Complex branch energies and photon residues along the in-plane axis of a map.

    The cavity follows :func:`polkit.models.dispersion.cavity_energy`; for one exciton
    the poles are the closed-form :func:`two_mode_eigenvalues` and the residues
    ``r_lo = (eps_lo - E_X + i gamma_X/2) / (eps_lo - eps_up)``, ``r_up = 1 - r_lo``
    (partial fractions of the closed-form ``G_CC``); for several excitons they come
    from :func:`coupled_modes`.  ``G_CC(E) = sum_b r_b / (E - eps_b)``.

    Parameters
    ----------
    in_plane
        1-D angle (degree) or k (1/um) axis, see ``axis``.
    e_c0, n_eff, e_x, g, gamma_c, gamma_x
        Physics parameters (eV; ``n_eff`` dimensionless), batch shape ``S``; ``e_x``,
        ``g`` (and ``gamma_x``) may be lists for several excitons.
    axis
        ``"angle"`` (degree, default) or ``"k"`` (1/um).

    Returns
    -------
    poles, residues : ndarray of complex, shape ``S + (A, K)``
        Branches sorted by real part (``K = N + 1``).
    """
    batch, _, grid, _, flat, e_c = _prepare(
        in_plane, None, axis,
        {"e_c0": e_c0, "n_eff": n_eff, "e_x": e_x, "g": g, "gamma_c": gamma_c,
         "gamma_x": gamma_x},
    )
    poles, res = _poles_flat(e_c, flat)
    k = poles.shape[-1]
    return poles.reshape(batch + (grid.size, k)), res.reshape(batch + (grid.size, k))


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


def _lorentz_block(en, xr, h2, ah, b):
    """B = (a h - b u) / (u^2 + h^2), u = E - x, evaluated with two temporaries."""

    def block(ws: slice, as_: slice) -> NDArray:
        u = en - xr[ws, as_, :, None]
        den = np.multiply(u, u)
        den += h2[ws, as_, :, None]
        u *= b[ws, as_, :, None]
        np.subtract(ah[ws, as_, :, None], u, out=u)
        u /= den
        return u

    return block


def _lorentz_coefficients(poles, residues):
    xr = np.ascontiguousarray(poles.real)
    hw = -poles.imag
    a = residues.real / np.pi
    b = np.ascontiguousarray(residues.imag / np.pi)
    return xr, hw * hw, a * hw, b


def _self_energy_flat(energy, flat, sigma_x):
    """sum_j g_j^2 S_j(E), shape (W, E), complex."""
    ex, gs, gx, sx = _exciton_lists(flat["e_x"], flat["g"], flat["gamma_x"], sigma_x)
    total = 0.0
    for e, c, w, s in zip(ex, gs, gx, sx, strict=True):
        s_col = None if s is None else s[:, None]
        prop = exciton_propagator(energy, e[:, None], w[:, None], s_col)
        total = total + (c * c)[:, None] * prop
    return total


def _green_base(energy, flat, sigma_x):
    """``E + i gamma_C / 2 - Sigma(E)``, shape (W, E): G_CC = 1 / (base - E_C)."""
    return energy + 0.5j * flat["gamma_c"][:, None] - _self_energy_flat(energy, flat, sigma_x)


def _green_block(base):
    """Returns block(ws, as_) -> G_CC of shape (w, a, E) from the (W, E) base row."""
    base = base[:, None, :]  # (W, 1, E)

    def block(ws: slice, as_: slice, e_c) -> NDArray:
        den = base[ws] - e_c[ws, as_, None]
        return np.reciprocal(den, out=den)

    return block


def emission_basis(
    in_plane: ArrayLike,
    energy_ev: ArrayLike,
    *,
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
    axis: str = "angle",
) -> MapBasis:
    """Per-branch photon spectral functions of a map, the emission basis.

    For branch ``b`` with complex energy ``eps_b`` and photon residue ``r_b``
    (:func:`branch_poles`)::

        B_b(theta, E) = -Im(r_b / (E - eps_b)) / pi,       sum_b B_b = A_C = -Im G_CC / pi

    so that emission ``= sum_b n_b(theta) B_b + background`` with a free occupation per
    branch and angle.  Each ``B_b`` integrates to ``Re r_b`` (its photon weight) over
    energy.  Source: partial fractions of the resolvent; the photon spectral function
    is ``A_C = -Im G_CC / pi`` (the spectral function of a retarded Green's function, normalised
    to unit area; e.g. Mahan, Many-Particle Physics, 3rd ed., 2000, ch. 2).

    With exciton disorder (``sigma_x``) the Green's function has no discrete poles;
    then each branch is *defined* as its share of the photon spectral weight in the
    disorder-free model at the same point, ``B_b = A_C^sigma * B_b^0 / A_C^0``.  The
    branch sum is exactly ``A_C^sigma`` and each branch tends to ``B_b^0`` as
    ``sigma -> 0``.

    Parameters
    ----------
    in_plane
        1-D angle (degree) or k (1/um) axis of length ``A``, see ``axis``.
    energy_ev
        1-D energy axis of length ``E``, eV.
    e_c0
        Cavity energy at normal incidence, eV.
    n_eff
        Effective index of the cavity mode.
    e_x, g, gamma_x
        Exciton energy, coupling (Rabi splitting ``2 g``) and FWHM, eV; lists for
        several excitons (a single ``gamma_x`` is shared).  Linewidths must be > 0 (a
        zero-width line cannot be represented on a pixel grid).
    gamma_c
        Cavity FWHM, eV (> 0).
    sigma_x
        Gaussian exciton-energy disorder (standard deviation, eV) or ``None``.
    axis
        ``"angle"`` (degree, default) or ``"k"`` (1/um).

    Returns
    -------
    MapBasis
        Lazy ``S + (A, K, E)`` basis (1/eV), ``K = N + 1`` branches sorted by energy.
    """
    batch, n, grid, energy, flat, e_c = _prepare(
        in_plane, energy_ev, axis,
        {"e_c0": e_c0, "n_eff": n_eff, "e_x": e_x, "g": g, "gamma_c": gamma_c,
         "gamma_x": gamma_x, "sigma_x": sigma_x},
    )
    poles, residues = _poles_flat(e_c, flat, compiled=True)
    k = poles.shape[-1]
    coefficients = _lorentz_coefficients(poles, residues)
    lorentz = _lorentz_block(energy, *coefficients)
    names = ("lower", "upper") if k == 2 else ("lower", "middle", "upper") if k == 3 else tuple(
        f"branch{i}" for i in range(k))
    if flat["sigma_x"] is None:
        block = lorentz
        fused = ("lorentz", (energy, *coefficients))
    else:
        base = _green_base(energy, flat, flat["sigma_x"])
        green = _green_block(base)

        def block(ws: slice, as_: slice) -> NDArray:
            parts = lorentz(ws, as_)
            share = parts.sum(axis=2, keepdims=True)
            a_sigma = green(ws, as_, e_c).imag[:, :, None, :] * (-1.0 / np.pi)
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(share != 0, a_sigma / share, 0.0)
            parts *= ratio
            return parts

        fused = ("disorder", (energy, *coefficients, base, e_c))
    basis = MapBasis(batch, grid.size, k, energy, block, kind="emission", columns=names)
    basis._fused = fused
    return basis


def reflectance_basis(
    in_plane: ArrayLike,
    energy_ev: ArrayLike,
    *,
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    kappa: ArrayLike,
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
    axis: str = "angle",
) -> MapBasis:
    """Reflectance basis ``|1 - i kappa G_CC(theta, E)|^2`` (one column).

    The reflection amplitude of a cavity seen through its top mirror is
    ``r = r_bg (1 - i kappa G_CC)`` (input-output theory for a single-sided cavity,
    Walls and Milburn, Quantum Optics, 2nd ed., 2008, ch. 7), so
    ``R = s(theta) |1 - i kappa G_CC|^2 + b(theta)`` with a
    scale ``s = |r_bg|^2`` and an offset ``b`` that are solved linearly per angle.
    ``kappa`` (eV) is the top-mirror part of the cavity FWHM: for a bare cavity the
    dip at resonance reaches ``(1 - 2 kappa / gamma_C)^2`` (zero at critical coupling
    ``kappa = gamma_C / 2``); a passive cavity has ``0 <= kappa <= gamma_C``.

    Parameters
    ----------
    in_plane
        1-D angle (degree) or k (1/um) axis of length ``A``, see ``axis``.
    energy_ev
        1-D energy axis of length ``E``, eV.
    e_c0
        Cavity energy at normal incidence, eV.
    n_eff
        Effective index of the cavity mode.
    e_x, g, gamma_x
        Exciton energy, coupling (Rabi splitting ``2 g``) and FWHM, eV; lists for
        several excitons (a single ``gamma_x`` is shared).  Linewidths must be > 0 (a
        zero-width line cannot be represented on a pixel grid).
    gamma_c
        Cavity FWHM, eV (> 0).
    sigma_x
        Gaussian exciton-energy disorder (standard deviation, eV) or ``None``.
    axis
        ``"angle"`` (degree, default) or ``"k"`` (1/um).
    kappa
        Top-mirror coupling, eV.

    Returns
    -------
    MapBasis
        Lazy ``S + (A, 1, E)`` basis (dimensionless).
    """
    batch, n, grid, energy, flat, e_c = _prepare(
        in_plane, energy_ev, axis,
        {"e_c0": e_c0, "n_eff": n_eff, "e_x": e_x, "g": g, "gamma_c": gamma_c,
         "gamma_x": gamma_x, "sigma_x": sigma_x, "kappa": kappa},
    )
    base = _green_base(energy, flat, flat["sigma_x"])
    green = _green_block(base)
    kap = flat["kappa"][:, None, None]

    def block(ws: slice, as_: slice) -> NDArray:
        gcc = green(ws, as_, e_c)
        gcc *= -1j * kap[ws]
        gcc += 1.0
        out = np.square(gcc.real)
        out += np.square(gcc.imag)
        return out[:, :, None, :]

    basis = MapBasis(batch, grid.size, 1, energy, block, kind="reflectance",
                     columns=("cavity",))
    basis._fused = ("reflectance", (base, e_c, flat["kappa"]))
    return basis


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
    if isinstance(basis, MapBasis):
        batch = basis.batch_shape
        n_w, n_a, n_k = basis.n_walkers, basis.n_in_plane, basis.n_columns
        n_e = basis.energy_ev.size
        get = basis.block
        if energy_ev is None:
            energy_ev = basis.energy_ev
    else:
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
    m = data.columns.shape[1]
    sw, rhs = data.sqrt_weight, data.weighted_rhs

    kernels = _compiled_kernels(basis)
    if kernels is not None:  # fused compiled pass: line shapes and Gram sums together
        mode, args = basis._fused
        gram = {"lorentz": kernels.gram_lorentz, "disorder": kernels.gram_disorder,
                "reflectance": kernels.gram_reflectance}[mode]
        g_bb, cross = gram(*args, sw, rhs)
    else:
        g_bb = np.empty((n_w, n_a, n_k, n_k))
        cross = np.empty((n_w, n_a, n_k, m + 1))
        for ws, as_ in _iter_blocks(n_w, n_a, n_k * n_e):
            blk = get(ws, as_)
            blk *= sw[as_, None, :]
            g_bb[ws, as_] = _rowdot(blk[..., :, None, :], blk[..., None, :, :])
            cross[ws, as_] = _rowdot(blk[..., :, None, :], rhs[as_, None, :, :])

    if kernels is not None and n_k <= kernels.MAX_SOLVE_COLUMNS:
        chi2_angle, amps = kernels.solve_rows(
            g_bb, cross, data.background_pinv, data.h_background, data.chi2_background,
            nonneg=nonneg, rtol=_RTOL_SINGULAR)
    else:
        chi2_angle, amps = _solve_rows(g_bb, cross, data, nonneg)
    chi2 = chi2_angle.sum(axis=-1).reshape(batch)
    if not return_parts:
        return chi2

    if m:
        resid_h = data.h_background[None] - np.einsum("wakj,wak->waj", cross[..., :m], amps)
        coef = np.einsum("aij,waj->wai", data.background_pinv, resid_h)
    else:
        coef = np.zeros((n_w, n_a, 0))
    model = np.einsum("waj,ej->wae", coef, data.columns)
    for ws, as_ in _iter_blocks(n_w, n_a, n_k * n_e):
        model[ws, as_] += np.einsum("wak,wake->wae", amps[ws, as_], get(ws, as_))
    return LinearSolution(
        chi2=chi2,
        chi2_per_angle=chi2_angle.reshape(batch + (n_a,)),
        amplitudes=amps.reshape(batch + (n_a, n_k)),
        background=coef.reshape(batch + (n_a, m)),
        model=model.reshape(batch + (n_a, n_e)),
    )


# --------------------------------------------------------------------------------------
# Noiseless maps
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class SimulatedMap:
    """A noiseless map and its parts, from :func:`simulate_map`.

    Attributes
    ----------
    signal
        The map, shape ``S + (A, E)``.
    components
        Each basis column times its amplitude, shape ``S + (A, K, E)`` (emission: one
        per branch; reflectance: the single scaled column).
    background
        The background added, shape ``S + (A, E)``.
    poles
        Complex branch energies of the Lorentzian model, shape ``S + (A, K_branches)``, eV.
    residues
        Their photon residues (``Re`` is the photon weight), same shape.
    columns
        Names of the component columns.
    """

    signal: NDArray
    components: NDArray
    background: NDArray
    poles: NDArray
    residues: NDArray
    columns: tuple[str, ...]


def simulate_map(
    in_plane: ArrayLike,
    energy_ev: ArrayLike,
    *,
    kind: str = "emission",
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    e_x: ArrayLike | Sequence[ArrayLike],
    g: ArrayLike | Sequence[ArrayLike],
    gamma_c: ArrayLike,
    gamma_x: ArrayLike | Sequence[ArrayLike],
    amplitudes: ArrayLike = 1.0,
    background: ArrayLike = 0.0,
    kappa: ArrayLike | None = None,
    sigma_x: ArrayLike | Sequence[ArrayLike] | None = None,
    axis: str = "angle",
) -> SimulatedMap:
    """Noiseless emission or reflectance map of the linear model, with its parts.

    Emission: ``I = sum_b n_b(theta) B_b(theta, E) + background(theta)`` with ``B_b`` from
    :func:`emission_basis`.  Reflectance: ``R = s(theta) |1 - i kappa G_CC|^2 +
    background(theta)`` (:func:`reflectance_basis`).  The same bases are used by the fit,
    so a fit of a simulated map with known truth tests the whole chain.

    Parameters
    ----------
    in_plane, energy_ev, e_c0, n_eff, e_x, g, gamma_c, gamma_x, sigma_x, axis
        As in :func:`emission_basis` (eV; degree or 1/um).
    kind
        ``"emission"`` or ``"reflectance"``.
    amplitudes
        Emission: occupations ``n_b`` broadcastable to ``(A, K)`` (e.g. ``[1.0, 0.2]`` for a
        dimmer upper branch), in signal units times eV.  Reflectance: the scale ``s``,
        broadcastable to ``(A,)``.
    background
        Constant background per in-plane point, scalar or shape ``(A,)``.
    kappa
        Top-mirror coupling, eV (required for reflectance).

    Returns
    -------
    SimulatedMap
        Signal ``S + (A, E)`` and its parts.
    """
    phys = {"e_c0": e_c0, "n_eff": n_eff, "e_x": e_x, "g": g, "gamma_c": gamma_c,
            "gamma_x": gamma_x, "sigma_x": sigma_x, "axis": axis}
    if kind == "emission":
        basis = emission_basis(in_plane, energy_ev, **phys)
        amp_shape = (basis.n_in_plane, basis.n_columns)
    elif kind == "reflectance":
        if kappa is None:
            raise DataError("expected kappa (top-mirror coupling, eV) for a reflectance map, "
                            "found None.", field="kappa")
        basis = reflectance_basis(in_plane, energy_ev, kappa=kappa, **phys)
        amp_shape = (basis.n_in_plane, 1)
    else:
        raise DataError(f"expected kind 'emission' or 'reflectance', found {kind!r}.",
                        field="kind")
    a = np.asarray(amplitudes, dtype=float)
    if kind == "reflectance" and a.ndim == 1:
        a = a[:, None]
    try:
        a = np.broadcast_to(a, amp_shape)
    except ValueError as exc:
        raise DataError(f"expected amplitudes broadcastable to {amp_shape}, found shape "
                        f"{np.shape(amplitudes)}.", field="amplitudes") from exc
    try:
        bg = np.broadcast_to(np.asarray(background, dtype=float), (basis.n_in_plane,))
    except ValueError as exc:
        raise DataError(f"expected a scalar or one background per in-plane point "
                        f"({basis.n_in_plane}), found shape {np.shape(background)}.",
                        field="background") from exc
    cols = basis.to_array()  # S + (A, K, E)
    components = cols * a[..., None]
    bg_map = np.broadcast_to(bg[:, None], components.shape[:-2] + (components.shape[-1],))
    signal = components.sum(axis=-2) + bg_map
    poles, residues = branch_poles(in_plane, e_c0=e_c0, n_eff=n_eff, e_x=e_x, g=g,
                                   gamma_c=gamma_c, gamma_x=gamma_x, axis=axis)
    return SimulatedMap(signal=signal, components=components, background=np.array(bg_map),
                        poles=poles, residues=residues, columns=basis.columns)
