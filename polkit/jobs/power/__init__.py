"""The power-series job: a pump-power series in, thresholds and interaction constants out."""
