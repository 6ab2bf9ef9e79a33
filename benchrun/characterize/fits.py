"""Fitted surfaces y(IF, VR, di/dt, T) of a characterisation sweep (pure except the CSV writer).

Model (one per quantity: a recovery metric, or the loss energy per commutation)::

    ln y = ln y_ref + b_IF·ln(IF/IF_ref) + b_VR·ln(VR/VR_ref) + b_didt·ln(D/D_ref)
           + c·(T − T_ref)

i.e. a separable power law in forward current IF, reverse voltage VR and di/dt ``D`` with an
exponential temperature term, ``y = y_ref·(IF/IF_ref)^b_IF·(VR/VR_ref)^b_VR·(D/D_ref)^b_didt·
exp(c·(T − T_ref))``.  Source: power laws in current, voltage and di/dt with a temperature
factor are how switching-energy data are scaled between operating points in converter loss
estimates (common practice; exponents near 1 for energy against current and voltage and
0.5-1 for Qrr against IF, from memory).  ``c`` is the temperature coefficient per kelvin
*relative to the value* (``100·c`` % per kelvin, the same at every T); the absolute coefficient
at the reference is ``c·y_ref`` (unit per kelvin).  Over a few tens of kelvin an exponential
and a straight line in T agree to second order; the exponential keeps y positive and makes
the whole model linear in its parameters after the logarithm.

Fit: ordinary least squares of ln y on the design matrix (numpy ``lstsq``).  References are the
geometric means of IF, VR and di/dt and the arithmetic mean of T, so the intercept is the value
at the centre of the data.  Parameter covariance ``s²·(XᵀX)⁻¹`` with ``s²`` the residual
variance over ν = n − p degrees of freedom (elementary regression; GUM, JCGM 100:2008, H.3);
``residual_sd`` = s, the relative scatter of the points about the surface (device-to-device
spread plus repeatability).  An axis whose values span less than ``MIN_SPAN_RATIO`` = 1.3
(IF, VR, di/dt) or ``MIN_SPAN_K`` = 10 K (T) is *held*: its term is left out and the surface
holds only over that narrow range.  Such a spread is what a condition that was not swept
wanders by (the measured di/dt moves with the commutated current and the temperature, the
measured VR with the bus droop), and fitting it would credit that axis with what belongs to
the swept ones (our choice, common practice for what counts as a sweep).  The region of
validity is the measured range of every axis (``ranges``); :meth:`SurfaceFit.outside` names
what a condition leaves.

Points: the valid shots of one device at one test point are averaged into one point (their
measured conditions — IF, VR after the event, di/dt by the measurement's definition, the
recorded temperature — falling back to the requested ones), so repeated shots do not count
as independent evidence of the trend.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from benchrun.records import ShotResult

__all__ = [
    "AXES",
    "AxisRange",
    "SurfaceFit",
    "SurfacePoints",
    "fit_surface",
    "metric_surfaces",
    "surface_points",
    "write_fits_csv",
    "write_sweep_fits_csv",
]

#: Axes of the surface, in the order of the coefficients after ln y_ref.
AXES = ("forward_current_A", "vr_V", "didt_A_per_s", "temperature_K")
#: Axes entering as a power law (the last one, temperature, enters exponentially).
POWER_AXES = AXES[:3]
AXIS_SYMBOL = {"forward_current_A": "IF", "vr_V": "VR", "didt_A_per_s": "di/dt",
               "temperature_K": "T"}
AXIS_UNIT = {"forward_current_A": "A", "vr_V": "V", "didt_A_per_s": "A/s",
             "temperature_K": "K"}
#: Two values of an axis closer than this (relative) count as one value (float noise).
_DISTINCT_REL = 1e-3
#: An axis is fitted only when its values span at least this ratio (IF, VR, di/dt) ...
MIN_SPAN_RATIO = 1.3
#: ... or this many kelvin (T); else it is held (module docstring).
MIN_SPAN_K = 10.0

MODEL_TEXT = ("ln y = ln y_ref + b_IF·ln(IF/IF_ref) + b_VR·ln(VR/VR_ref) + "
              "b_didt·ln(di/dt / di/dt_ref) + c·(T − T_ref)")


@dataclass(frozen=True)
class AxisRange:
    """Measured range of one axis: ``minimum``..``maximum`` and how many distinct values."""

    axis: str
    minimum: float
    maximum: float
    n_distinct: int


@dataclass(frozen=True)
class SurfacePoints:
    """Points of one quantity: conditions per axis (SI) and the value ``y``; one per device
    and test point."""

    conditions: Mapping[str, tuple[float, ...]]
    y: tuple[float, ...]
    labels: tuple[str, ...] = ()
    left_out: int = 0  # points without a positive, finite value or a condition


@dataclass(frozen=True)
class SurfaceFit:
    """Result of :func:`fit_surface` (module docstring).

    ``terms`` names the fitted axes in coefficient order (after ``ln y_ref``); ``covariance``
    is over ``(ln y_ref, *terms)`` or None when ν = 0.
    """

    quantity: str
    unit: str
    reference: tuple[tuple[str, float], ...]
    terms: tuple[str, ...]
    coefficients: tuple[float, ...]
    covariance: tuple[tuple[float, ...], ...] | None
    n_points: int
    residual_sd: float | None
    ranges: tuple[AxisRange, ...]
    part: str = ""
    lot: str = ""

    @property
    def dof(self) -> int:
        """Residual degrees of freedom ν = n − p."""
        return self.n_points - len(self.coefficients)

    @property
    def y_ref(self) -> float:
        """Value at the reference conditions (the centre of the data)."""
        return math.exp(self.coefficients[0])

    def reference_of(self, axis: str) -> float:
        return dict(self.reference)[axis]

    def range_of(self, axis: str) -> AxisRange:
        return next(r for r in self.ranges if r.axis == axis)

    def coefficient(self, axis: str) -> float | None:
        """Exponent (IF, VR, di/dt) or relative temperature coefficient c [1/K]; None if held."""
        if axis not in self.terms:
            return None
        return self.coefficients[1 + self.terms.index(axis)]

    def standard_error(self, axis: str | None) -> float | None:
        """Standard error of a coefficient (``None`` axis: of ln y_ref); None when ν = 0."""
        if self.covariance is None:
            return None
        if axis is None:
            k = 0
        elif axis in self.terms:
            k = 1 + self.terms.index(axis)
        else:
            return None
        return math.sqrt(max(self.covariance[k][k], 0.0))

    @property
    def percent_per_kelvin(self) -> float | None:
        """100·c: relative temperature coefficient in % per kelvin (None when T is held)."""
        c = self.coefficient("temperature_K")
        return None if c is None else 100.0 * c

    @property
    def absolute_per_kelvin(self) -> float | None:
        """dy/dT at the reference, c·y_ref [unit/K] (None when T is held)."""
        c = self.coefficient("temperature_K")
        return None if c is None else c * self.y_ref

    def regressors(self, conditions: Mapping[str, Any]) -> np.ndarray:
        """Row(s) of the design matrix (1, ln(x/x_ref)…, T − T_ref) at ``conditions``."""
        cols = [np.ones(np.shape(np.asarray(conditions[self.terms[0]], dtype=float)))
                if self.terms else np.ones(())]
        for axis in self.terms:
            x = np.asarray(conditions[axis], dtype=float)
            ref = self.reference_of(axis)
            cols.append(x - ref if axis == "temperature_K" else np.log(x / ref))
        return np.stack(np.broadcast_arrays(*cols), axis=-1)

    def value(self, **conditions: Any) -> np.ndarray | float:
        """y at the given conditions (keyword per axis; held axes may be left out)."""
        out = np.exp(self.regressors(conditions) @ np.asarray(self.coefficients))
        return float(out) if np.ndim(out) == 0 else out

    def outside(self, **conditions: float) -> tuple[tuple[str, float], ...]:
        """(axis, excess) for each given condition outside the measured range: excess is the
        relative distance beyond the range for IF, VR, di/dt and kelvin for T (0 inside)."""
        out = []
        for axis, x in conditions.items():
            r = self.range_of(axis)
            x = float(x)
            if axis == "temperature_K":
                excess = max(r.minimum - x, x - r.maximum, 0.0)
            else:
                excess = max(r.minimum / x - 1.0, x / r.maximum - 1.0, 0.0)
            if excess > 0:
                out.append((axis, excess))
        return tuple(out)

    def describe(self) -> str:
        """One line: the fitted law with its coefficients ± standard errors."""
        from benchrun.units import format_si

        parts = [f"{self.quantity} = {format_si(self.y_ref, self.unit, 4)}"]
        for axis in self.terms:
            coef, se = self.coefficient(axis), self.standard_error(axis)
            pm = "" if se is None else f" ± {se:.2g}"
            sym, ref = AXIS_SYMBOL[axis], self.reference_of(axis)
            if axis == "temperature_K":
                pm_t = "" if se is None else f" ± {100 * se:.2g}"
                parts.append(f"exp(({100 * coef:.3g}{pm_t} %/K)·(T − {ref:.5g} K))")
            else:
                parts.append(f"({sym} / {format_si(ref, AXIS_UNIT[axis], 4)})^({coef:.3f}{pm})")
        return "·".join(parts)


def _distinct(values: np.ndarray) -> int:
    """Number of values differing by more than ``_DISTINCT_REL`` relative."""
    v = np.sort(np.asarray(values, dtype=float))
    if v.size == 0:
        return 0
    scale = np.maximum(np.abs(v[1:]), np.abs(v[:-1]))
    return 1 + int(np.sum(np.diff(v) > _DISTINCT_REL * np.maximum(scale, 1e-300)))


def _spans(r: AxisRange) -> bool:
    """True when the axis was swept (module docstring)."""
    if r.axis == "temperature_K":
        return r.maximum - r.minimum >= MIN_SPAN_K
    return r.maximum >= MIN_SPAN_RATIO * r.minimum


def fit_surface(points: SurfacePoints, *, quantity: str, unit: str = "",
                part: str = "", lot: str = "") -> SurfaceFit:
    """Least-squares fit of the separable surface (module docstring) to ``points``.

    Raises ``ValueError`` when there are fewer points than parameters or two axes cannot be
    told apart (the design matrix is rank deficient).
    """
    y = np.asarray(points.y, dtype=float)
    if y.size == 0:
        raise ValueError(f"no points to fit {quantity}")
    if np.any(~np.isfinite(y)) or np.any(y <= 0):
        raise ValueError(f"{quantity}: a power-law surface needs positive values")
    cond = {a: np.asarray(points.conditions[a], dtype=float) for a in AXES}
    for axis in POWER_AXES:
        if np.any(~(cond[axis] > 0)):
            raise ValueError(f"{quantity}: {AXIS_SYMBOL[axis]} must be positive at every point")
    ranges = tuple(AxisRange(a, float(cond[a].min()), float(cond[a].max()), _distinct(cond[a]))
                   for a in AXES)
    terms = tuple(r.axis for r in ranges if r.n_distinct >= 2 and _spans(r))
    reference = tuple(
        (a, float(np.mean(cond[a])) if a == "temperature_K"
         else float(np.exp(np.mean(np.log(cond[a]))))) for a in AXES)
    ref = dict(reference)
    cols = [np.ones_like(y)]
    for axis in terms:
        cols.append(cond[axis] - ref[axis] if axis == "temperature_K"
                    else np.log(cond[axis] / ref[axis]))
    x = np.column_stack(cols)
    p = x.shape[1]
    if y.size < p:
        raise ValueError(f"{quantity}: {y.size} points cannot fit {p} parameters "
                         f"(ln y_ref and {', '.join(AXIS_SYMBOL[a] for a in terms)})")
    if np.linalg.matrix_rank(x) < p:
        raise ValueError(f"{quantity}: the axes {', '.join(AXIS_SYMBOL[a] for a in terms)} "
                         "were not varied independently (rank-deficient design)")
    ln_y = np.log(y)
    beta, *_ = np.linalg.lstsq(x, ln_y, rcond=None)
    dof = y.size - p
    cov = sd = None
    if dof > 0:
        resid = ln_y - x @ beta
        s2 = float(resid @ resid / dof)
        sd = math.sqrt(s2)
        c = s2 * np.linalg.inv(x.T @ x)
        cov = tuple(tuple(float(v) for v in row) for row in c)
    return SurfaceFit(quantity=quantity, unit=unit, reference=reference, terms=terms,
                      coefficients=tuple(float(b) for b in beta), covariance=cov,
                      n_points=int(y.size), residual_sd=sd, ranges=ranges, part=part, lot=lot)


def _condition(shot: ShotResult, axis: str) -> float | None:
    measured = {"forward_current_A": "if_A", "vr_V": "vr_V", "didt_A_per_s": "didt_A_per_s",
                "temperature_K": "temperature_K"}[axis]
    value = shot.conditions.get(measured)
    if value is None:
        value = {"forward_current_A": shot.point.forward_current_A,
                 "vr_V": shot.point.bus_voltage_V,
                 "didt_A_per_s": shot.point.didt_A_per_s,
                 "temperature_K": shot.point.temperature_K}[axis]
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return abs(value) if math.isfinite(value) else None


def surface_points(shots: Iterable[ShotResult],
                   value_of: Callable[[ShotResult], float | None]) -> SurfacePoints:
    """Valid shots averaged per (serial, test point): conditions and ``value_of(shot)``."""
    groups: dict[tuple, list[ShotResult]] = {}
    for s in shots:
        if s.valid:
            groups.setdefault((s.serial, s.point.index), []).append(s)
    conds: dict[str, list[float]] = {a: [] for a in AXES}
    ys: list[float] = []
    labels: list[str] = []
    left_out = 0
    for (serial, index), members in groups.items():
        rows = []
        for s in members:
            y = value_of(s)
            c = [_condition(s, a) for a in AXES]
            if y is None or not math.isfinite(y) or y <= 0 or any(v is None for v in c):
                continue
            rows.append((c, y))
        if not rows:
            left_out += 1
            continue
        for k, a in enumerate(AXES):
            conds[a].append(float(np.mean([c[k] for c, _ in rows])))
        ys.append(float(np.mean([y for _, y in rows])))
        labels.append(f"{serial} point {index}")
    return SurfacePoints({a: tuple(v) for a, v in conds.items()}, tuple(ys), tuple(labels),
                         left_out)


def metric_surfaces(shots: Sequence[ShotResult],
                    metrics: Sequence[str]) -> tuple[tuple[SurfaceFit, ...], tuple[str, ...]]:
    """A surface per metric and part/lot where it can be fitted; else the reason, one line."""
    from benchrun.analysis.metrics_meta import METRICS

    fits: list[SurfaceFit] = []
    reasons: list[str] = []
    by_part: dict[tuple[str, str], list[ShotResult]] = {}
    for s in shots:
        by_part.setdefault((s.part, s.lot), []).append(s)
    for (part, lot), members in by_part.items():
        for metric in metrics:
            pts = surface_points(members, lambda s, m=metric: _as_float(s.metrics.get(m)))
            try:
                fits.append(fit_surface(pts, quantity=metric, unit=METRICS[metric].unit,
                                        part=part, lot=lot))
            except ValueError as exc:
                reasons.append(f"{part} {lot}: {exc}")
    return tuple(fits), tuple(reasons)


def _as_float(value: Any) -> float | None:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


#: Columns of ``fits.csv`` (SI units; empty cell = not fitted / not applicable).
FITS_COLUMNS = (
    "kind", "part", "lot", "metric", "unit", "model", "axis", "held", "n_points", "dof",
    "ref_value", "u_ref_value_rel",
    "ref_forward_current_A", "ref_vr_V", "ref_didt_A_per_s", "ref_temperature_K",
    "b_forward_current", "u_b_forward_current", "b_vr", "u_b_vr", "b_didt", "u_b_didt",
    "tc_rel_per_K", "u_tc_rel_per_K", "tc_percent_per_K", "tc_abs_per_K", "u_tc_abs_per_K",
    "residual_sd_rel",
    "min_forward_current_A", "max_forward_current_A", "min_vr_V", "max_vr_V",
    "min_didt_A_per_s", "max_didt_A_per_s", "min_temperature_K", "max_temperature_K",
)
_COEF_COLUMN = {"forward_current_A": "b_forward_current", "vr_V": "b_vr",
                "didt_A_per_s": "b_didt"}


def fit_rows(trends: Iterable[Any] = (), surfaces: Iterable[SurfaceFit] = ()
             ) -> list[dict[str, Any]]:
    """One row per fit: the one-axis trends (:func:`benchrun.characterize.fit_trends`) and the
    surfaces, in :data:`FITS_COLUMNS`."""
    rows: list[dict[str, Any]] = []
    for tr in trends:
        row: dict[str, Any] = {
            "kind": "trend", "metric": tr.metric, "axis": tr.axis,
            "model": ("y = ref_value·(x/x_ref)^b" if tr.model == "power"
                      else "y = ref_value + tc_abs_per_K·(T − T_ref)"),
            "held": ";".join(f"{k}={v:g}" for k, v in tr.held), "n_points": len(tr.x),
            "dof": len(tr.x) - 2, "ref_value": tr.ref_value,
            "u_ref_value_rel": (None if tr.u_ref is None or tr.ref_value == 0
                                else tr.u_ref / abs(tr.ref_value)),
            f"ref_{tr.axis}": tr.x_ref,
        }
        if tr.model == "power":
            row[_COEF_COLUMN[tr.axis]] = tr.slope
            row["u_" + _COEF_COLUMN[tr.axis]] = tr.u_slope
        else:
            row["tc_abs_per_K"] = tr.slope
            row["u_tc_abs_per_K"] = tr.u_slope
            row["tc_percent_per_K"] = tr.percent_per_kelvin
        rows.append(row)
    for f in surfaces:
        row = {"kind": "surface", "part": f.part, "lot": f.lot, "metric": f.quantity,
               "unit": f.unit, "model": MODEL_TEXT,
               "held": ";".join(f"{r.axis}={r.minimum:g}" + ("" if r.n_distinct < 2
                                                             else f"..{r.maximum:g}")
                                for r in f.ranges if r.axis not in f.terms),
               "n_points": f.n_points, "dof": f.dof, "ref_value": f.y_ref,
               "u_ref_value_rel": f.standard_error(None), "residual_sd_rel": f.residual_sd}
        for axis, ref in f.reference:
            row[f"ref_{axis}"] = ref
        for axis, col in _COEF_COLUMN.items():
            row[col] = f.coefficient(axis)
            row["u_" + col] = f.standard_error(axis)
        c, se = f.coefficient("temperature_K"), f.standard_error("temperature_K")
        row["tc_rel_per_K"], row["u_tc_rel_per_K"] = c, se
        row["tc_percent_per_K"] = f.percent_per_kelvin
        row["tc_abs_per_K"] = f.absolute_per_kelvin
        row["u_tc_abs_per_K"] = None if se is None else se * f.y_ref
        for r in f.ranges:
            row[f"min_{r.axis}"], row[f"max_{r.axis}"] = r.minimum, r.maximum
        rows.append(row)
    return rows


def write_fits_csv(path: str | Path, trends: Iterable[Any] = (),
                   surfaces: Iterable[SurfaceFit] = ()) -> Path:
    """Write :func:`fit_rows` as CSV (``fits.csv`` beside ``curves.csv``)."""
    path = Path(path)
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=FITS_COLUMNS)
        writer.writeheader()
        for row in fit_rows(trends, surfaces):
            writer.writerow({k: ("" if row.get(k) is None else row[k]) for k in FITS_COLUMNS})
    return path


def write_sweep_fits_csv(shots: Sequence[ShotResult], path: str | Path) -> Path:
    """``fits.csv`` of a sweep: the one-axis trends and the surfaces of the curve metrics
    (what the characterisation report shows)."""
    from benchrun.characterize.curves import CURVE_METRICS, fit_trends

    surfaces, _ = metric_surfaces(shots, CURVE_METRICS)
    return write_fits_csv(path, fit_trends(shots, CURVE_METRICS), surfaces)
