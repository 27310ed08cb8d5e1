"""The jobs: dispersion, power series, energy budget, wafer survey; each with stages and a run."""
