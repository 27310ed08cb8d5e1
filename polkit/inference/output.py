"""What an ensemble run returns: the chains, the gate's findings and the run's seed."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from polkit.inference.priors import ParameterSpace

__all__ = ["SamplerOutput"]


@dataclass
class SamplerOutput:
    """The chains of a run and what the convergence gate found.

    Attributes
    ----------
    space
        The parameter space sampled.
    chains
        Shape ``(n_ensembles, steps, walkers, P)``.
    log_prob
        Log posterior, shape ``(n_ensembles, steps, walkers)``.
    acceptance
        Acceptance fraction of each walker after burn-in, ``(n_ensembles, walkers)``.
    autocorr_time
        Integrated autocorrelation time, ``(n_ensembles, P)`` in steps.
    burn_in, thin
        Steps dropped at the start and the thinning of :meth:`posterior_draws`.
    converged
        Whether every gate passed.
    reasons
        Why not, one line per failed test (empty when converged).
    diagnostics
        JSON-ready dict (see :func:`run_ensemble`).
    seed_entropy, seed_spawn_key
        The root :class:`~numpy.random.SeedSequence` of the run.
    extras, extras_units
        Per-walker side results of the log-likelihood, ``{name: (n_ensembles, steps,
        walkers)}``, and their units.
    """

    space: ParameterSpace
    chains: np.ndarray
    log_prob: np.ndarray
    acceptance: np.ndarray
    autocorr_time: np.ndarray
    burn_in: int
    thin: int
    converged: bool
    reasons: list[str]
    diagnostics: dict[str, Any]
    seed_entropy: int
    seed_spawn_key: tuple[int, ...] = ()
    extras: dict[str, np.ndarray] = field(default_factory=dict)
    extras_units: dict[str, str] = field(default_factory=dict)

    @property
    def names(self) -> list[str]:
        """Parameter names."""
        return self.space.names

    @property
    def n_ensembles(self) -> int:
        """Number of independently seeded ensembles."""
        return self.chains.shape[0]

    def _kept(self, array: np.ndarray) -> np.ndarray:
        """(E, S, W, ...) -> (E*W, D, ...) after burn-in and thinning; chain = ensemble-major."""
        kept = array[:, self.burn_in :: self.thin]
        kept = np.moveaxis(kept, 2, 1)  # (E, W, D, ...)
        return kept.reshape((-1,) + kept.shape[2:])

    def _chain_coords(self) -> dict:
        n_ens, _, n_walk = self.chains.shape[:3]
        return {
            "chain": np.arange(n_ens * n_walk),
            "ensemble": ("chain", np.repeat(np.arange(n_ens), n_walk)),
            "walker": ("chain", np.tile(np.arange(n_walk), n_ens)),
        }

    def posterior_draws(self) -> xr.Dataset:
        """The burned-in, thinned draws as a Dataset with dims ``(chain, draw)``.

        ``chain`` runs over walkers (ensemble-major: chain = ensemble * walkers +
        walker, with ``ensemble`` and ``walker`` coordinates); every variable
        (parameters, then extras) carries ``units`` and ``long_name``.
        """
        kept = self._kept(self.chains)  # (C, D, P)
        coords = self._chain_coords()
        coords["draw"] = np.arange(kept.shape[1])
        data = {}
        for j, p in enumerate(self.space):
            data[p.name] = (
                ("chain", "draw"),
                kept[:, :, j],
                {"units": p.units, "long_name": p.description or p.name.replace("_", " ")},
            )
        for name, values in self.extras.items():
            data[name] = (
                ("chain", "draw"),
                self._kept(values),
                {"units": self.extras_units.get(name, "1"), "long_name": name.replace("_", " ")},
            )
        return xr.Dataset(data, coords=coords)

    def sample_stats(self) -> xr.Dataset:
        """``lp`` (log posterior of each kept draw) and per-walker ``acceptance``."""
        lp = self._kept(self.log_prob)
        coords = self._chain_coords()
        coords["draw"] = np.arange(lp.shape[1])
        return xr.Dataset(
            {
                "lp": (("chain", "draw"), lp, {"units": "1", "long_name": "log posterior"}),
                "acceptance": (
                    ("chain",),
                    self.acceptance.reshape(-1),
                    {"units": "1", "long_name": "acceptance fraction after burn-in"},
                ),
            },
            coords=coords,
        )
