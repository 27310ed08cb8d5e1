"""The dispersion job: an angle-resolved map in, the linear parameters of the sample out."""
