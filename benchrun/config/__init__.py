"""benchrun.config."""
