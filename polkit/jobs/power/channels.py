"""The observables of a power series in fit space: sweep runs and channels.

A series is read in acquisition order as contiguous runs of one sweep label
(:func:`sweep_segments`); each observable the model fits (intensity, peak energy, linewidth)
becomes a :class:`Channel`: values in fit space, per-point errors, the mask of usable points
and the name of its noise parameter, with its Gaussian log-likelihood.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from polkit.errors import DataWarning

__all__ = ["MIN_POINTS", "sweep_segments", "Channel", "column", "channel"]

_LOG_2PI = math.log(2.0 * math.pi)
#: fewest usable points of a channel (and of a sweep) the job fits
MIN_POINTS = 3


def sweep_segments(series: xr.Dataset) -> list[tuple[int, int, str]]:
    """Contiguous runs of one sweep label, in acquisition order: ``[(start, stop, label)]``.

    A series without a ``sweep`` label is one run labelled ``"none"``.
    """
    n = int(series["power"].size)
    if "sweep" not in series.variables:
        return [(0, n, "none")]
    labels = [str(s) for s in np.asarray(series["sweep"].values).ravel()]
    out = []
    start = 0
    for i in range(1, n + 1):
        if i == n or labels[i] != labels[start]:
            out.append((start, i, labels[start]))
            start = i
    return out


@dataclass
class Channel:
    """One observable in fit space, with its per-point errors and its noise parameter.

    Attributes
    ----------
    name
        ``"intensity"``, ``"peak_energy"`` or ``"linewidth"``.
    values
        Observed values in fit space, shape ``(N,)``: intensity (or its natural log),
        peak energy in meV above ``e_ref``, linewidth in meV.  Unused points hold 0.
    sigma
        Per-point standard deviation in fit space (1 where no errors were given).
    used
        Boolean mask of the points that enter the likelihood.
    log_space
        Whether ``values`` are natural logs of the observable.
    has_errors
        Whether ``sigma`` came from an error column (the noise parameter is then a scale).
    noise_param
        Name of the sampled noise parameter.
    """

    name: str
    values: np.ndarray
    sigma: np.ndarray
    used: np.ndarray
    log_space: bool
    has_errors: bool
    noise_param: str
    _const: float = field(init=False, default=0.0)

    def __post_init__(self) -> None:
        n = int(self.used.sum())
        self._const = -float(np.sum(np.log(self.sigma[self.used]))) - 0.5 * n * _LOG_2PI

    @property
    def n_used(self) -> int:
        """Number of points in the likelihood."""
        return int(self.used.sum())

    def log_likelihood(self, model: np.ndarray, noise: np.ndarray) -> np.ndarray:
        """Gaussian log-likelihood of ``model`` (``(W, N)``, fit space) with noise ``(W,)``."""
        u = self.used
        r = (self.values[u] - model[:, u]) / self.sigma[u]
        chi2 = np.sum(r * r, axis=1)
        return -0.5 * chi2 / (noise * noise) - self.n_used * np.log(noise) + self._const

    def residuals(self, model: np.ndarray, noise: float) -> np.ndarray:
        """Normalised residuals ``(y - model) / (noise sigma)`` of one model, NaN where unused."""
        r = (self.values - model) / (noise * self.sigma)
        return np.where(self.used, r, np.nan)


def column(series: xr.Dataset, name: str) -> np.ndarray | None:
    """The variable ``name`` of ``series`` as a flat float array, or ``None`` when absent."""
    if name not in series.data_vars:
        return None
    return np.asarray(series[name].values, dtype=float).reshape(-1)


def channel(series, name, *, log_space, power, path, scale=1.0, offset=0.0) -> Channel | None:
    """The observable ``name`` of ``series`` in fit space, or ``None`` when the table lacks it.

    Points without a usable value (or error, or, in log space, with intensity <= 0 or power
    0) are left out with a :class:`~polkit.errors.DataWarning`.  ``scale`` and ``offset``
    map the values linearly (peak energies: meV above ``offset``); ``log_space`` takes
    natural logs (reservoir intensities).
    """
    y = column(series, name)
    if y is None:
        return None
    err = column(series, f"{name}_error")
    has_errors = err is not None
    ok = np.isfinite(y)
    if has_errors:
        no_error = int((ok & ~(np.isfinite(err) & (err > 0))).sum())
        if no_error:
            warnings.warn(
                f"{path or 'series'}: {no_error} point(s) of {name} without a usable error "
                "(NaN or 0) are left out; give every point a positive standard deviation",
                DataWarning,
                stacklevel=4,
            )
        ok &= np.isfinite(err) & (err > 0)
    if log_space:
        bad = ok & ((y <= 0) | (power <= 0))
        if bad.any():
            warnings.warn(
                f"{path or 'series'}: {int(bad.sum())} point(s) with intensity <= 0 or power 0 "
                "cannot enter the log-space intensity fit and are left out",
                DataWarning,
                stacklevel=4,
            )
        ok &= ~bad
    yv = np.where(ok, y, 1.0)
    if log_space:
        values = np.log(yv)
        sigma = np.where(ok, err / yv, 1.0) if has_errors else np.ones_like(y)
    else:
        values = (yv - offset) / scale
        sigma = np.where(ok, err / scale, 1.0) if has_errors else np.ones_like(y)
    values = np.where(ok, values, 0.0)
    if has_errors:
        noise = f"{name}_noise_scale"
    elif log_space:
        noise = f"{name}_log_noise"
    else:
        noise = f"{name}_noise"
    return Channel(name, values, sigma, ok, log_space, has_errors, noise)
