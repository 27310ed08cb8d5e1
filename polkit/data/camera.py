"""What a spectrometer camera records: offset, detector noise, saturation, excluded lines.

A camera pixel holds raw counts ``c`` on the file's own axes.  polkit subtracts a declared
camera offset (a constant or a dark frame) from ``c`` before any unit conversion, so that an
offset never becomes a sloped background after the wavelength Jacobian; and it finds
saturated pixels on ``c`` too (before the offset), where the analog-to-digital converter
clipped them.

Detector noise after the Jacobian
    An emission map on a wavelength axis is scaled pixel by pixel, ``s = J c`` with
    ``J = |d lambda/d E|`` (see :mod:`polkit.data.assemble`).  The map then carries a 1-D
    coordinate ``jacobian`` along ``energy`` and ``attrs["raw_units"] = "counts"``;
    ``gain`` (electrons per raw count), ``read_noise`` and ``saturation`` stay in raw
    counts.  The variance of a pixel is ``var(s) = J s / gain + (J read_noise)^2``
    (counting statistics plus read noise, e.g. Janesick, Photon Transfer, SPIE 2007).
    :func:`detector_variance_terms` returns the two terms ``(a, b)`` of ``var = a s + b``;
    every consumer of the detector model uses it.

Settings
    :class:`CameraOptions` gathers the choices of the preparation (offset, saturation and
    spike masks, detection threshold of the peak table, excluded windows); the dispersion
    job and the ``polkit dispersion`` command take one.
"""

from __future__ import annotations

import json
import logging
import math
import os
from dataclasses import dataclass, field

import numpy as np

from polkit.errors import ConfigError, DataError

__all__ = [
    "CameraOptions",
    "ExcludeWindow",
    "parse_exclude",
    "detector_variance_terms",
    "raw_counts",
    "find_saturated_raw",
    "record_step",
    "preprocessing_record",
    "RAW_COUNT_UNITS",
]

logger = logging.getLogger(__name__)

#: signal units that are raw detector counts
RAW_COUNT_UNITS = ("counts", "count", "adu")
#: file attributes that declare a camera offset in raw counts (first found wins)
OFFSET_ATTRS = ("camera_offset", "dark")
#: analog-to-digital converter depths whose full scale 2**n - 1 marks clipped pixels
_ADC_BITS = (8, 10, 12, 14, 16, 18, 20, 24, 32)
#: a flat top counts only when the maximum is this many quantisation steps above zero
#: (at low counts equal neighbouring values are common; common practice, no published source)
_FLAT_TOP_MIN_STEPS = 100


# ----------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class ExcludeWindow:
    """A region of the map to ignore: an energy range [eV], optionally an angle range.

    The angle range is in the units of the map's in-plane axis (degree, or 1/um for k).
    """

    energy: tuple[float, float]
    angle: tuple[float, float] | None = None

    def __str__(self) -> str:
        text = f"{self.energy[0]:g}:{self.energy[1]:g} eV"
        if self.angle is not None:
            text += f" at {self.angle[0]:g}:{self.angle[1]:g}"
        return text


def _pair(text: str, what: str, spec: str) -> tuple[float, float]:
    lo, sep, hi = text.partition(":")
    try:
        a, b = float(lo), float(hi)
    except ValueError:
        a = b = float("nan")
    if not sep or not (math.isfinite(a) and math.isfinite(b)) or a >= b:
        raise ConfigError(
            f"expected {what} LOW:HIGH with LOW < HIGH; found {text!r} in {spec!r}. Fix: "
            "write e.g. --exclude 1.60:1.62 or --exclude 1.60:1.62@20:30",
            key="exclude",
        )
    return a, b


def parse_exclude(spec) -> ExcludeWindow:
    """An :class:`ExcludeWindow` from ``"E1:E2"`` or ``"E1:E2@A1:A2"`` (eV; degree or 1/um).

    A tuple ``(e1, e2)`` or ``((e1, e2), (a1, a2))`` or an :class:`ExcludeWindow` is
    accepted too.
    """
    if isinstance(spec, ExcludeWindow):
        return spec
    if isinstance(spec, str):
        text = spec.strip()
        energy, at, angle = text.partition("@")
        return ExcludeWindow(
            _pair(energy.strip(), "an energy range [eV]", text),
            _pair(angle.strip(), "an angle range", text) if at else None,
        )
    try:
        first, *rest = spec
        if isinstance(first, (tuple, list)):
            e = _pair(f"{first[0]}:{first[1]}", "an energy range [eV]", str(spec))
            a = _pair(f"{rest[0][0]}:{rest[0][1]}", "an angle range", str(spec)) if rest else None
            return ExcludeWindow(e, a)
        return ExcludeWindow(_pair(f"{spec[0]}:{spec[1]}", "an energy range [eV]", str(spec)))
    except (TypeError, IndexError, ValueError) as exc:
        if isinstance(exc, ConfigError):
            raise
        raise ConfigError(
            f"expected an exclude window 'E1:E2' or 'E1:E2@A1:A2'; found {spec!r}", key="exclude"
        ) from None


