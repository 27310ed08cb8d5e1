"""Noiseless emission and reflectance maps of the whole-map spectral model.

The same bases as the fit (:mod:`polkit.models.spectral`), times known amplitudes, plus a
background: a fit of a simulated map with known truth tests the whole chain.  Units as in
:mod:`polkit.models.spectral` (eV; in-plane axis in degree or 1/um).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit.errors import DataError
from polkit.models.spectral import branch_poles, emission_basis, reflectance_basis

__all__ = [
    "PHYSICS_OPTIONAL",
    "PHYSICS_REQUIRED",
    "SimulatedMap",
    "simulate_map",
]


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


#: physics keywords every simulated map needs (eV; ``n_eff`` dimensionless)
PHYSICS_REQUIRED = ("e_c0", "n_eff", "e_x", "g", "gamma_c", "gamma_x")
#: physics keywords that may be left out: exciton disorder, top-mirror coupling
PHYSICS_OPTIONAL = ("sigma_x", "kappa")


def _physics(given: dict) -> dict:
    """The physics keywords of :func:`simulate_map`, checked by name (``kappa`` left out)."""
    unknown = [name for name in given if name not in PHYSICS_REQUIRED + PHYSICS_OPTIONAL]
    if unknown:
        raise TypeError(f"simulate_map() got an unexpected keyword argument {unknown[0]!r}")
    missing = [name for name in PHYSICS_REQUIRED if name not in given]
    if missing:
        names = " and ".join(repr(name) for name in missing)
        raise TypeError(f"simulate_map() missing {len(missing)} required physics keyword "
                        f"argument(s): {names}")
    phys = {name: given[name] for name in PHYSICS_REQUIRED}
    phys["sigma_x"] = given.get("sigma_x")
    return phys


def simulate_map(
    in_plane: ArrayLike,
    energy_ev: ArrayLike,
    *,
    kind: str = "emission",
    amplitudes: ArrayLike = 1.0,
    background: ArrayLike = 0.0,
    axis: str = "angle",
    **physics: ArrayLike | Sequence[ArrayLike] | None,
) -> SimulatedMap:
    """Noiseless emission or reflectance map of the linear model, with its parts.

    Emission: ``I = sum_b n_b(theta) B_b(theta, E) + background(theta)`` with ``B_b`` from
    :func:`~polkit.models.spectral.emission_basis`.  Reflectance: ``R = s(theta) |1 - i kappa
    G_CC|^2 + background(theta)`` (:func:`~polkit.models.spectral.reflectance_basis`).  The
    same bases are used by the fit, so a fit of a simulated map with known truth tests the
    whole chain.

    Parameters
    ----------
    in_plane, energy_ev, axis
        As in :func:`~polkit.models.spectral.emission_basis` (degree or 1/um; eV).
    kind
        ``"emission"`` or ``"reflectance"``.
    amplitudes
        Emission: occupations ``n_b`` broadcastable to ``(A, K)`` (e.g. ``[1.0, 0.2]`` for a
        dimmer upper branch), in signal units times eV.  Reflectance: the scale ``s``,
        broadcastable to ``(A,)``.
    background
        Constant background per in-plane point, scalar or shape ``(A,)``.
    **physics
        The physics parameters by name, as in :func:`~polkit.models.spectral.emission_basis`
        (eV; ``n_eff`` dimensionless): required ``e_c0``, ``n_eff``, ``e_x``, ``g``,
        ``gamma_c``, ``gamma_x`` (:data:`PHYSICS_REQUIRED`); optional ``sigma_x``
        (exciton disorder, default None) and ``kappa`` (top-mirror coupling, eV; required
        for reflectance, unused for emission).  Any other name is a TypeError.

    Returns
    -------
    SimulatedMap
        Signal ``S + (A, E)`` and its parts.
    """
    phys = _physics(physics)
    kappa = physics.get("kappa")
    poles_kw = {name: phys[name] for name in PHYSICS_REQUIRED}
    phys["axis"] = axis
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
    poles, residues = branch_poles(in_plane, axis=axis, **poles_kw)
    return SimulatedMap(signal=signal, components=components, background=np.array(bg_map),
                        poles=poles, residues=residues, columns=basis.columns)
