"""Per-shot verification of the measured test conditions against the requested ones.

A shot whose measured conditions (IF, di/dt, VR, T) lie outside the sequence's tolerances
is *invalid*: it is stored, never graded, and fired once more (DESIGN §5). Pure functions.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from benchrun.config.sequence import Tolerances
from benchrun.records import TestPoint

#: Prefix of every flag raised here (the analysis raises its own flags).
FLAG_PREFIX = "condition:"


@dataclass(frozen=True)
class ConditionCheck:
    """Outcome of the condition check of one shot."""

    flags: tuple[str, ...]

    @property
    def valid(self) -> bool:
        return not self.flags


def _relative(name: str, measured: float | None, target: float, tolerance: float,
              unit: str) -> str | None:
    if measured is None or not math.isfinite(measured):
        return f"{FLAG_PREFIX}{name} not measured"
    deviation = measured / target - 1.0
    if abs(deviation) > tolerance:
        return (f"{FLAG_PREFIX}{name} {measured:.4g} {unit} is {deviation * 100:+.1f} % from "
                f"{target:.4g} {unit} (tolerance {tolerance * 100:g} %)")
    return None


def check_conditions(point: TestPoint, conditions: dict[str, float | None],
                     tolerances: Tolerances) -> ConditionCheck:
    """Compare measured conditions with the point's targets.

    Parameters
    ----------
    point
        The requested test point.
    conditions
        Measured ``if_A``, ``didt_A_per_s``, ``vr_V`` (steady reverse voltage after the
        event) and ``temperature_K``; ``None`` when not measured.
    tolerances
        Relative tolerances for IF, di/dt and VR; a temperature band in kelvin.

    Returns
    -------
    ConditionCheck
        One flag per condition out of tolerance or not measured. di/dt is checked only
        when the point gives a di/dt target (a gate-resistance point has none).
    """
    flags = []
    for flag in (
        _relative("if_A", conditions.get("if_A"), point.forward_current_A,
                  tolerances.forward_current, "A"),
        _relative("vr_V", conditions.get("vr_V"), point.bus_voltage_V,
                  tolerances.reverse_voltage, "V"),
    ):
        if flag:
            flags.append(flag)
    if point.didt_A_per_s is not None:
        flag = _relative("didt_A_per_s", conditions.get("didt_A_per_s"), point.didt_A_per_s,
                         tolerances.didt, "A/s")
        if flag:
            flags.append(flag)
    temperature = conditions.get("temperature_K")
    if temperature is None or not math.isfinite(temperature):
        flags.append(f"{FLAG_PREFIX}temperature_K not measured")
    elif abs(temperature - point.temperature_K) > tolerances.temperature:
        flags.append(f"{FLAG_PREFIX}temperature_K {temperature - 273.15:.2f} degC is "
                     f"{temperature - point.temperature_K:+.2f} K from "
                     f"{point.temperature_K - 273.15:g} degC (band {tolerances.temperature:g} K)")
    return ConditionCheck(tuple(flags))


@dataclass
class StabilityTracker:
    """Decides when a temperature is stable: within ``band`` of the target for ``dwell``.

    Feed it ``(time, measured)`` readings in time order; :meth:`update` returns True once
    every reading over the last ``dwell`` seconds (and at least two readings) lay within
    the band. A reading outside the band restarts the dwell.
    """

    target: float
    band: float
    dwell: float
    _since: float | None = None
    _count: int = 0

    def update(self, now: float, measured: float) -> bool:
        if abs(measured - self.target) > self.band:
            self._since = None
            self._count = 0
            return False
        if self._since is None:
            self._since = now
        self._count += 1
        return self._count >= 2 and now - self._since >= self.dwell