@dataclass(frozen=True)
class CameraOptions:
    """How a map is prepared before a fit (one settings object; the CLI builds it).

    Attributes
    ----------
    dark
        Camera offset subtracted in raw counts before any unit conversion: a number
        (counts), a dark-frame file on the same raw axes as the map, or ``None`` (then the
        file's own ``camera_offset``/``dark`` attribute, if any, is used).
    mask_saturated
        Mask pixels at or above ``saturation``, at the converter's full scale, or on a flat
        top (NaN with ``attrs["masked"] = 1``).
    mask_spikes
        Mask cosmic-ray spikes (:func:`polkit.data.spikes.mask_spikes`) with a one-pixel
        margin.
    spike_threshold
        Excess, in noise standard deviations, above which a narrow pixel is a spike.
    min_snr
        Detection threshold of the peak table (fitted height over noise, after pooling
        neighbouring pixels; see :func:`polkit.linefit.peak_table`).
    exclude
        Windows to mask (lines that are not polaritons): :class:`ExcludeWindow` items, or
        strings ``"E1:E2"``/``"E1:E2@A1:A2"``.
    """

    dark: float | str | os.PathLike | None = None
    mask_saturated: bool = True
    mask_spikes: bool = True
    spike_threshold: float = 8.0
    min_snr: float = 5.0
    exclude: tuple = field(default_factory=tuple)

    def __post_init__(self):
        object.__setattr__(self, "exclude", tuple(parse_exclude(w) for w in self.exclude))
        for name in ("spike_threshold", "min_snr"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not (
                math.isfinite(value) and value > 0
            ):
                flag = " (--min-snr)" if name == "min_snr" else ""
                raise ConfigError(f"expected a positive number; found {value!r}",
                                  key=name + flag)
        if self.dark is not None and not isinstance(self.dark, (int, float, str, os.PathLike)):
            raise ConfigError(
                f"expected a dark level in counts or a dark-frame file; found {self.dark!r}",
                key="dark",
            )
        if isinstance(self.dark, (int, float)) and not math.isfinite(self.dark):
            raise ConfigError(f"expected a finite dark level; found {self.dark!r}", key="dark")

    @classmethod
    def from_text(cls, dark: str | None = None, **kwargs) -> CameraOptions:
        """Options from command-line text: ``dark`` is a number of counts or a file path."""
        if dark is not None:
            try:
                dark = float(dark)
            except ValueError:
                pass
        return cls(dark=dark, **kwargs)


# ----------------------------------------------------------------------------- noise
def _along_energy(values: np.ndarray, da) -> np.ndarray:
    shape = [-1 if d == "energy" else 1 for d in da.dims]
    return np.asarray(values, dtype=float).reshape(shape)


def _jacobian(da) -> np.ndarray | None:
    if "jacobian" in da.coords and da["jacobian"].dims == ("energy",):
        return _along_energy(da["jacobian"].values, da)
    return None


def detector_variance_terms(da) -> tuple[np.ndarray, np.ndarray] | None:
    """The detector noise of an emission map as ``var = a * signal + b``, or ``None``.

    Parameters
    ----------
    da
        A canonical map (or a spectra cube's ``intensity``) in raw counts, or
        Jacobian-scaled counts that carry the ``jacobian`` coordinate and
        ``attrs["raw_units"] = "counts"``; with ``attrs["gain"]`` (electrons per raw
        count) and optionally ``attrs["read_noise"]`` (raw counts; 0 when absent).

    Returns
    -------
    tuple or None
        ``(a, b)``: arrays broadcastable to ``da`` (1 along every dim but ``energy``),
        ``a = J / gain`` [signal units] and ``b = (J read_noise)^2`` [signal units^2], with
        ``J = 1`` for raw counts.  Source: the CCD noise model, e.g. Janesick, Photon
        Transfer, SPIE 2007 (a raw count c has var(c) = c/gain + read_noise^2 and s = J c).
        ``None`` when the detector model does not apply: reflectance/transmission, no gain,
        or a signal that is not (scaled) counts.
    """
    attrs = da.attrs
    if str(attrs.get("kind", "emission")) != "emission" or attrs.get("gain") is None:
        return None
    gain = float(attrs["gain"])
    rn = float(attrs.get("read_noise", 0.0) or 0.0)
    if not (math.isfinite(gain) and gain > 0 and math.isfinite(rn) and rn >= 0):
        raise DataError(
            f"expected gain > 0 and read_noise >= 0 (raw counts); found gain {attrs['gain']!r}, "
            f"read_noise {attrs.get('read_noise')!r}. Fix: correct or remove the attributes",
            path=attrs.get("source"),
            field="gain",
        )
    jac = _jacobian(da)
    units = str(attrs.get("units", "")).strip().lower()
    if jac is not None and str(attrs.get("raw_units", "")).strip().lower() in RAW_COUNT_UNITS:
        return jac / gain, (jac * rn) ** 2
    if units in RAW_COUNT_UNITS:
        one = _along_energy(np.ones(da.sizes["energy"]), da)
        return one / gain, one * rn**2
    return None


def raw_counts(da) -> np.ndarray:
    """The map's values in raw counts per pixel (``signal / J`` after a Jacobian)."""
    jac = _jacobian(da)
    values = np.asarray(da.values, dtype=float)
    return values if jac is None else values / jac


# ----------------------------------------------------------------------------- saturation
def _quantum(values: np.ndarray) -> float:
    v = np.unique(values[np.isfinite(values)])
    if v.size < 2:
        return 0.0
    return float(np.min(np.diff(v)))


def find_saturated_raw(
    raw: np.ndarray, *, energy_axis: int, saturation: float | None = None, integer_dtype=None
) -> tuple[np.ndarray, dict[str, int]]:
    """Pixels of a raw camera frame that were clipped, and why.

    A pixel is saturated when it is at or above the declared ``saturation`` level (raw
    counts), at the full scale ``2**n - 1`` of a converter (``n`` in 8 .. 32 bits, for
    integer-valued frames whose maximum is exactly that), or on a flat top: the frame's
    maximum held by two or more neighbouring pixels along energy (clipped peaks are flat;
    counted only when the maximum is at least 100 quantisation steps, since low integer
    counts tie by chance).  # common practice, no published source

    Returns
    -------
    tuple
        ``(mask, reasons)``: a boolean array shaped like ``raw`` and the number of pixels
        found by each test (``declared``, ``full_scale``, ``flat_top``; a pixel can count
        in several).
    """
    x = np.asarray(raw, dtype=float)
    finite = np.isfinite(x)
    mask = np.zeros(x.shape, dtype=bool)
    reasons = {"declared": 0, "full_scale": 0, "flat_top": 0}
    if not finite.any():
        return mask, reasons
    if saturation is not None:
        with np.errstate(invalid="ignore"):
            hit = finite & (x >= float(saturation))
        reasons["declared"] = int(hit.sum())
        mask |= hit
    top = float(np.max(x[finite]))
    at_top = finite & (x == top)
    integer_valued = bool(np.all(x[finite] == np.round(x[finite])))
    if integer_dtype is not None and np.issubdtype(integer_dtype, np.integer):
        full = [float(np.iinfo(integer_dtype).max)]
    else:
        full = [float(2**n - 1) for n in _ADC_BITS]
    if integer_valued and top in full:
        reasons["full_scale"] = int(at_top.sum())
        mask |= at_top
    q = _quantum(x)
    if q > 0 and top >= _FLAT_TOP_MIN_STEPS * q:
        a = np.moveaxis(at_top, energy_axis, -1)
        pair = np.zeros(a.shape, dtype=bool)
        both = a[..., 1:] & a[..., :-1]
        pair[..., 1:] |= both
        pair[..., :-1] |= both
        if pair.any():
            reasons["flat_top"] = int(at_top.sum())
            mask |= at_top
    return mask, reasons


# ----------------------------------------------------------------------------- records
def preprocessing_record(da) -> dict:
    """The map's ``attrs["preprocessing"]`` as a dict (empty when absent)."""
    text = da.attrs.get("preprocessing")
    if not text:
        return {}
    try:
        out = json.loads(text)
    except (TypeError, ValueError):
        raise DataError(
            f"expected JSON text in the preprocessing attribute; found {text!r}",
            path=da.attrs.get("source"),
            field="preprocessing",
        ) from None
    return out if isinstance(out, dict) else {}


def record_step(attrs: dict, key: str, entry) -> dict:
    """A copy of ``attrs`` with ``entry`` stored under ``key`` of the preprocessing JSON."""
    out = dict(attrs)
    text = out.get("preprocessing")
    rec = json.loads(text) if text else {}
    rec[key] = entry
    out["preprocessing"] = json.dumps(rec, sort_keys=True)
    return out


def describe_record(rec: dict) -> list[str]:
    """Readable lines for a preprocessing record (``polkit inspect`` and ``dispersion``)."""
    lines = []
    off = rec.get("offset")
    if off:
        lines.append(f"camera offset subtracted before unit conversion: {off.get('what')} "
                     f"(median {off.get('median_counts', float('nan')):.6g} counts)")
    sat = rec.get("saturated")
    if sat is not None:
        why = ", ".join(f"{k} {v}" for k, v in sat.get("reasons", {}).items() if v)
        lines.append(f"saturated pixels masked: {sat.get('pixels', 0)}" + (f" ({why})" if why
                                                                           else ""))
    sp = rec.get("spikes")
    if sp is not None:
        lines.append(f"cosmic-ray spikes masked: {sp.get('spikes', 0)} spike pixel(s), "
                     f"{sp.get('pixels', 0)} pixel(s) with the one-pixel margin "
                     f"(threshold {sp.get('threshold', float('nan')):g} sigma, noise from "
                     f"{sp.get('noise', '?')})")
    ex = rec.get("excluded")
    if ex is not None:
        lines.append(f"excluded windows masked: {ex.get('pixels', 0)} pixel(s) in "
                     + "; ".join(ex.get("windows", [])))
    for key, what, option in (("saturated", "saturation", "--keep-saturated"),
                              ("spikes", "spike", "--keep-spikes")):
        if rec.get(f"{key}_off"):
            lines.append(f"{what} masking switched off ({option})")
    return lines
