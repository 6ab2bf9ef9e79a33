"""Pre-flight safety checks and the safe state (DESIGN §8).

Before anything is energised, :func:`preflight` checks every planned test point against the
part's absolute maximum ratings, the fixture's limits and the bench's safety limits and
refuses the whole run (:class:`~benchrun.errors.SafetyError`) with every reason found.
:func:`check_shot` repeats the pulse checks for each shot actually fired (the trim changes
the first pulse). :func:`make_safe` brings the bench to the safe state: pulse output off,
supply output off, then waits until the *measured* bus voltage is below the touch-safe limit.

Touch-safe limit: 60 V DC (IEC 61140 / IEC 62368-1 ES1). Stored-energy limits ½·L·I² and
½·C·V² are the energy of an inductor and of a capacitor (any circuit-theory text).
"""

from __future__ import annotations

import datetime as _dt
import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol

from benchrun.config.bench import BenchConfig, CalibrationState, calibration_states
from benchrun.config.sequence import PartRatings, SequenceConfig
from benchrun.errors import CalibrationOverdue, SafetyError
from benchrun.records import TestPoint
from benchrun.runner.plan import PulsePlan, expected_didt, inductor_current, plan_pulses

log = logging.getLogger("benchrun.runner")


class Clock(Protocol):
    """Time source of the runner; the simulated bench may run on an accelerated clock."""

    def monotonic(self) -> float: ...

    def sleep(self, seconds: float) -> None: ...


class WallClock:
    """Real time."""

    def monotonic(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)


def peak_current(plan: PulsePlan, point: TestPoint, bench: BenchConfig) -> float:
    """Highest inductor current of the double pulse: IF plus the rise in the second pulse.

    The second pulse recharges the inductor from IF for ``second_pulse_s`` (RL step
    response, see :mod:`benchrun.runner.plan`).
    """
    fx = bench.fixture
    rise = inductor_current(plan.second_pulse_s, point.bus_voltage_V, fx.load_inductance,
                            0.0, fx.switch_on_voltage)
    return point.forward_current_A + rise


def pulse_problems(plan: PulsePlan, point: TestPoint, bench: BenchConfig) -> list[str]:
    """Reasons a double pulse of this plan is unsafe on this fixture (empty when safe)."""
    fx, limits = bench.fixture, bench.safety
    problems = []
    where = point.label or f"point {point.index}"
    longest = max(plan.first_pulse_s, plan.second_pulse_s)
    if longest > fx.max_pulse_width:
        problems.append(f"{where}: pulse width {longest * 1e6:.3g} us exceeds the fixture's "
                        f"maximum {fx.max_pulse_width * 1e6:.3g} us")
    if plan.first_pulse_s + plan.off_time_s + plan.second_pulse_s > 10 * fx.max_pulse_width:
        problems.append(f"{where}: double pulse longer than ten maximum pulse widths")
    ipk = peak_current(plan, point, bench)
    if ipk > fx.inductor_saturation_current:
        problems.append(f"{where}: peak current {ipk:.3g} A exceeds the inductor's saturation "
                        f"current {fx.inductor_saturation_current:.3g} A")
    if ipk > limits.max_current:
        problems.append(f"{where}: peak current {ipk:.3g} A exceeds the bench limit "
                        f"{limits.max_current:.3g} A")
    energy_L = 0.5 * fx.load_inductance * ipk**2
    if energy_L > limits.max_inductor_energy:
        problems.append(f"{where}: inductor energy 1/2*L*I^2 = {energy_L:.3g} J exceeds "
                        f"{limits.max_inductor_energy:.3g} J")
    return problems


