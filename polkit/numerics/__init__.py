"""Numerical engines with no physics of their own: compiled kernels and their numpy twins."""
