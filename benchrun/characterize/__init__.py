"""Characterisation: datasheet-style curves of recovery metrics against IF, di/dt and T.

Public API::

    from benchrun.characterize import curve_rows, write_curves_csv, fit_trends
"""

from benchrun.characterize.curves import (
    CURVE_METRICS,
    Trend,
    curve_rows,
    fit_trends,
    write_curves_csv,
)

__all__ = ["CURVE_METRICS", "Trend", "curve_rows", "fit_trends", "write_curves_csv"]
