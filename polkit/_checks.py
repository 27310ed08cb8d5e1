"""Argument checks shared by the pure floors: real, finite, signed arrays; windows.

The physics modules refuse bad arguments with a :class:`~polkit.errors.DataError` naming
the argument, what was expected and what was found; each module words the sign rules in
its own physics (a linewidth is a positive FWHM, a pump rate is non-negative, ...).
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike, NDArray

from polkit.errors import ConfigError, DataError

__all__ = ["real_array", "window"]


def real_array(
    name: str,
    value: ArrayLike,
    *,
    positive: bool = False,
    nonneg: bool = False,
    finite_hint: str = "",
    positive_text: str = "expected values > 0, found minimum {minimum:g}",
    nonneg_text: str = "expected values >= 0, found minimum {minimum:g}",
) -> NDArray:
    """``value`` as a float array, refused unless real, finite and of the required sign.

    Parameters
    ----------
    name
        The argument's name (the ``field`` of the error).
    value
        The argument.
    positive, nonneg
        Require every value > 0, or >= 0.
    finite_hint
        Appended to the message about non-finite values (the fix, e.g. "; mask them").
    positive_text, nonneg_text
        Messages for a value of the wrong sign; ``{minimum}`` is the smallest value.

    Returns
    -------
    numpy.ndarray
        ``numpy.asarray(value, dtype=float)``.

    Raises
    ------
    DataError
        Naming ``name``: not an array of real numbers, non-finite values (with their
        count), or a value of the wrong sign (with the minimum).
    """
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise DataError(
            f"expected an array of real numbers, found {type(value).__name__} ({exc})", field=name
        ) from exc
    bad = ~np.isfinite(arr)
    if np.any(bad):
        raise DataError(
            f"expected finite numbers, found {int(bad.sum())} non-finite value(s){finite_hint}",
            field=name,
        )
    if positive and np.any(arr <= 0):
        raise DataError(positive_text.format(minimum=arr.min()), field=name)
    if nonneg and np.any(arr < 0):
        raise DataError(nonneg_text.format(minimum=arr.min()), field=name)
    return arr


def window(value, key: str) -> tuple[float, float]:
    """The option ``key`` as a window ``(low, high)`` of two finite numbers, ``low < high``.

    Anything else is refused with a :class:`~polkit.errors.ConfigError` naming ``key``.
    """
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ConfigError(
            f"expected a window (low, high) of two numbers; found {value!r}", key=key
        ) from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo >= hi:
        raise ConfigError(f"expected low < high, both finite; found ({lo:g}, {hi:g})", key=key)
    return lo, hi
