"""How the ensemble sampler runs and when it stops: two settings objects shared by every job."""

from __future__ import annotations

import dataclasses
import threading
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from polkit._settings import settings_base


@dataclass(frozen=True)
class GateSettings:
    """The convergence gate: when the reported draws are good enough to stop.

    Attributes
    ----------
    ess_target
        Bulk and tail ESS every physics parameter's reported draws must reach (ArviZ,
        walkers as chains).  With several ensembles each must reach ``ess_target /
        n_ensembles`` and the pooled draws the whole target.
    nuisance_ess_target
        The lower target of parameters never reported for themselves (noise terms).
    rhat_max, walker_groups
        Limit on rank-normalised R-hat over ``walker_groups`` groups of an ensemble's
        walkers.
    autocorr_factor
        Safety floor: the chain must be at least this many autocorrelation times long.
    tau_rtol
        With a value, the autocorrelation time must also have changed by less than this
        (relative) since the previous check (``None``: not required).
    acceptance_range
        Allowed per-walker acceptance fraction after burn-in.
    nested_rhat_max
        Strict-mode limit on nested R-hat over independently seeded ensembles.
    ess_rhat
        Compute ArviZ's ESS and R-hat and gate on them (``False``: a preliminary run whose
        draws are never reported).
    """

    ess_target: float = 1000.0
    nuisance_ess_target: float = 400.0
    rhat_max: float = 1.01
    walker_groups: int = 4
    autocorr_factor: float = 25.0
    tau_rtol: float | None = None
    acceptance_range: tuple[float, float] = (0.15, 0.7)
    nested_rhat_max: float = 1.01
    ess_rhat: bool = True


@dataclass(frozen=True)
class SamplerSettings:
    """How long and how the ensemble sampler runs.

    ``None`` in ``n_walkers``, ``max_steps`` and ``min_steps`` means the job's own default
    (each job knows what its posterior needs); :func:`polkit.inference.run_ensemble` uses
    32 walkers, 20000 and 500 steps.

    Attributes
    ----------
    n_walkers
        Walkers per ensemble (at least twice the number of parameters).
    max_steps, min_steps, check_every
        Step limits per ensemble and the spacing of convergence checks.
    strict
        Four or more independently seeded ensembles, also gated on nested R-hat.
    n_ensembles
        Number of ensembles; default 1, or 4 in strict mode.
    moves
        emcee moves; default :func:`polkit.inference.sampler.default_moves`.
    progress, progress_label
        Show a ``tqdm.auto`` progress bar, and its label.
    stop_event
        A :class:`threading.Event`; when set, sampling ends cleanly after the current step
        and the result is marked not converged (the checkpoint can be resumed).
    gate
        The convergence gate (:class:`GateSettings`).
    """

    n_walkers: int | None = None
    max_steps: int | None = None
    min_steps: int | None = None
    check_every: int = 100
    strict: bool = False
    n_ensembles: int | None = None
    moves: Any = None
    progress: bool = True
    progress_label: str = "MCMC"
    stop_event: threading.Event | None = field(default=None, compare=False)
    gate: GateSettings = field(default_factory=GateSettings)

    @classmethod
    def of(cls, settings: SamplerSettings | Mapping[str, Any] | None = None,
           **changes) -> SamplerSettings:
        """``settings`` (an object, a dict of field values or ``None``) with ``changes``.

        ``changes`` whose value is ``None`` are ignored (a caller's "not given"); unknown
        names are refused with the list of known ones.
        """
        base = settings_base(cls, settings, changes,
                             public_name="polkit.inference.SamplerSettings",
                             key="sampler settings", noun="sampler setting")
        given = {k: v for k, v in changes.items() if v is not None}
        return dataclasses.replace(base, **given) if given else base

    def with_defaults(self, **defaults) -> SamplerSettings:
        """These settings with each ``None`` field replaced by the job's default."""
        fill = {k: v for k, v in defaults.items() if getattr(self, k) is None}
        return dataclasses.replace(self, **fill) if fill else self
