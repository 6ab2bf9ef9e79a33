"""benchrun.report."""
