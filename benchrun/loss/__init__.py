"""benchrun.loss."""
