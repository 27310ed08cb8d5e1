"""The weak-coupling alternative of a whole map: the bare cavity mode and the bare exciton.

Model comparison asks whether the coupled-oscillator picture is needed at all.  Its
alternative here is the map the sample would show with no coupling (``g = 0``): the
cavity photon dispersing with angle and the exciton line flat in angle, each with its own
free amplitude per angle (emission: occupations; reflectance: depths), so that a visible
exciton line is not held against the alternative.

* emission:    ``I(theta, E) = n_C(theta) L_C(theta, E) + n_X(theta) L_X(E) + background``
* reflectance: ``R(theta, E) = s(theta) |1 - i kappa / (E - E_C(theta) + i gamma_C / 2)|^2
  - d(theta) D_X(E) + background``

``L`` are unit-area Lorentzians (1/eV, FWHM ``gamma``); ``D_X`` is a Lorentzian of unit
height, a dip with a non-negative depth ``d``.  These are the ``g -> 0`` limits of the
branch bases of :mod:`polkit.models.spectral` (the cavity column is exactly the photon
spectral function of the bare cavity), except that the exciton keeps a column of its
own: with no coupling it is not seen through the cavity mode, only directly.

Shapes, units and the lazy :class:`~polkit.numerics.projection.MapBasis` layout are those of
:mod:`polkit.models.spectral`: energies and widths in eV, a batch ``(W,)`` of walkers.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit.errors import DataError
from polkit.models.dispersion import cavity_energy
from polkit.numerics.projection import MapBasis

__all__ = ["bare_mode_basis"]


def _flat(name: str, value: ArrayLike, batch: tuple[int, ...]) -> NDArray:
    arr = np.asarray(value, dtype=float)
    n = int(np.prod(batch)) if batch else 1
    return np.broadcast_to(arr, batch).reshape(n)


def bare_mode_basis(
    in_plane: ArrayLike,
    energy_ev: ArrayLike,
    *,
    e_c0: ArrayLike,
    n_eff: ArrayLike,
    e_x: ArrayLike,
    gamma_c: ArrayLike,
    gamma_x: ArrayLike,
    kappa: ArrayLike | None = None,
    axis: str = "angle",
) -> MapBasis:
    """Two-column basis of uncoupled modes (``g = 0``), emission or reflectance.

    Parameters
    ----------
    in_plane, energy_ev, axis
        As in :func:`polkit.models.spectral.emission_basis`.
    e_c0, n_eff
        Cavity energy at normal incidence (eV) and effective index.
    e_x
        Exciton energy, eV.
    gamma_c, gamma_x
        Cavity and exciton FWHM, eV (> 0).
    kappa
        Top-mirror coupling, eV: given, the basis is the reflectance form; ``None`` gives
        the emission form.

    Returns
    -------
    MapBasis
        Lazy ``S + (A, 2, E)`` basis (``S`` the parameters' batch shape) with columns
        ``("cavity", "exciton")``.
    """
    if axis not in ("angle", "k"):
        raise DataError(f"expected axis 'angle' (degree) or 'k' (1/um), found {axis!r}.",
                        field="axis")
    grid = np.asarray(in_plane, dtype=float)
    energy = np.asarray(energy_ev, dtype=float)
    if grid.ndim != 1 or energy.ndim != 1:
        raise DataError(
            f"expected 1-D {axis} and energy axes, found shapes {grid.shape} and {energy.shape}.",
            field="axes",
        )
    values = {"e_c0": e_c0, "n_eff": n_eff, "e_x": e_x, "gamma_c": gamma_c, "gamma_x": gamma_x}
    if kappa is not None:
        values["kappa"] = kappa
    try:
        batch = np.broadcast_shapes(*(np.shape(v) for v in values.values()))
    except ValueError as exc:
        raise DataError(
            "expected physics parameters of one batch shape (e.g. all (W,)), found shapes "
            f"{ {k: np.shape(v) for k, v in values.items()} }.", field="parameters") from exc
    flat = {k: _flat(k, v, batch) for k, v in values.items()}
    ec0, n_eff_, ex = flat["e_c0"], flat["n_eff"], flat["e_x"]
    gc, gx = flat["gamma_c"], flat["gamma_x"]
    for name, width in (("gamma_c", gc), ("gamma_x", gx)):
        if not np.all(np.isfinite(width)) or np.any(width <= 0):
            raise DataError(f"expected linewidths > 0, found {name} = {width.min():g} eV.",
                            field=name)
    kw = {"angle_deg": grid} if axis == "angle" else {"k": grid}
    e_c = cavity_energy(ec0[:, None], n_eff_[:, None], **kw)  # (W, A)
    hc, hx = 0.5 * gc, 0.5 * gx
    # the exciton column does not depend on the angle: (W, E)
    ux = energy[None, :] - ex[:, None]
    if kappa is None:
        lx = (hx[:, None] / np.pi) / (ux * ux + (hx * hx)[:, None])
    else:
        lx = -(hx * hx)[:, None] / (ux * ux + (hx * hx)[:, None])
        kap = flat["kappa"]

    def block(ws: slice, as_: slice) -> NDArray:
        u = energy[None, None, :] - e_c[ws, as_, None]  # (w, a, E)
        h = hc[ws, None, None]
        if kappa is None:
            cav = (h / np.pi) / (u * u + h * h)
        else:
            # |1 - i kappa / (u + i h)|^2 = (u^2 + (h - kappa)^2) / (u^2 + h^2)
            k = kap[ws, None, None]
            cav = (u * u + (h - k) ** 2) / (u * u + h * h)
        out = np.empty(cav.shape[:2] + (2, energy.size))
        out[:, :, 0, :] = cav
        out[:, :, 1, :] = lx[ws, None, :]
        return out

    return MapBasis(batch, grid.size, 2, energy, block,
                    kind="emission" if kappa is None else "reflectance",
                    columns=("cavity", "exciton"))
