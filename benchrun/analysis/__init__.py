"""benchrun.analysis."""
