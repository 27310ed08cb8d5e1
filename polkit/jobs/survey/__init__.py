"""The wafer survey: every measured position of a wafer fitted, then mapped."""
