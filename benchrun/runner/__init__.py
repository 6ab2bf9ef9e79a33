"""benchrun.runner."""
