"""Planning: test points in firing order, double-pulse timing and scope ranges.

Pure functions; nothing here talks to an instrument.

Pulse timing (DESIGN §4): the load inductor L with winding resistance R charged from the bus
V through the switch (on-voltage Vsw) carries

    i(t) = (V − Vsw)/R · (1 − exp(−t·R/L))        so    t1 = −(L/R)·ln(1 − I·R/(V − Vsw))

and t1 = L·I/(V − Vsw) when R = 0 (first-order RL step response, any circuit-theory text).
During the off time the current freewheels through the diode and droops by about
(VF + I·R)·t_off/L, so the first pulse aims slightly above the target.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from benchrun.analysis.snappiness import WORST_CASE_SNAPPINESS
from benchrun.config.bench import BenchConfig, FixtureSpec
from benchrun.config.limits import LimitsSpec
from benchrun.config.sequence import SequenceConfig, TestPointSpec
from benchrun.errors import SafetyError
from benchrun.records import TestPoint

#: Forward voltage assumed for the droop estimate (a fast silicon diode near rated current;
#: common practice, corrected by the trim shots).
ASSUMED_FORWARD_VOLTAGE = 1.5


def first_pulse_width(
    current_A: float,
    bus_voltage_V: float,
    inductance_H: float,
    resistance_ohm: float = 0.0,
    switch_voltage_V: float = 0.0,
) -> float:
    """First-pulse width that charges the load inductor to ``current_A``.

    Parameters
    ----------
    current_A, bus_voltage_V
        Target current and bus voltage.
    inductance_H, resistance_ohm
        Load inductance and its winding resistance.
    switch_voltage_V
        On-state voltage of the low-side switch.

    Returns
    -------
    float
        t1 in seconds: −(L/R)·ln(1 − I·R/(V − Vsw)), or L·I/(V − Vsw) for R = 0.

    Raises
    ------
    SafetyError
        The current cannot be reached: I·R ≥ V − Vsw (the RL circuit's final value).
    """
    drive = bus_voltage_V - switch_voltage_V
    if current_A <= 0 or inductance_H <= 0:
        raise ValueError("current and inductance must be positive")
    if drive <= 0:
        raise SafetyError(f"bus voltage {bus_voltage_V:g} V cannot drive the load")
    if resistance_ohm <= 0:
        return inductance_H * current_A / drive
    ratio = current_A * resistance_ohm / drive
    if ratio >= 1.0:
        raise SafetyError(
            f"{current_A:g} A cannot be reached from {bus_voltage_V:g} V through "
            f"{resistance_ohm:g} ohm (final value {drive / resistance_ohm:g} A)"
        )
    return -(inductance_H / resistance_ohm) * math.log1p(-ratio)


def inductor_current(
    t1_s: float,
    bus_voltage_V: float,
    inductance_H: float,
    resistance_ohm: float = 0.0,
    switch_voltage_V: float = 0.0,
) -> float:
    """Inverse of :func:`first_pulse_width`: the current after a pulse of width ``t1_s``."""
    drive = bus_voltage_V - switch_voltage_V
    if resistance_ohm <= 0:
        return drive * t1_s / inductance_H
    return drive / resistance_ohm * -math.expm1(-t1_s * resistance_ohm / inductance_H)


def effective_inductance(
    t1_s: float,
    measured_A: float,
    bus_voltage_V: float,
    resistance_ohm: float = 0.0,
    switch_voltage_V: float = 0.0,
) -> float:
    """Inductance that explains ``measured_A`` after a pulse ``t1_s`` (trim correction).

    Solves i(t1) = (V − Vsw)/R·(1 − exp(−t1·R/L)) for L; the trim uses it to recompute t1.
    """
    drive = bus_voltage_V - switch_voltage_V
    if measured_A <= 0 or t1_s <= 0 or drive <= 0:
        raise ValueError("trim needs a positive pulse, current and drive voltage")
    if resistance_ohm <= 0:
        return drive * t1_s / measured_A
    ratio = measured_A * resistance_ohm / drive
    if ratio >= 1.0:
        # measured beyond the RL final value: fall back to the lossless estimate
        return drive * t1_s / measured_A
    return -t1_s * resistance_ohm / math.log1p(-ratio)


def droop(current_A: float, off_time_s: float, fixture: FixtureSpec,
          forward_voltage_V: float = ASSUMED_FORWARD_VOLTAGE) -> float:
    """Current lost while freewheeling for ``off_time_s``: (VF + I·R)·t_off/L (DESIGN §4)."""
    return (forward_voltage_V + current_A * fixture.load_resistance) * off_time_s / (
        fixture.load_inductance
    )


@dataclass(frozen=True)
class PulsePlan:
    """Double-pulse timing and the capture window, all in seconds from the first rising edge.

    Attributes
    ----------
    first_pulse_s, off_time_s, second_pulse_s
        The three intervals of the double pulse.
    record_start_s
        Capture start relative to the first rising edge (negative: pre-trigger).
    record_length_s, sample_interval_s
        Capture window length and sample interval; the window covers the whole double pulse.
    """

    first_pulse_s: float
    off_time_s: float
    second_pulse_s: float
    record_start_s: float
    record_length_s: float
    sample_interval_s: float

    @property
    def total_s(self) -> float:
        return self.first_pulse_s + self.off_time_s + self.second_pulse_s

    @property
    def points(self) -> int:
        return math.ceil(self.record_length_s / self.sample_interval_s - 1e-9)

    @property
    def commutation_s(self) -> float:
        """Second rising edge: the turn-on that commutates the diode."""
        return self.first_pulse_s + self.off_time_s

    def with_first_pulse(self, first_pulse_s: float) -> PulsePlan:
        """Same plan with a new t1; the record window grows or shrinks with it."""
        grow = first_pulse_s - self.first_pulse_s
        return PulsePlan(first_pulse_s, self.off_time_s, self.second_pulse_s,
                         self.record_start_s, self.record_length_s + grow,
                         self.sample_interval_s)


def plan_pulses(point: TestPoint, sequence: SequenceConfig, fixture: FixtureSpec,
                inductance_H: float | None = None) -> PulsePlan:
    """Pulse timing for a test point, aiming at the forward current at commutation.

    The first pulse charges the inductor to IF plus the droop expected in the off time, so
    the current the diode carries at the second turn-on is IF.
    """
    timing = sequence.timing
    L = inductance_H if inductance_H is not None else fixture.load_inductance
    target = point.forward_current_A + droop(point.forward_current_A, timing.off_time, fixture)
    t1 = first_pulse_width(target, point.bus_voltage_V, L, fixture.load_resistance,
                           fixture.switch_on_voltage)
    total = t1 + timing.off_time + timing.second_pulse
    return PulsePlan(
        first_pulse_s=t1,
        off_time_s=timing.off_time,
        second_pulse_s=timing.second_pulse,
        record_start_s=-timing.pre_trigger,
        record_length_s=timing.pre_trigger + total + timing.post_margin,
        sample_interval_s=timing.sample_interval,
    )


def corrected_first_pulse(plan: PulsePlan, point: TestPoint, measured_A: float,
                          bus_voltage_V: float, fixture: FixtureSpec) -> tuple[float, float]:
    """New t1 after a shot that reached ``measured_A`` at ``bus_voltage_V``.

    Returns ``(t1, effective_inductance)``; the effective inductance also absorbs any error
    in the assumed droop, which is why the measured current is taken at the commutation.
    """
    droop_A = droop(point.forward_current_A, plan.off_time_s, fixture)
    reached = measured_A + droop_A  # current at the end of the first pulse
    L_eff = effective_inductance(plan.first_pulse_s, reached, bus_voltage_V,
                                 fixture.load_resistance, fixture.switch_on_voltage)
    t1 = first_pulse_width(point.forward_current_A + droop_A, point.bus_voltage_V, L_eff,
                           fixture.load_resistance, fixture.switch_on_voltage)
    return t1, L_eff


@dataclass(frozen=True)
class SignalRange:
    """Full-scale window of one scope signal in physical units (V or A)."""

    signal: str
    low: float
    high: float

    @property
    def span(self) -> float:
        return self.high - self.low

    @property
    def center(self) -> float:
        return 0.5 * (self.high + self.low)


def expected_didt(point: TestPoint, sequence: SequenceConfig) -> float | None:
    """di/dt used for the overshoot allowance: the point's target, else the sequence's
    expectation, else unknown."""
    return point.didt_A_per_s or sequence.expected.didt


#: Headroom of the diode-current window's negative side over the reverse-recovery current it
#: is planned for (common practice: a device 25 % over its Irrm limit still fits on screen).
RANGE_HEADROOM = 1.25
#: Widening of a clipped channel's window for the retake of that shot.
RETAKE_WIDEN = 2.0


def planned_irrm(point: TestPoint, sequence: SequenceConfig,
                 limits: LimitsSpec | None = None) -> tuple[float, str]:
    """The reverse-recovery current the diode-current window is planned for, and its source.

    The part's Irrm upper limit at the limits-file condition this point belongs to (the
    grading's own matching, :func:`benchrun.grading.grade.point_matches`), else the sequence's
    expectation ``irrm_fraction``·IF. Never anything measured during the run: the window of a
    test point is the same for every device, whatever was tested before it.
    """
    if limits is not None:
        from benchrun.grading.grade import point_matches

        ceilings = [
            item.max
            for condition in limits.conditions
            if point_matches(point, condition, limits.tolerances)
            for item in limits.limits_at(condition.name)
            if item.metric == "irrm_A" and item.max is not None
        ]
        if ceilings:
            return max(ceilings), "the part's Irrm limit"
    return sequence.expected.irrm_fraction * point.forward_current_A, "irrm_fraction × IF"


def turn_off_delay(point: TestPoint, bench: BenchConfig) -> float:
    """How long the switch may go on conducting after the second pulse ends, for a point
    whose gate resistor the runner chooses (a di/dt target): the gate discharging from the
    drive voltage to the threshold through the largest declared resistor,
    Rg·Ciss·ln(Vdrive/Vth) (RC discharge, any circuit-theory text). 0 for other points
    (their resistance was part of the plan before)."""
    gate = bench.fixture.gate_drive
    if gate is None or point.didt_A_per_s is None:
        return 0.0
    drive = gate.drive_voltage_range[1] if gate.drive_voltage_range else gate.drive_voltage
    ratio = max(float(drive or 0.0) / gate.threshold_voltage, 1.0)
    return max(gate.resistors) * gate.input_capacitance * math.log(ratio)


def plan_ranges(point: TestPoint, sequence: SequenceConfig, bench: BenchConfig,
                limits: LimitsSpec | None = None) -> dict[str, SignalRange]:
    """Scope full-scale windows of a test point, from the part's limits and the point alone.

    Headroom rule (stated on the report through the recorded ranges):

    - diode current: from −``RANGE_HEADROOM``·Irrm(planned) (:func:`planned_irrm`: the part's
      Irrm limit at the point's condition, else ``irrm_fraction``·IF) to 1.3·IF, or to 1.1×
      the current the diode takes over after the second pulse (IF + VR·t2/L), whichever is
      higher, so the end of the record does not clip;
    - diode voltage: from −1.1·(VR + overshoot) to +max(5 % of VR, 20 V); the overshoot is
      Ls·di/dt times a margin, or 25 % of VR when no di/dt is known (common practice); at a
      point marked ``qualification: worst_case_snappiness`` the window reaches at least
      1.1·VRRM (the sequence's rating), since that step judges a snap-off overshoot and a
      reverse voltage clamped near the rating, which a narrower window would clip;
    - switch voltage: from −5 % of VR to 1.1·(VR + overshoot); gate: ±20 V.

    The same point gets the same windows for every device and in any test order; a shot that
    clips is retaken with the clipped window widened by ``RETAKE_WIDEN`` (that shot only).
    """
    IF = point.forward_current_A
    VR = point.bus_voltage_V
    irrm, _ = planned_irrm(point, sequence, limits)
    conducts = sequence.timing.second_pulse + turn_off_delay(point, bench)
    after = IF + VR * conducts / bench.fixture.load_inductance
    slope = expected_didt(point, sequence)
    if slope is not None:
        overshoot = bench.fixture.stray_inductance * slope * sequence.expected.overshoot_margin
    else:
        overshoot = 0.25 * VR
    peak_V = VR + overshoot
    if point.qualification == WORST_CASE_SNAPPINESS and sequence.ratings is not None:
        peak_V = max(peak_V, sequence.ratings.vrrm)
    ranges = {
        "diode_current": SignalRange("diode_current", -RANGE_HEADROOM * irrm,
                                     max(1.3 * IF, 1.1 * after)),
        "diode_voltage": SignalRange("diode_voltage", -1.1 * peak_V,
                                     max(0.05 * VR, 20.0)),
        "switch_voltage": SignalRange("switch_voltage", -0.05 * VR, 1.1 * peak_V),
        "gate": SignalRange("gate", -20.0, 20.0),
    }
    return {name: ranges[name] for name in bench.probes if name in ranges}


@dataclass(frozen=True)
class PlannedShot:
    """One shot of the plan: which device, which point, which repeat."""

    point: TestPoint
    serial: str
    repeat: int

    @property
    def identity(self) -> tuple[int, str, int]:
        return (self.point.index, self.serial, self.repeat)


@dataclass(frozen=True)
class TemperatureStep:
    """All shots at one temperature: the thermal controller settles once for them."""

    temperature_K: float
    shots: tuple[PlannedShot, ...] = field(default_factory=tuple)


def expand_with_specs(sequence: SequenceConfig) -> list[tuple[TestPoint, TestPointSpec]]:
    """Every (test point × temperature) as a numbered :class:`TestPoint`, with its entry.

    Temperatures are visited in the order they first appear; point indices follow that
    order, so a resumed run numbers its points the same way.
    """
    order: list[float] = []
    specs = sequence.all_points()
    for spec in specs:
        for temperature in spec.temperatures:
            if temperature not in order:
                order.append(temperature)
    pairs: list[tuple[TestPoint, TestPointSpec]] = []
    for temperature in order:
        for number, spec in enumerate(specs):
            if temperature not in spec.temperatures:
                continue
            label = spec.label or f"point {number + 1}"
            point = TestPoint(
                index=len(pairs),
                temperature_K=temperature,
                bus_voltage_V=spec.bus_voltage,
                forward_current_A=spec.forward_current,
                didt_A_per_s=spec.didt,
                gate_resistance_ohm=spec.gate_resistance,
                label=f"{label} @ {temperature - 273.15:g} degC",
                qualification=spec.qualification or "",
            )
            pairs.append((point, spec))
    return pairs


def expand_points(sequence: SequenceConfig) -> list[TestPoint]:
    """Every (test point × temperature) as a numbered :class:`TestPoint`."""
    return [point for point, _ in expand_with_specs(sequence)]


def plan_run(sequence: SequenceConfig, serials: list[str]) -> list[TemperatureStep]:
    """The whole run in firing order: temperature → device → test point → repeat.

    Devices change inside a temperature so the slow thermal settling happens once per
    temperature; each device sees every test point before the handler moves on.
    """
    pairs = expand_with_specs(sequence)
    steps: list[TemperatureStep] = []
    for temperature in dict.fromkeys(p.temperature_K for p, _ in pairs):
        here = [(p, s) for p, s in pairs if p.temperature_K == temperature]
        shots = []
        for serial in serials:
            for point, spec in here:
                for repeat in range(spec.repeats):
                    shots.append(PlannedShot(point, serial, repeat))
        steps.append(TemperatureStep(temperature, tuple(shots)))
    return steps
