"""Characterisation: datasheet-style curves of recovery metrics against IF, di/dt and T.

Public API::

    from benchrun.characterize import curve_rows, write_curves_csv, fit_trends
    from benchrun.characterize import fit_surface, metric_surfaces, write_sweep_fits_csv
"""

from benchrun.characterize.curves import (
    CURVE_METRICS,
    Trend,
    curve_rows,
    fit_trends,
    write_curves_csv,
)
from benchrun.characterize.fits import (
    SurfaceFit,
    fit_surface,
    metric_surfaces,
    write_fits_csv,
    write_sweep_fits_csv,
)

__all__ = ["CURVE_METRICS", "SurfaceFit", "Trend", "curve_rows", "fit_surface", "fit_trends",
           "metric_surfaces", "write_curves_csv", "write_fits_csv", "write_sweep_fits_csv"]