def point_problems(point: TestPoint, sequence: SequenceConfig, bench: BenchConfig,
                   ratings: PartRatings | None) -> list[str]:
    """Reasons a test point is unsafe for the part, the fixture or the bench."""
    fx, limits = bench.fixture, bench.safety
    where = point.label or f"point {point.index}"
    volts, amps, temp = point.bus_voltage_V, point.forward_current_A, point.temperature_K
    problems = []
    if ratings is None:
        problems.append(f"no ratings for part {sequence.part}: give 'ratings' (VRRM, IF max, "
                        "Tj max) in the sequence file")
    else:
        if volts > ratings.vrrm:
            problems.append(f"{where}: bus voltage {volts:g} V exceeds the part's VRRM "
                            f"{ratings.vrrm:g} V")
        slope = expected_didt(point, sequence)
        if slope is not None and volts <= ratings.vrrm:
            peak = volts + fx.stray_inductance * slope
            if peak > ratings.vrrm:
                problems.append(f"{where}: expected peak reverse voltage {peak:.4g} V "
                                f"(VR + Ls*di/dt) exceeds VRRM {ratings.vrrm:g} V")
        if amps > ratings.max_test_current:
            which = "IF max" if ratings.ifrm is None else "IFRM"
            problems.append(f"{where}: forward current {amps:g} A exceeds the part's rating "
                            f"{ratings.max_test_current:g} A ({which})")
        if temp > ratings.tj_max:
            problems.append(f"{where}: temperature {temp - 273.15:g} degC exceeds Tj max "
                            f"{ratings.tj_max - 273.15:g} degC")
        if temp < ratings.tj_min:
            problems.append(f"{where}: temperature {temp - 273.15:g} degC is below Tj min "
                            f"{ratings.tj_min - 273.15:g} degC")
    if volts > limits.max_bus_voltage:
        problems.append(f"{where}: bus voltage {volts:g} V exceeds the bench limit "
                        f"{limits.max_bus_voltage:g} V")
    energy_C = 0.5 * fx.bus_capacitance * volts**2
    if energy_C > limits.max_capacitor_energy:
        problems.append(f"{where}: bus capacitor energy 1/2*C*V^2 = {energy_C:.3g} J exceeds "
                        f"{limits.max_capacitor_energy:.3g} J")
    discharge = fx.discharge_time(volts, limits.touch_safe_voltage)
    if discharge > limits.discharge_timeout:
        problems.append(
            f"{where}: the bleeder needs {discharge:.3g} s to bring {volts:g} V below "
            f"{limits.touch_safe_voltage:g} V (limit {limits.discharge_timeout:g} s)")
    if sequence.trim.mode == "low_voltage" and (sequence.trim.bus_voltage or 0) > volts:
        problems.append(
            f"{where}: low-voltage trim at {sequence.trim.bus_voltage:g} V is above the test "
            "voltage")
    if bench.instruments.thermal is None and abs(temp - 298.15) > sequence.tolerances.temperature:
        problems.append(f"{where}: {temp - 273.15:g} degC needs a thermal controller in the bench")
    try:
        plan = plan_pulses(point, sequence, fx)
    except SafetyError as exc:
        problems.append(f"{where}: {exc}")
    else:
        problems.extend(pulse_problems(plan, point, bench))
    return problems


def preflight(points: list[TestPoint], sequence: SequenceConfig, bench: BenchConfig,
              ratings: PartRatings | None) -> None:
    """Refuse the run, with every reason, if any point is unsafe. Nothing is energised here.

    Raises
    ------
    SafetyError
        One line per problem found.
    """
    problems: list[str] = []
    for point in points:
        for problem in point_problems(point, sequence, bench, ratings):
            if problem not in problems:
                problems.append(problem)
    if problems:
        raise SafetyError("refused before energising:\n  " + "\n  ".join(problems))


def check_shot(plan: PulsePlan, point: TestPoint, bench: BenchConfig) -> None:
    """Refuse one shot whose (trimmed) timing is unsafe."""
    problems = pulse_problems(plan, point, bench)
    if problems:
        raise SafetyError("shot refused: " + "; ".join(problems))


@dataclass(frozen=True)
class CalibrationCheck:
    """Outcome of the calibration-date check, recorded in the run manifest."""

    states: tuple[CalibrationState, ...]
    warnings: tuple[str, ...]
    overridden: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {
            "instruments": {
                s.role: {"due": s.due.isoformat() if s.due else None, "status": s.status,
                         "days_left": s.days_left}
                for s in self.states
            },
            "warnings": list(self.warnings),
            "overdue_override": list(self.overridden),
        }


