"""benchrun.simulator."""
