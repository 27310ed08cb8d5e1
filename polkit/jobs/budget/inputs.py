"""Reading the budget's two input fits and checking they belong together.

The dispersion result gives the lower polariton at k = 0 (energy, linewidth, exciton
fraction, lifetime), the power result the interaction constant.  Draws are read with their
units, converted to polkit's units and refused when they are not finite and positive; the
two results' recorded sample names (and the dispersion input the power fit used) are
compared.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from polkit._paths import shareable
from polkit.errors import ConfigError, ConvergenceWarning, DataError, DataWarning
from polkit.inference import FitResult
from polkit.jobs.budget.claims import CLAIM_UNITS
from polkit.units import ENERGY_UNITS, LINEWIDTH_UNITS, TIME_UNITS, subset

__all__ = ["Fits", "read_fits", "CANONICAL_UNITS", "input_record"]

# posterior name -> accepted units and factor to polkit's unit
_RESULT_UNITS = {
    "lp_energy_k0": {u: ENERGY_UNITS[u] for u in ("eV", "meV")},
    "lp_linewidth_k0": {u: LINEWIDTH_UNITS[u] for u in ("meV", "ueV", "µeV", "eV")},
    "exciton_fraction_k0": {"1": 1.0},
    "lp_lifetime_k0": subset(TIME_UNITS, ("ps", "fs", "ns")),
    "interaction_constant": {u: f for u, (_, f) in CLAIM_UNITS.items()
                             if CLAIM_UNITS[u][0] == "interaction"},
}
_RESULT_UNITS["exciton_interaction_constant"] = _RESULT_UNITS["interaction_constant"]
#: posterior name -> polkit's unit for it
CANONICAL_UNITS = {"lp_energy_k0": "eV", "lp_linewidth_k0": "meV", "exciton_fraction_k0": "1",
                   "lp_lifetime_k0": "ps", "interaction_constant": "ueV um^2",
                   "exciton_interaction_constant": "ueV um^2"}

_FIX_DISPERSION = "Pass the folder of a dispersion fit (polkit dispersion ... --out DIR)."


@dataclass(frozen=True)
class Fits:
    """The two input results, where they came from, and their draws in polkit's units.

    Attributes
    ----------
    dispersion, power
        The results.
    dispersion_where, power_where
        Their folders (or ``<... result in memory>``), for messages and provenance.
    dispersion_draws
        ``{name: draws}`` of ``lp_linewidth_k0``, ``lp_energy_k0``, ``exciton_fraction_k0``
        and, when recorded, ``lp_lifetime_k0``.
    interaction_name
        ``"interaction_constant"`` or ``"exciton_interaction_constant"``.
    interaction_draws
        The power result's draws of ``interaction_name``.
    """

    dispersion: FitResult
    dispersion_where: str
    power: FitResult
    power_where: str
    dispersion_draws: dict[str, np.ndarray]
    interaction_name: str
    interaction_draws: np.ndarray


def read_fits(dispersion: str | os.PathLike | FitResult, power: str | os.PathLike | FitResult,
              *, interaction: str, expect_same_sample: bool) -> Fits:
    """Load both results, read the draws the budget needs and check the pair.

    Warns (:class:`~polkit.errors.ConvergenceWarning`) for an input that did not pass its
    convergence gate, and (:class:`~polkit.errors.DataWarning`) for differing sample names
    when ``expect_same_sample`` is off; refuses a mismatch when it is on.
    """
    disp, disp_where = _as_result(dispersion, "dispersion")
    pw, power_where = _as_result(power, "power")
    d_vals = {name: _posterior_values(disp, name, disp_where, fix=_FIX_DISPERSION)
              for name in ("lp_linewidth_k0", "lp_energy_k0", "exciton_fraction_k0")}
    if "lp_lifetime_k0" in disp.posterior.data_vars:
        d_vals["lp_lifetime_k0"] = _posterior_values(disp, "lp_lifetime_k0", disp_where,
                                                     fix=_FIX_DISPERSION)
    g_name = ("interaction_constant" if interaction == "polariton"
              else "exciton_interaction_constant")
    fix_power = ("Absolute energies need a power fit with a density calibration: rerun the power "
                 "fit with a calibration file (polkit power ... --calibration FILE)"
                 + ("" if interaction == "polariton" else " and a dispersion result") + ".")
    g_vals = _posterior_values(pw, g_name, power_where, fix=fix_power)
    _check_same_sample(disp, disp_where, pw, power_where, strict=expect_same_sample)
    for res, where in ((disp, disp_where), (pw, power_where)):
        if not res.converged:
            warnings.warn(
                f"{where}: this input result did not pass its convergence gate; the budget "
                "inherits its draws as they are",
                ConvergenceWarning,
                stacklevel=3,
            )
    return Fits(disp, disp_where, pw, power_where, d_vals, g_name, g_vals)


def input_record(result: FitResult, where: str) -> dict[str, Any]:
    """What the budget's provenance records of one input result."""
    prov = result.provenance
    return {"folder": shareable(str(where)), "model": result.model, "kind": result.kind,
            "input_sha256": prov.get("input_sha256"), "input": prov.get("input"),
            "seed": prov.get("seed"), "sample": _recorded_sample(result),
            "position": _recorded_position(result), "converged": bool(result.converged)}