def check_calibration(bench: BenchConfig, today: _dt.date, *,
                      allow_overdue: bool = False) -> CalibrationCheck:
    """Warn for instruments due soon; refuse overdue ones unless ``allow_overdue``.

    Raises
    ------
    CalibrationOverdue
        An instrument is past its calibration due date and no override was given.
    """
    states = tuple(calibration_states(bench, today))
    overdue = [s.describe() for s in states if s.status == "overdue"]
    # a handler measures nothing: no calibration date is expected for it
    warnings = [s.describe() for s in states
                if s.status == "due-soon" or (s.status == "unknown" and s.role != "handler")]
    if overdue and not allow_overdue:
        raise CalibrationOverdue(
            "; ".join(overdue) + " (use --allow-overdue-calibration to override; the override "
            "is recorded in the run manifest)")
    return CalibrationCheck(states, tuple(warnings), tuple(overdue))


@dataclass
class SafeStateReport:
    """What :func:`make_safe` achieved."""

    pulse_off: bool = False
    supply_off: bool = False
    reached: bool = False
    bus_voltage_V: float | None = None
    waited_s: float = 0.0
    problems: list[str] = field(default_factory=list)

    def describe(self) -> str:
        volts = "unknown" if self.bus_voltage_V is None else f"{self.bus_voltage_V:.1f} V"
        if self.reached:
            return (f"safe state: pulse output off, supply off, bus at {volts} "
                    f"(below the touch-safe limit) after {self.waited_s:.1f} s")
        return ("DANGER: SAFE STATE NOT CONFIRMED: bus voltage " + volts + "; "
                + "; ".join(self.problems)
                + ". Treat the fixture as live; discharge it before touching.")

    def to_dict(self) -> dict:
        return {"pulse_off": self.pulse_off, "supply_off": self.supply_off,
                "reached": self.reached, "bus_voltage_V": self.bus_voltage_V,
                "waited_s": self.waited_s, "problems": list(self.problems)}


def make_safe(
    pulse_off: Callable[[], None] | None,
    supply_off: Callable[[], None] | None,
    measure_bus: Callable[[], float] | None,
    *,
    touch_safe_V: float,
    timeout_s: float,
    clock: Clock,
    poll_s: float = 0.2,
    extra_off: tuple[Callable[[], None], ...] = (),
) -> SafeStateReport:
    """Pulse outputs off, supply off, then wait until the measured bus voltage is touch-safe.

    Every step is attempted even when an earlier one fails; failures are collected in the
    report, which says loudly when the bus was not confirmed below ``touch_safe_V``. Never
    raises (it runs while handling other errors); the caller decides what to do.
    """
    report = SafeStateReport()
    for name, action in (("pulse output off", pulse_off), ("supply output off", supply_off)):
        if action is None:
            report.problems.append(f"{name}: no instrument")
            continue
        try:
            action()
        except Exception as exc:  # safe state must try every step
            report.problems.append(f"{name} failed: {exc}")
            log.error("safe state: %s failed: %s", name, exc)
        else:
            if name.startswith("pulse"):
                report.pulse_off = True
            else:
                report.supply_off = True
    for action in extra_off:
        try:
            action()
        except Exception as exc:
            log.warning("safe state: %s", exc)
    if measure_bus is None:
        report.problems.append("bus voltage cannot be measured")
        return report
    start = clock.monotonic()
    failures = 0
    while True:
        try:
            volts = float(measure_bus())
        except Exception as exc:
            failures += 1
            if failures >= 3:
                report.problems.append(f"bus voltage read failed: {exc}")
                break
        else:
            report.bus_voltage_V = volts
            if abs(volts) < touch_safe_V:
                report.reached = True
                break
        report.waited_s = clock.monotonic() - start
        if report.waited_s >= timeout_s:
            report.problems.append(
                f"bus did not fall below {touch_safe_V:g} V within {timeout_s:g} s")
            break
        clock.sleep(poll_s)
    report.waited_s = clock.monotonic() - start
    if report.reached:
        log.info(report.describe())
    else:
        log.critical(report.describe())
    return report
