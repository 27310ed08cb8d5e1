"""Noise model of a spectrum: counting statistics from the camera's gain, or learnt.

With ``gain`` (electrons per count) and ``read_noise`` (counts) known for data in counts, a
pixel's variance is ``counts / gain + read_noise**2``; otherwise the fits learn the noise from
their residuals (see :mod:`polkit.linefit`).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np

from polkit.errors import DataError

__all__ = ["Noise", "noise_from_attrs", "robust_sd"]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class Noise:
    """Pixel variance (level / gain + read_noise**2) / n_avg, or unknown (``gain is None``)."""

    gain: float | None = None
    read_noise: float = 0.0
    n_avg: int = 1

    @property
    def known(self) -> bool:
        return self.gain is not None

    def variance(self, level: np.ndarray) -> np.ndarray:
        floor = max(self.read_noise**2, 1.0 / self.gain**2)  # at least one electron
        var = np.maximum(np.asarray(level, dtype=float), 0.0) / self.gain + self.read_noise**2
        return np.maximum(var, floor) / self.n_avg

    def describe(self) -> str:
        if not self.known:
            return ("learnt from the residuals: variance = a + b * level, covariance scaled "
                    "by the residual variance")
        return (f"counting statistics: variance = counts/gain + read_noise^2 with gain "
                f"{self.gain:g} e-/count, read_noise {self.read_noise:g} counts, "
                f"averaged over {self.n_avg} column(s)")


_COUNT_UNITS = ("counts", "count", "adu")


def noise_from_attrs(attrs, kind: str, path, n_avg: int = 1) -> Noise:
    if kind == "reflectance" or attrs.get("gain") is None:
        return Noise()
    units = str(attrs.get("units", "counts")).strip().lower()
    if units not in _COUNT_UNITS:
        # e.g. counts rescaled to a density per energy: counting statistics no longer apply
        logger.info("%s: gain ignored, the signal is in %r rather than counts; the noise is "
                    "learnt from the residuals", path or "data", attrs.get("units"))
        return Noise()
    fields = {}
    for name, default in (("gain", None), ("read_noise", 0.0)):
        raw = attrs.get(name, default)
        try:
            value = float(raw)
        except (TypeError, ValueError):
            value = float("nan")
        ok = value > 0 if name == "gain" else value >= 0
        if not (math.isfinite(value) and ok):
            need = "a positive number (electrons per count)" if name == "gain" else \
                "a number >= 0 (counts)"
            raise DataError(f"expected {need}, found {raw!r}; fix or remove the attribute",
                            path=path, field=name)
        fields[name] = value
    return Noise(fields["gain"], fields["read_noise"], n_avg)



def robust_sd(y: np.ndarray) -> float:
    """Noise standard deviation from the median absolute first difference (robust to lines)."""
    d = np.diff(y)
    mad = np.median(np.abs(d - np.median(d)))
    return float(1.4826 * mad / math.sqrt(2.0)) or float(np.std(d)) or 1.0