def _as_result(source: str | os.PathLike | FitResult, role: str) -> tuple[FitResult, str]:
    if isinstance(source, FitResult):
        return source, f"<{role} result in memory>"
    return FitResult.load(source), os.fspath(source)


def _posterior_values(result: FitResult, name: str, where: str, *, fix: str) -> np.ndarray:
    post = result.posterior
    if name not in post.data_vars:
        raise _refusal(f"the posterior has no {name!r} ({CANONICAL_UNITS[name]}); found "
                       f"{sorted(post.data_vars)}. {fix}", where, name)
    units = str(post[name].attrs.get("units", ""))
    table = _RESULT_UNITS[name]
    if units not in table:
        raise _refusal(f"expected units {', '.join(repr(u) for u in table)}, found {units!r}",
                       where, name)
    values = result.draws(name) * table[units]
    bad = ~np.isfinite(values) | (values <= 0)
    if name == "exciton_fraction_k0":
        bad |= values > 1
    if bad.any():
        raise _refusal(
            f"expected finite positive draws{' in (0, 1]' if name == 'exciton_fraction_k0' else ''}"
            f", found {int(bad.sum())} of {values.size} outside (minimum "
            f"{np.nanmin(values):g}); check that this is the right result folder", where, name)
    return values


def _refusal(message: str, where: str, name: str) -> DataError:
    """The error for a posterior quantity of the result at ``where`` that the budget refuses."""
    return DataError(message, path=where, field=name)


def _recorded_sample(result: FitResult) -> str | None:
    tree = result.tree
    if "observed_data" in tree.children:
        value = tree["observed_data"].attrs.get("sample")
        if value not in (None, ""):
            return str(value)
    value = result.provenance.get("sample")
    return None if value in (None, "") else str(value)


def _recorded_position(result: FitResult) -> str | None:
    tree = result.tree
    if "observed_data" in tree.children and "position" in tree["observed_data"].attrs:
        return str(tree["observed_data"].attrs["position"])
    return None


def _dispersion_hash_in(power: FitResult) -> str | None:
    """The dispersion input hash a power result recorded, if it used a dispersion result."""
    prov = power.provenance
    for key in ("dispersion_input_sha256",):
        if isinstance(prov.get(key), str):
            return prov[key]
    nested = prov.get("dispersion")
    if isinstance(nested, Mapping) and isinstance(nested.get("input_sha256"), str):
        return nested["input_sha256"]
    return None


def _check_same_sample(disp: FitResult, disp_where: str, power: FitResult, power_where: str,
                       *, strict: bool) -> None:
    ds, ps = _recorded_sample(disp), _recorded_sample(power)
    if strict:
        _require_same_sample(ds, disp_where, ps, power_where)
        _require_same_dispersion(disp, disp_where, power)
    elif ds is not None and ps is not None and ds != ps:
        warnings.warn(
            f"{disp_where}: the dispersion result is of sample {ds!r}, the power result "
            f"({power_where}) of sample {ps!r}; pass expect_same_sample=True (--check-sample) "
            "to refuse such a pair",
            DataWarning,
            stacklevel=4,
        )


def _require_same_sample(ds: str | None, disp_where: str, ps: str | None,
                         power_where: str) -> None:
    for sample, where in ((ds, disp_where), (ps, power_where)):
        if sample is None:
            raise ConfigError(
                "the sample check was asked for, but this result records no sample name "
                "(observed_data attribute 'sample'); add a 'sample' attribute to the input "
                "data and refit, or drop the check",
                path=where,
                key="sample",
            )
    if ds != ps:
        raise ConfigError(
            f"the dispersion result is of sample {ds!r} but the power result is of sample "
            f"{ps!r}; use a dispersion result of the same sample, or drop the check",
            path=disp_where,
            key="sample",
        )


def _require_same_dispersion(disp: FitResult, disp_where: str, power: FitResult) -> None:
    recorded = _dispersion_hash_in(power)
    mine = disp.provenance.get("input_sha256")
    if recorded is not None and mine is not None and recorded != mine:
        raise ConfigError(
            f"the power result was fitted with a dispersion result whose input has SHA-256 "
            f"{recorded[:12]}..., but this dispersion result's input has {str(mine)[:12]}...; "
            "use the same dispersion result as the power fit, or drop the check",
            path=disp_where,
            key="input_sha256",
        )
