"""The energy-budget job: what a device built from the sample would cost, per posterior draw."""
