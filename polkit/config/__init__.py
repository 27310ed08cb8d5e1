"""Every settings file polkit reads: quantities, priors, calibration, device, manifest."""
