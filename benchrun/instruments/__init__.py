"""benchrun.instruments."""
