"""The energy-budget job: what a device built from the sample would cost, per posterior draw.

Inputs: a dispersion result (lower-polariton energy, linewidth and exciton fraction at
k = 0), a power-series result fitted with a density calibration (the polariton
interaction constant ``interaction_constant`` in ueV um^2) and a device file (TOML, see
:func:`polkit.config.device.load_device`).  The two fits are independent measurements, so
their draws are paired at random with a seeded generator; whole draws are taken from each
posterior, so the correlations inside each fit (for example between the linewidth and the
polariton energy) are kept.  Device inputs are drawn from their log-normal uncertainties.

Per draw (never from medians):

* ``energy_per_operation`` (fJ): control pulse for a shift of one linewidth (1 rad),
  ``E_op = phi gamma A E_LP / (g_LP eta_in)``
  (:func:`polkit.models.device_energy.energy_per_operation`);
* ``energy_per_pi_shift`` (fJ): the same for ``phi = pi``;
* ``control_energy_per_node`` (fJ): the same at the device's ``phase`` (1 rad unless set);
  this is the figure the array accounting uses;
* ``operation_rate`` (GHz): ``gamma / h`` by default (see
  :func:`polkit.models.device_energy.operation_rate`);
* ``power_per_node`` (mW): control power of one node switching in every time slot;
* ``array_optical_power`` (mW): all nodes at full rate plus the holding beam;
* one activation (one pass of the array: every node switched once, every input modulated
  once, every output detected once), line by line in fJ
  (:func:`polkit.models.device_energy.array_energy_per_activation`): ``control_optical``,
  ``modulators``, ``detectors``, ``holding_optical``, ``laser_wallplug``, ``cooling``;
  ``energy_per_activation`` = control + modulators + detectors;
  ``wall_energy_per_activation`` = every line; ``wall_energy_per_node`` = that / nodes.

The sensitivity measures (which input's uncertainty dominates the spread) are described
in :mod:`polkit.jobs.budget.result`.  Claims such as ``"energy_per_operation < 10 fJ"``
are parsed (never evaluated as code, :mod:`polkit.jobs.budget.claims`) and answered with
the fraction of draws for which they hold.

Where things live: the device file in :mod:`polkit.config.device`, reading and checking the
two fits in :mod:`polkit.jobs.budget.inputs`, the per-draw propagation in
:mod:`polkit.jobs.budget.propagate`, the result in :mod:`polkit.jobs.budget.result`.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import numpy as np
import xarray as xr

from polkit.config.device import Device, load_device
from polkit.errors import ConfigError
from polkit.inference import FitResult
from polkit.jobs.budget.inputs import Fits, input_record, read_fits
from polkit.jobs.budget.propagate import (
    JointDraws,
    budget_variables,
    counted_lines,
    joint_draws,
    sensitivity_factors,
)
from polkit.jobs.budget.result import BudgetResult

__all__ = ["energy_budget"]


def energy_budget(
    dispersion: str | os.PathLike | FitResult,
    power: str | os.PathLike | FitResult,
    device: str | os.PathLike | Mapping[str, Any] | Device,
    *,
    claims: Sequence[str] = (),
    seed: int | np.random.SeedSequence | None = None,
    n_draws: int = 4000,
    out: str | os.PathLike | None = None,
    figures: bool = True,
    expect_same_sample: bool = False,
    interaction: str = "polariton",
) -> BudgetResult:
    """Energy per operation and per array activation of a device built from the sample.

    Parameters
    ----------
    dispersion
        A dispersion result folder (or :class:`~polkit.inference.FitResult`) whose posterior
        has ``lp_energy_k0`` (eV), ``lp_linewidth_k0`` (meV) and ``exciton_fraction_k0``.
    power
        A power-series result folder (or result) fitted with a density calibration: its
        posterior has ``interaction_constant`` (ueV um^2).
    device
        Device file (TOML), mapping or :class:`~polkit.config.device.Device` (see
        :func:`~polkit.config.device.load_device`).
    claims
        Claims such as ``"energy_per_operation < 10 fJ"`` (see
        :func:`~polkit.jobs.budget.claims.parse_claim`).
    seed
        Root seed for pairing the draws and drawing the device inputs (recorded).
    n_draws
        Number of joint draws.  Each posterior is subsampled without replacement when it
        has at least ``n_draws`` draws, resampled with replacement otherwise.
    out
        Folder for ``budget.nc``, ``summary.json`` and the figures; nothing is written when
        ``None``.
    figures
        Write the breakdown and sensitivity figures into ``out``.
    expect_same_sample
        Refuse (:class:`~polkit.errors.ConfigError`) a pair of results whose recorded sample
        names differ or are missing, or whose recorded dispersion input hash disagrees.
    interaction
        ``"polariton"`` (default): ``g_LP`` is the power result's ``interaction_constant``.
        ``"exciton"``: ``g_LP = g_X |X|^4 / N`` with the power result's
        ``exciton_interaction_constant``, the dispersion draws of ``exciton_fraction_k0``
        and ``N`` = the ``n_wells`` recorded in the power result's provenance (1, i.e. per
        mode, when absent), for a device at another detuning than the power series.

    Returns
    -------
    BudgetResult

    Raises
    ------
    DataError
        A result folder that is missing or lacks a needed quantity (a power result without
        ``interaction_constant``: absolute energies need a calibrated power fit).
    ConfigError
        A bad device file, a bad claim, or a sample mismatch with ``expect_same_sample``.
    """
    _check_settings(interaction, n_draws)
    n = int(n_draws)
    dev = device if isinstance(device, Device) else load_device(device)
    fits = read_fits(dispersion, power, interaction=interaction,
                     expect_same_sample=expect_same_sample)
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    draws = joint_draws(fits, dev, n, np.random.default_rng(ss), interaction=interaction)
    attrs = _attributes(fits, dev, draws, claims, ss, n, interaction=interaction,
                        expect_same_sample=expect_same_sample)
    ds = xr.Dataset(budget_variables(draws, dev), coords={"draw": np.arange(n)}, attrs=attrs)
    ds["draw"].attrs.update({"units": "1", "long_name": "joint draw index"})
    result = BudgetResult(ds)  # parses the claims: a bad claim is refused before any write
    if out is not None:
        result.save(out, figures=figures)
    return result


def _check_settings(interaction: str, n_draws: int) -> None:
    if interaction not in ("polariton", "exciton"):
        raise ConfigError(f"expected 'polariton' or 'exciton', found {interaction!r}",
                          key="interaction")
    if isinstance(n_draws, bool) or int(n_draws) != n_draws or n_draws < 2:
        raise ConfigError(f"expected a whole number of draws >= 2, found {n_draws!r}",
                          key="n_draws")


def _attributes(fits: Fits, dev: Device, draws: JointDraws, claims: Sequence[str],
                ss: np.random.SeedSequence, n: int, *, interaction: str,
                expect_same_sample: bool) -> dict[str, Any]:
    """The budget dataset's attributes: array, what is counted, claims, diagnostics, provenance."""
    attrs = {
        "model": "energy_budget",
        "kind": "budget",
        "n_nodes": dev.n_nodes,
        "n_inputs": dev.n_inputs,
        "n_outputs": dev.n_outputs,
        "rate_convention": dev.rate_convention,
        "cooled": int(dev.cooled),
        "counted": json.dumps(counted_lines(dev, draws.inputs)),
        "factors": json.dumps(sensitivity_factors(interaction)),
        "claims": json.dumps(list(claims)),
        "diagnostics": json.dumps(_diagnostics(fits, n)),
    }
    prov = _provenance(fits, dev, ss, n, interaction=interaction,
                       expect_same_sample=expect_same_sample)
    attrs["provenance"] = json.dumps(prov)
    attrs["created_by"] = f"polkit {prov['polkit_version']}"
    return attrs


