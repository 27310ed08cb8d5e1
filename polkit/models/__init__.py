"""Pure physics of polkit: arrays in, arrays out, vectorised over a leading batch axis.

Modules: :mod:`~polkit.models.dispersion` (cavity photon, coupled oscillators, Hopfield
fractions), :mod:`~polkit.models.green` (photon Green's function), :mod:`~polkit.models.spectral`
(whole-map branch bases; their variable projection is :mod:`polkit.numerics.projection`),
:mod:`~polkit.models.simulate` (noiseless maps),
:mod:`~polkit.models.lineshapes`, :mod:`~polkit.models.coherent` (driven-dissipative
steady states), :mod:`~polkit.models.reservoir` (nonresonant drive),
:mod:`~polkit.models.calibration` (pump power to density),
:mod:`~polkit.models.device_energy` (energy per operation).
"""

from polkit.models import (  # noqa: F401
    calibration,
    coherent,
    device_energy,
    dispersion,
    green,
    lineshapes,
    reservoir,
    simulate,
    spectral,
)
