"""Whole-map spectral model: branch poles and the emission and reflectance bases.

This is the physics of every dispersion fit.  A map (angle or k) x energy is modelled
as a sum of a few *basis* columns per angle, each a fixed function of energy for given
physics parameters, times amplitudes that enter linearly:

* emission:    ``I(theta, E) = sum_b n_b(theta) B_b(theta, E) + background(theta, E)``
* reflectance: ``R(theta, E) = s(theta) |1 - i kappa G_CC(theta, E)|^2 + b(theta)``

The bases come from the photon Green's function (:mod:`polkit.models.green`); the
amplitudes (``n_b``, ``s``) and the background are solved per angle by the variable
projection of :mod:`polkit.numerics.projection`, so the sampler only sees the physics
parameters.  Noiseless maps of the same model: :mod:`polkit.models.simulate`.

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
:func:`emission_basis` and :func:`reflectance_basis` return a
:class:`~polkit.numerics.projection.MapBasis`, a lazily evaluated ``(W, A, K, E)`` array:
it stores only per-``(W, A, K)`` numbers (pole positions, widths and residues) and
evaluates blocks of rows on demand (see :mod:`polkit.numerics.projection`).

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
another way (an ndarray, or a :class:`~polkit.numerics.projection.MapBasis` from
elsewhere) always takes the numpy path.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit.errors import DataError
from polkit.models.dispersion import cavity_energy, coupled_modes, two_mode_eigenvalues
from polkit.models.green import _exciton_lists, exciton_propagator
from polkit.numerics.projection import MapBasis

__all__ = [
    "branch_poles",
    "emission_basis",
    "reflectance_basis",
]

logger = logging.getLogger(__name__)


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
# Branch bases of a map
# --------------------------------------------------------------------------------------
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
    if flat["sigma_x"] is None:
        return emission_basis_from_poles(poles, residues, energy, batch=batch)
    k = poles.shape[-1]
    coefficients = _lorentz_coefficients(poles, residues)
    lorentz = _lorentz_block(energy, *coefficients)
    names = _branch_names(k)
    # exciton disorder: each branch its share of the photon spectral weight
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


def _branch_names(k: int) -> tuple[str, ...]:
    return ("lower", "upper") if k == 2 else ("lower", "middle", "upper") if k == 3 else tuple(
        f"branch{i}" for i in range(k))


def emission_basis_from_poles(poles: NDArray, residues: NDArray, energy_ev: NDArray, *,
                              batch: tuple[int, ...] | None = None) -> MapBasis:
    """The emission basis of :func:`emission_basis` from its branch poles and photon residues.

    For callers that compute the poles themselves (a compiled kernel of the same formulas);
    no exciton disorder.  ``poles`` and ``residues`` are complex, shape ``(W, A, K)``,
    ``energy_ev`` the 1-D energy axis (eV); ``batch`` the batch shape (default ``(W,)``).
    """
    energy = np.asarray(energy_ev, dtype=float)
    k = poles.shape[-1]
    coefficients = _lorentz_coefficients(poles, residues)
    basis = MapBasis(batch if batch is not None else (poles.shape[0],), poles.shape[1], k,
                     energy, _lorentz_block(energy, *coefficients), kind="emission",
                     columns=_branch_names(k))
    basis._fused = ("lorentz", (energy, *coefficients))
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
    in_plane, energy_ev, e_c0, n_eff, e_x, g, gamma_c, gamma_x, sigma_x, axis
        As in :func:`emission_basis`.
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
