"""The run plan of the ensemble runner: its resolved settings and its convergence gate.

Every decision reads only the stored steps of the chains, so a resumed run takes the
same decisions as an uninterrupted one (see :mod:`polkit.inference.sampler`).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from polkit.errors import ConfigError
from polkit.inference import diagnostics as diag
from polkit.inference.settings import GateSettings, SamplerSettings

__all__ = ["GateRule", "RunPlan", "gate_at", "pooled_ess_short", "burn_thin", "to_nested"]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class GateRule:
    """The settings of the convergence gate (see :func:`diag.convergence_gate`)."""

    autocorr_factor: float
    tau_rtol: float | None
    acceptance_range: tuple[float, float]
    targets: dict[str, float] | None  # None: ESS and R-hat not gated (ess_rhat=False)
    n_ensembles: int
    rhat_max: float
    walker_groups: int
    check_every: int

    @classmethod
    def of(cls, gate: GateSettings, names: Sequence[str], nuisance: Sequence[str],
           n_ensembles: int, check_every: int) -> GateRule:
        """The rule of ``gate`` for parameters ``names`` (``nuisance`` get the lower target)."""
        return cls(
            autocorr_factor=float(gate.autocorr_factor),
            tau_rtol=None if gate.tau_rtol is None else float(gate.tau_rtol),
            acceptance_range=tuple(gate.acceptance_range),
            targets=diag.ess_targets(names, float(gate.ess_target), list(nuisance),
                                     float(gate.nuisance_ess_target))
            if gate.ess_rhat else None,
            n_ensembles=n_ensembles, rhat_max=float(gate.rhat_max),
            walker_groups=int(gate.walker_groups), check_every=int(check_every))

    def per_ensemble(self) -> dict[str, float] | None:
        """Each ensemble's share of the ESS targets."""
        if self.targets is None:
            return None
        return {k: v / self.n_ensembles for k, v in self.targets.items()}


def check_gate_settings(gate: GateSettings) -> None:
    """Refuse gate settings no run can use (:class:`ConfigError` naming the setting)."""
    for key, value, ok, want in (
        ("ess_target", gate.ess_target, gate.ess_target > 0, "> 0"),
        ("nuisance_ess_target", gate.nuisance_ess_target, gate.nuisance_ess_target > 0,
         "> 0"),
        ("rhat_max", gate.rhat_max, gate.rhat_max >= 1.0, ">= 1"),
        ("walker_groups", gate.walker_groups,
         isinstance(gate.walker_groups, (int, np.integer)) and gate.walker_groups >= 2,
         "an int >= 2"),
    ):
        if not ok:
            raise ConfigError(f"{key} must be {want}; got {value!r}", key=key)


@dataclass(frozen=True)
class RunPlan:
    """The resolved settings of one run.

    Attributes
    ----------
    settings
        The sampler settings with every ``None`` step limit and walker count filled.
    n_ensembles
        Number of independently seeded ensembles.
    moves
        The emcee moves.
    rule
        The convergence gate.
    extras_units
        ``{name: units}`` of the log-likelihood's side results.
    """

    settings: SamplerSettings
    n_ensembles: int
    moves: Any
    rule: GateRule
    extras_units: dict[str, str]

    @property
    def n_walkers(self) -> int:
        return self.settings.n_walkers

    @property
    def max_steps(self) -> int:
        return self.settings.max_steps

    @property
    def strict(self) -> bool:
        return self.settings.strict

    def shortfall(self, chains: np.ndarray, length: int, names) -> str | None:
        """Why the pooled draws of ``chains`` (E, S, W, P) cut to ``length`` steps are not
        yet enough (pooled ESS, and nested R-hat in strict mode); ``None`` when they are."""
        _, burn, thin = burn_thin(chains, length)
        kept = chains[:, burn::thin]
        short = pooled_ess_short(kept, names, self.rule.targets)
        if short:
            return f"pooled ESS below the target at {length} steps ({short})"
        if self.strict:
            rhat = float(np.max(diag.nested_rhat(to_nested(kept))))
            if not rhat <= self.settings.gate.nested_rhat_max:
                return f"nested R-hat {rhat:.4f} at {length} steps"
        return None

    def next_length(self, length: int) -> int:
        """The common length after ``length`` when the pooled draws fall short."""
        check_every = self.settings.check_every
        return min(self.max_steps, length + max(check_every, length // 2))


def gate_at(ens, n, space, rule: GateRule):
    """The convergence gate of ensemble ``ens`` on its first ``n`` steps."""
    chain, lp = ens.chain(n)
    prev_tau = None
    if rule.tau_rtol is not None:
        previous = n - rule.check_every
        prev_tau = ens.tau_at(previous) if previous >= 2 else None
    check = diag.convergence_gate(
        chain, lp, prev_tau, names=space.names, autocorr_factor=rule.autocorr_factor,
        tau_rtol=rule.tau_rtol, acceptance_range=rule.acceptance_range,
        ess_target=rule.per_ensemble(), rhat_max=rule.rhat_max,
        walker_groups=rule.walker_groups,
    )
    ens.taus[n] = check.tau
    log.debug("%s at %d steps: %s", ens.name, n, "; ".join(check.reasons) or "passed")
    return check


def pooled_ess_short(kept: np.ndarray, names, targets) -> str:
    """Parameters whose pooled bulk or tail ESS over (E, D, W, P) draws is below target."""
    e, d, w, p = kept.shape
    pooled = np.moveaxis(kept, 2, 1).reshape(e * w, d, p)  # chains = ensemble-major walkers
    ds = diag._draws_dataset(np.moveaxis(pooled, 0, 1), names)
    found = diag.arviz_diagnostics(ds)
    return ", ".join(
        f"{n} {min(found['ess_bulk'][n], found['ess_tail'][n]):.0f}" for n in names
        if not min(found["ess_bulk"][n], found["ess_tail"][n]) >= targets[n])


def burn_thin(chains: np.ndarray, length: int) -> tuple[np.ndarray, int, int]:
    """Autocorrelation times (E, P), burn-in (5 tau, at most half) and thin (tau / 2)."""
    taus = np.stack([diag.autocorr_time(c[length // 4 : length]) for c in chains])
    burn, thin = diag.burn_and_thin(float(np.max(taus)), length)
    return taus, burn, thin


def to_nested(kept: np.ndarray) -> np.ndarray:
    """(E, D, W, P) -> (K=E, M=W, N=D, P) for nested R-hat."""
    return np.moveaxis(kept, 2, 1)
