"""polkit: a workbench for characterising exciton-polariton microcavity samples.

Scope: polkit reads angle-resolved maps and pump-power series into one validated
data model, fits coupled-oscillator and mean-field models to them with MCMC, and
carries the uncertainties into every derived number (detuning, Hopfield fractions,
masses, lifetimes, interaction constants, energy per operation).  It leaves
sampling to emcee, diagnostics to ArviZ, labelled arrays to xarray, corner plots to
corner and batch scheduling to dask.distributed.  It controls no hardware.
"""

from __future__ import annotations

__version__ = "0.1.0"

from .data import load_map, load_series  # noqa: E402,F401
from .errors import (  # noqa: F401
    ConfigError,
    ConvergenceWarning,
    DataError,
    DataWarning,
    FitError,
    PolkitError,
    PolkitWarning,
)
from .inference import FitResult  # noqa: E402,F401
from .workflows.dispersion import fit_dispersion  # noqa: E402,F401
