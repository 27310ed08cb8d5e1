"""Caveats a dispersion result carries in its diagnostics (``summary.json``), measured, not guessed.

Each caveat is a sentence with the measurement behind it; :func:`add_caveats` appends them to
``diagnostics["caveats"]`` of a sampler run before its result is built.
"""

from __future__ import annotations

from polkit.inference import SamplerOutput

__all__ = ["PEAK_TABLE_COVERAGE", "add_caveats"]

#: coverage of the peak-table path's intervals, measured on invented demo-like maps by
#: tests/table_coverage.py (20 maps, 4 K sample with 2g = 12 meV, detuning -4 meV, cavity
#: and exciton FWHM 0.3 and 0.8 meV; simulated by a generator that does not import polkit;
#: the default max_steps, every run converged)
PEAK_TABLE_COVERAGE = (
    "peak-table path: on 20 invented demo-like maps its intervals undercover; the truth lay "
    "inside the 68 % / 95 % intervals in 50 % / 90 % of maps for the cavity linewidth, "
    "55 % / 85 % for the exciton linewidth (biased high, mean z +1.0, rms z 1.5) and 0 % / 0 % "
    "for the Rabi splitting (biased low by about 5 posterior sd, a few ueV at 2g = 12 meV); "
    "use the whole-map fit for linewidths and for the Rabi splitting's uncertainty"
)


def add_caveats(output: SamplerOutput, caveats: list[str]) -> SamplerOutput:
    """Append ``caveats`` to ``output.diagnostics["caveats"]`` (a list of sentences)."""
    diagnostics = dict(output.diagnostics)
    diagnostics["caveats"] = list(diagnostics.get("caveats", [])) + list(caveats)
    output.diagnostics = diagnostics
    return output
