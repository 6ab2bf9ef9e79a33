"""Curve points and fitted trends of a characterisation sweep (pure except the CSV writer).

Points
    One row per measured (valid or not) shot: its requested and measured conditions, every
    metric under its metric key (:data:`benchrun.analysis.metrics_meta.METRICS`), and its
    flags (``;``-joined).  Invalid shots are kept, flagged, and never enter a fit.

Trends (``fit_trends``), per metric, over the valid shots' device means at each condition:

* against IF and against di/dt (the other conditions held): a power law
  ``y = y_ref·(x/x_ref)^b`` fitted by least squares in log-log, ``x_ref`` the geometric mean of
  the x values (power-law trends are the usual datasheet description of Qrr, Irrm and Err
  against current and di/dt — common practice; e.g. Qrr ∝ IF^b with b between 0.5 and 1 for
  a fast diode, from memory);
* against temperature: a straight line ``y = y_ref + s·(T − T_ref)`` by least squares, with the
  temperature coefficient ``s`` per kelvin and ``100·s/y_ref`` % per kelvin at ``T_ref`` (the
  mean temperature) — linear temperature coefficients as datasheets state them (common
  practice).

Each fit carries its standard errors (residual variance with n − 2 degrees of freedom,
elementary regression) — None when n = 2, where a line fits exactly and says nothing about its
own scatter.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from benchrun.analysis.metrics_meta import METRICS
from benchrun.records import ShotResult

__all__ = ["CURVE_METRICS", "Trend", "curve_rows", "fit_trends", "write_curves_csv"]

#: Metrics drawn against the conditions (datasheet curves).
CURVE_METRICS = ("qrr_C", "irrm_A", "trr_s", "err_J", "softness")

_CONDITION_COLUMNS = (
    ("temperature_K", lambda s: s.point.temperature_K),
    ("bus_voltage_V", lambda s: s.point.bus_voltage_V),
    ("forward_current_A", lambda s: s.point.forward_current_A),
    ("didt_target_A_per_s", lambda s: s.point.didt_A_per_s),
    ("gate_resistance_ohm", lambda s: s.point.gate_resistance_ohm),
    ("measured_temperature_K", lambda s: s.conditions.get("temperature_K")),
    ("measured_if_A", lambda s: s.conditions.get("if_A")),
    ("measured_vr_V", lambda s: s.conditions.get("vr_V")),
    ("measured_didt_A_per_s", lambda s: s.conditions.get("didt_A_per_s")),
    ("gate_resistance_used_ohm", lambda s: s.acquisition.get("gate_resistance_ohm")),
    ("gate_drive_used_V", lambda s: s.acquisition.get("gate_drive_V")),
)


def curve_rows(shots: Iterable[ShotResult]) -> list[dict[str, Any]]:
    """One row per shot: identity, conditions, every metric key, ``valid`` and ``flags``."""
    rows = []
    for s in shots:
        row: dict[str, Any] = {"serial": s.serial, "point": s.point.index,
                               "label": s.point.label, "repeat": s.repeat}
        for name, get in _CONDITION_COLUMNS:
            row[name] = get(s)
        for key in METRICS:
            row[key] = s.metrics.get(key)
        row["valid"] = bool(s.valid)
        row["flags"] = ";".join(s.flags)
        rows.append(row)
    return rows


def write_curves_csv(shots: Iterable[ShotResult], path: str | Path) -> Path:
    """Write :func:`curve_rows` as CSV (SI units; empty cell = not measured)."""
    rows = curve_rows(shots)
    columns = (["serial", "point", "label", "repeat"] + [n for n, _ in _CONDITION_COLUMNS]
               + list(METRICS) + ["valid", "flags"])
    path = Path(path)
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns)
        writer.writeheader()
        for row in rows:
            writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in columns})
    return path


@dataclass(frozen=True)
class Trend:
    """A fitted trend of ``metric`` against ``axis`` with the other conditions held.

    ``model`` is ``"power"`` (``value = ref_value·(x/x_ref)^slope``) or ``"linear"``
    (``value = ref_value + slope·(x − x_ref)``; ``slope`` per kelvin for temperature).
    """

    metric: str
    axis: str
    model: str
    held: tuple[tuple[str, float], ...]
    x: tuple[float, ...]
    y: tuple[float, ...]
    x_ref: float
    ref_value: float
    slope: float
    u_slope: float | None
    u_ref: float | None

    @property
    def percent_per_kelvin(self) -> float | None:
        """100·slope/ref_value for a linear temperature trend (else None)."""
        if self.model != "linear" or self.ref_value == 0:
            return None
        return 100.0 * self.slope / self.ref_value


def _line(u: np.ndarray, v: np.ndarray) -> tuple[float, float, float | None, float | None]:
    """Least-squares v = a + b·u with u centred: (a, b, u(a), u(b))."""
    sxx = float(np.sum(u * u))
    b = float(np.sum(u * (v - v.mean())) / sxx)
    a = float(v.mean())
    if u.size <= 2:
        return a, b, None, None
    s2 = float(np.sum((v - a - b * u) ** 2) / (u.size - 2))
    return a, b, math.sqrt(s2 / u.size), math.sqrt(s2 / sxx)


_AXES = {
    "forward_current_A": ("power", ("temperature_K", "bus_voltage_V", "gate_resistance_ohm",
                                    "didt_A_per_s")),
    "didt_A_per_s": ("power", ("temperature_K", "bus_voltage_V", "forward_current_A")),
    "temperature_K": ("linear", ("bus_voltage_V", "forward_current_A", "gate_resistance_ohm",
                                 "didt_A_per_s")),
}


def _x_of(shot: ShotResult, axis: str) -> float | None:
    if axis == "didt_A_per_s":
        return shot.conditions.get("didt_A_per_s")
    return getattr(shot.point, axis)


def _held_of(shot: ShotResult, names: Sequence[str]) -> tuple[tuple[str, float], ...]:
    return tuple((n, round(float(getattr(shot.point, n) or 0.0), 6)) for n in names)


def fit_trends(shots: Iterable[ShotResult], metrics: Sequence[str] = CURVE_METRICS,
               *, min_points: int = 2) -> list[Trend]:
    """Fit every metric against IF, di/dt and T wherever ``min_points`` distinct x values
    exist with the other conditions held (module docstring)."""
    valid = [s for s in shots if s.valid]
    trends: list[Trend] = []
    for axis, (model, held_names) in _AXES.items():
        groups: dict[tuple, dict[Any, list[ShotResult]]] = {}
        for s in valid:
            # di/dt is a measured axis: the requested gate setting labels the group member
            key_x = (s.point.gate_resistance_ohm, s.point.didt_A_per_s) \
                if axis == "didt_A_per_s" else round(float(_x_of(s, axis)), 6)
            groups.setdefault(_held_of(s, held_names), {}).setdefault(key_x, []).append(s)
        for held, members in groups.items():
            if len(members) < min_points:
                continue
            for metric in metrics:
                xs, ys = [], []
                for group in members.values():
                    pairs = [(_x_of(s, axis), s.metrics.get(metric)) for s in group]
                    pairs = [(float(x), float(y)) for x, y in pairs
                             if x is not None and y is not None and math.isfinite(float(y))]
                    if not pairs:
                        continue
                    xs.append(float(np.mean([p[0] for p in pairs])))
                    ys.append(float(np.mean([p[1] for p in pairs])))
                if len(xs) < min_points or len(set(xs)) < 2:
                    continue
                x, y = np.asarray(xs), np.asarray(ys)
                if model == "power":
                    if np.any(x <= 0) or np.any(y <= 0):
                        continue
                    x_ref = float(np.exp(np.mean(np.log(x))))
                    a, b, ua, ub = _line(np.log(x / x_ref), np.log(y))
                    ref, u_ref = math.exp(a), None if ua is None else math.exp(a) * ua
                else:
                    x_ref = float(np.mean(x))
                    a, b, ua, ub = _line(x - x_ref, y)
                    ref, u_ref = a, ua
                order = np.argsort(x)
                trends.append(Trend(metric, axis, model, held, tuple(x[order].tolist()),
                                    tuple(y[order].tolist()), x_ref, ref, b, ub, u_ref))
    return trends
