"""benchrun.grading."""
