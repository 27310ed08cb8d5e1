"""Line fitting of single spectra: per-angle peak tables of maps and observables of power series."""
