"""benchrun: automated inductive double-pulse testing of power diodes.

Measures reverse recovery (trr, Qrr, Irrm, Err ...) on a real or simulated bench, grades each
device against limits with a stated decision rule and renders a signed acceptance report.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
