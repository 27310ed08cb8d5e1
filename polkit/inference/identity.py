"""What a checkpoint belongs to: the fit identity stored in ``chains.h5`` and checked on resume.

A checkpoint's chain is only worth continuing under the very posterior it was sampled
from.  The fit identity is a flat ``{field: text}`` record of what decides that
posterior, stored as JSON in the checkpoint's ``polkit_fit_identity`` attribute:

* ``input_sha256``, ``model``, ``route`` (``peak_table`` / ``whole_map``), ``likelihood``
  (the noise-model note) and ``preprocessing`` (crop windows and loader options, as JSON),
  handed in by the job;
* ``priors`` (the effective priors of every parameter as JSON text) and
  ``priors_sha256`` (its SHA-256), taken from the parameter space;
* ``polkit_version``, ``numpy_version``, ``scipy_version``, ``emcee_version``.

On resume every field must match.  A difference is refused with one line naming the
field, the stored and the new value (shortened) and the fix (a new output folder).
Versions: a different major or minor version is refused (the numbers a library returns
may change between feature releases, so the continued chain would not be the chain an
uninterrupted run gives); a patch-level difference only warns
(:class:`~polkit.errors.DataWarning`), since patch releases fix bugs without changing
results on the paths polkit uses.  A checkpoint without an identity (written before
identities were recorded) is refused: polkit cannot tell what it belongs to.
"""

from __future__ import annotations

import hashlib
import json
import warnings
from collections.abc import Mapping
from importlib import metadata
from typing import Any

from polkit.errors import DataError, DataWarning

__all__ = ["IDENTITY_ATTR", "CheckpointMismatch", "fit_identity", "compare_identity"]

#: the checkpoint attribute holding the fit identity (JSON text)
IDENTITY_ATTR = "polkit_fit_identity"

_VERSIONED = ("polkit", "numpy", "scipy", "emcee")
_SHOW = 60  # characters of a value shown in a refusal


class CheckpointMismatch(DataError):
    """A checkpoint that belongs to another fit (another input, priors, model, ...)."""


def _text(value: Any) -> str:
    if isinstance(value, str):
        return value
    return json.dumps(value, sort_keys=True, default=str)


def _version(name: str) -> str:
    if name == "polkit":
        from polkit import __version__

        return __version__
    try:
        return metadata.version(name)
    except metadata.PackageNotFoundError:
        return "not installed"


def fit_identity(space, job: Mapping[str, Any] | None = None) -> dict[str, str]:
    """The fit identity of a run: the job's fields, the effective priors and versions.

    Parameters
    ----------
    space
        The :class:`~polkit.inference.ParameterSpace` sampled (its priors are recorded).
    job
        ``{field: value}`` from the job (input SHA-256, model, route, likelihood,
        preprocessing ...); values that are not text are stored as sorted JSON.
    """
    out = {str(k): _text(v) for k, v in (job or {}).items()}
    priors = space.to_json()
    out["priors"] = priors
    out["priors_sha256"] = hashlib.sha256(priors.encode()).hexdigest()
    for name in _VERSIONED:
        out[f"{name}_version"] = _version(name)
    return out


def _short(text: str) -> str:
    one = " ".join(str(text).split())
    return one if len(one) <= _SHOW else one[: _SHOW - 3] + "..."


def _release(version: str) -> tuple[str, str]:
    parts = version.split(".")
    return ".".join(parts[:2]), ".".join(parts[2:])


_FIX = "this folder holds another fit's chains: write the new fit to a new folder (--out)"


def compare_identity(path, stored: str | None, new: Mapping[str, str]) -> None:
    """Refuse a resume whose fit identity differs from the checkpoint's.

    Raises
    ------
    CheckpointMismatch
        Naming the first field that differs, old and new values (shortened) and the fix.

    Warns
    -----
    DataWarning
        For a patch-level version difference (the run continues).
    """
    if stored is None:
        raise CheckpointMismatch(
            "the checkpoint records no fit identity (written by an older polkit), so it "
            f"cannot be matched to this fit; {_FIX}", path=path, field=IDENTITY_ATTR)
    try:
        old = json.loads(stored)
    except json.JSONDecodeError:
        raise CheckpointMismatch(f"the checkpoint's fit identity cannot be read; {_FIX}",
                                 path=path, field=IDENTITY_ATTR) from None
    # the SHA-256 of the priors names the change more briefly than the priors' text
    order = [k for k in new if k != "priors"] + ["priors"]
    for key in order:
        was, now = old.get(key), new[key]
        if was == now:
            continue
        if key.endswith("_version") and was is not None:
            if _release(was)[0] == _release(now)[0]:
                warnings.warn(
                    f"{path}: the checkpoint was written with {key.removesuffix('_version')} "
                    f"{was}, this run uses {now} (a patch release); resuming -- the "
                    "continued chain may differ in the last digits from an uninterrupted run",
                    DataWarning, stacklevel=3)
                continue
        if key == "priors" and old.get("priors_sha256") == new.get("priors_sha256"):
            continue
        raise CheckpointMismatch(
            f"resume refused: field {key!r} differs: checkpoint {_short(was or '(none)')!r}, "
            f"this run {_short(now)!r}; {_FIX}", path=path, field=key)
