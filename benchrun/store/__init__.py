"""benchrun.store."""