def _diagnostics(fits: Fits, n: int) -> dict[str, Any]:
    disp, pw = fits.dispersion, fits.power
    n_disp, n_pow = fits.dispersion_draws["lp_energy_k0"].size, fits.interaction_draws.size
    return {
        "converged": bool(disp.converged and pw.converged),
        "dispersion_converged": bool(disp.converged),
        "power_converged": bool(pw.converged),
        "dispersion_draws_available": int(n_disp),
        "power_draws_available": int(n_pow),
        "n_draws": n,
        "resampled_with_replacement": {"dispersion": bool(n > n_disp), "power": bool(n > n_pow)},
        # inputs whose own model check said the model does not describe their data
        "model_check_failed": [role for role, res in (("dispersion", disp), ("power", pw))
                               if (res.model_check or {}).get("passed", True) is False],
    }


def _provenance(fits: Fits, dev: Device, ss: np.random.SeedSequence, n: int, *,
                interaction: str, expect_same_sample: bool) -> dict[str, Any]:
    return {
        "polkit_version": _polkit_version(),
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "seed": int(ss.entropy) if isinstance(ss.entropy, int) else str(ss.entropy),
        "seed_spawn_key": list(ss.spawn_key),
        "n_draws": n,
        "interaction": interaction,
        "dispersion": input_record(fits.dispersion, fits.dispersion_where),
        "power": input_record(fits.power, fits.power_where),
        "device": dev.to_dict(),
        "device_file": dev.source,
        "sample_check": bool(expect_same_sample),
        "libraries": _library_versions(),
    }


def _polkit_version() -> str:
    from polkit import __version__

    return __version__


def _library_versions() -> dict[str, str]:
    import platform

    from polkit.provenance import library_versions

    return {"python": platform.python_version(),
            **library_versions(("numpy", "scipy", "xarray", "h5netcdf"))}
