"""polkit: a workbench for characterising exciton-polariton microcavity samples.

Scope: polkit reads angle-resolved maps and pump-power series into one validated
data model, fits coupled-oscillator and mean-field models to them with MCMC, and
carries the uncertainties into every derived number (detuning, Hopfield fractions,
masses, lifetimes, interaction constants, energy per operation).  It leaves
sampling to emcee, diagnostics to ArviZ, labelled arrays to xarray, corner plots to
corner and batch scheduling to dask.distributed.  It controls no hardware.

The main verbs are importable from here (``polkit.fit_dispersion``, ``polkit.fit_power``,
...); they are loaded on first use, so ``import polkit`` (and ``polkit --version``) stays
fast.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

from polkit.errors import *  # noqa: E402,F403  (the exceptions and warnings)
from polkit.errors import __all__ as _ERRORS  # noqa: E402

#: public name -> module that defines it (imported on first access)
_LAZY = {
    "load_map": "polkit.data",
    "load_series": "polkit.data",
    "FitResult": "polkit.inference",
    "fit_dispersion": "polkit.jobs.dispersion.run",
    "compare_models": "polkit.jobs.dispersion.compare",
    "fit_power": "polkit.jobs.power.run",
    "energy_budget": "polkit.jobs.budget.run",
    "run_survey": "polkit.jobs.survey.run",
    "SamplerSettings": "polkit.inference.settings",
    "GateSettings": "polkit.inference.settings",
    "LoadOptions": "polkit.data.options",
    "PowerCalibration": "polkit.jobs.power.options",
}

__all__ = ["__version__", *_LAZY, *_ERRORS]


def __getattr__(name: str):
    """Load a main verb on first access (PEP 562)."""
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'polkit' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
