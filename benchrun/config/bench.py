"""Bench file schema: instruments, probes, fixture, safety limits and calibration dates.

A bench file describes the hardware a sequence runs on. It is loaded with
:func:`load_bench`, which reports every mistake as ``file:line: field: message``
(:mod:`benchrun.config.loader`). Example (``sequences/bench-sim.yaml``)::

    name: Simulated double-pulse bench
    visa_library: "@py"
    instruments:
      scope:   {resource: sim, family: scope-generic, calibration_due: 2027-06-30,
              accuracy: {vertical: 1.5 %, certificate: CAL-0412, calibrated: 2026-06-30}}
      pulse:   {resource: sim, family: pulse-generic}
      supply:  {resource: sim, family: supply-generic}
      thermal: {resource: sim, family: thermal-generic}
      handler: {resource: sim, family: handler-generic}
    probes:
      diode_voltage: {channel: 1, kind: voltage, attenuation: 100,
                      accuracy: {scale: 2 %, certificate: CAL-0413, calibrated: 2026-06-30}}
      diode_current: {channel: 2, kind: shunt, resistance: 10 mohm, deskew: 1.5 ns,
                      accuracy: {scale: 1 %, skew: 0.5 ns, certificate: CAL-0414,
                                 calibrated: 2026-06-30}, bandwidth: 400 MHz}
    fixture: {load_inductance: 200 uH, ...}
    safety:  {max_bus_voltage: 1000 V, ...}

``accuracy`` blocks are the inputs of the grading's uncertainty budgets
(:mod:`benchrun.grading.uncertainty`), each with the calibration certificate it is taken from
and the date of that calibration: the scope's vertical (gain) accuracy as a fraction of full
scale, each probe's scale tolerance (attenuation, shunt resistance or sensitivity) and its
residual skew after deskew. Values carry their units (``1.5 %``, ``0.5 ns``); a bare number
is refused. They are bounds (half-widths) of rectangular distributions.

``bench: {id: B}`` names the bench (letters, digits, ``.``, ``_``, ``-``; default: the host
name). The id is part of every run id and is recorded with every run and shot, so several
benches can share one results database (:func:`default_bench_id`).

``bandwidth`` (optional) of each probe and of the scope (``instruments.scope.bandwidth``, or a
probe entry's ``channel_bandwidth`` for its input) give each channel's system rise time
(:func:`system_rise_time`), recorded with every shot and behind the ``rise_time_limited`` flag.

For the report's traceability (all optional): each probe's ``serial``; the fixture's
``switch: {part: ..., serial: ...}`` (the switch that drives the diode); and ``site:
{ambient_temperature: 23 degC, relative_humidity: 45 %}``, the lab's ambient as the lab states
it, recorded in ``run.json`` as ``ambient`` (:meth:`SiteConditions.record`).

The resource ``sim`` is a placeholder: ``benchrun demo`` and ``benchrun run`` resolve it to
the matching instrument of an in-process simulated bench.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
import socket
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from pydantic import Field, field_serializer, field_validator, model_validator

from benchrun.config.explicit import ExplicitFraction, ExplicitTimeBound, explicit
from benchrun.config.gate_drive import GateDriveSpec
from benchrun.config.loader import (
    Capacitance,
    Current,
    Energy,
    Frequency,
    Inductance,
    Resistance,
    StrictModel,
    Time,
    Voltage,
    load_model,
    quantity,
)
from benchrun.units import parse_quantity

#: Roles a bench can fill; scope, pulse source and bus supply are required.
ROLES = ("scope", "pulse", "supply", "thermal", "handler")

#: Scope signal names the analysis understands (``benchrun.analysis.pipeline``).
SIGNALS = ("diode_voltage", "diode_current", "switch_voltage", "gate")

#: Resource placeholder resolved to the in-process simulated bench.
SIM_RESOURCE = "sim"

#: Touch-safe DC voltage: the ES1 limit of IEC 62368-1 and the SELV limit of IEC 61140.
TOUCH_SAFE_V = 60.0


class _Calibrated(StrictModel):
    """Where an accuracy figure comes from: the calibration certificate and its date."""

    certificate: str = Field(min_length=1)
    calibrated: _dt.date

    @field_serializer("calibrated")
    def _iso_date(self, value: _dt.date) -> str:
        # the runner writes the probes into run.json with model_dump(): dates as ISO text
        return value.isoformat()

    @property
    def source(self) -> str:
        """``"certificate CAL-0412, calibrated 2026-06-30"``."""
        return f"certificate {self.certificate}, calibrated {self.calibrated.isoformat()}"


class InstrumentAccuracy(_Calibrated):
    """Accuracy of an instrument as its calibration certificate states it. ``vertical``: the
    scope's DC gain accuracy as a fraction of full scale, each channel (``"1.5 %"``)."""

    vertical: ExplicitFraction | None = None


class ProbeAccuracy(_Calibrated):
    """Accuracy of a probe as its calibration certificate states it: ``scale`` tolerance of
    the attenuation, shunt resistance or sensitivity (``"1 %"``), and ``skew``, the residual
    delay uncertainty after deskew (``"0.5 ns"``)."""

    scale: ExplicitFraction
    skew: ExplicitTimeBound = 0.0


class InstrumentEntry(StrictModel):
    """One instrument: where it is, which command table drives it, when it is due, and the
    accuracy its calibration certificate states (the budgets use the scope's)."""

    resource: str = Field(min_length=1)
    family: str = Field(min_length=1, pattern=r"^[A-Za-z0-9_.-]+$")
    calibration_due: _dt.date | None = None
    timeout: Time = 5.0
    accuracy: InstrumentAccuracy | None = None
    #: Analog bandwidth (-3 dB) of the scope's inputs, for channels whose probe entry states
    #: no ``channel_bandwidth`` (optional; the system rise time, :func:`system_rise_time`).
    bandwidth: Frequency | None = Field(default=None, gt=0)

    @field_validator("timeout")
    @classmethod
    def _positive_timeout(cls, value: float) -> float:
        if value <= 0:
            raise ValueError("timeout must be positive")
        return value

    @property
    def simulated(self) -> bool:
        return self.resource.strip().lower() == SIM_RESOURCE


class Instruments(StrictModel):
    """Role → instrument. A bench without a thermal controller tests at room temperature only;
    without a handler it tests one device that is already in the fixture."""

    scope: InstrumentEntry
    pulse: InstrumentEntry
    supply: InstrumentEntry
    thermal: InstrumentEntry | None = None
    handler: InstrumentEntry | None = None

    def items(self) -> list[tuple[str, InstrumentEntry]]:
        return [(role, getattr(self, role)) for role in ROLES if getattr(self, role) is not None]


class SimulatedProbeErrors(StrictModel):
    """What the simulated bench's probe really does (the truth the analysis does not know).

    Only the simulated bench reads these: the signal it digitises is
    ``x_shown(t) = (1 + gain_error)·LP(x)(t − skew) + offset``, ``LP`` a single-pole low-pass
    of ``bandwidth`` (see :mod:`benchrun.simulator.acquisition`), so corrections made by the
    analysis (deskew, offset and scale) can be exercised end to end.  ``offset`` is in the
    measured quantity's unit (V for a voltage probe, A for a shunt or current sensor).
    """

    offset: float = 0.0
    gain_error: float = Field(default=0.0, gt=-0.5, lt=0.5)
    skew: Time = 0.0
    bandwidth: Frequency | None = Field(default=None, gt=0)


class ProbeEntry(StrictModel):
    """How one scope input sees a physical quantity.

    ``kind`` is ``voltage`` (``attenuation`` V/V, e.g. 100 for a 100:1 probe), ``shunt``
    (``resistance`` in ohm; the scope sees I·R) or ``current_sensor`` (``sensitivity`` in
    V/A, written e.g. ``"0.01 V/A"``). ``deskew`` is the probe's delay, removed in analysis.
    """

    channel: int = Field(ge=1, le=8)
    kind: Literal["voltage", "shunt", "current_sensor"]
    attenuation: float | None = Field(default=None, gt=0)
    resistance: Resistance | None = None
    sensitivity: Resistance | None = None
    deskew: Time = 0.0
    accuracy: ProbeAccuracy | None = None
    simulated: SimulatedProbeErrors | None = None
    #: The probe's (or shunt's, or sensor's) bandwidth (-3 dB), and that of the scope input it
    #: is wired to when it differs from the scope's ``bandwidth`` (a bandwidth limit set on
    #: the channel); both optional (:func:`system_rise_time`).
    bandwidth: Frequency | None = Field(default=None, gt=0)
    channel_bandwidth: Frequency | None = Field(default=None, gt=0)
    #: The probe's (or shunt's) serial number, printed in the report's traceability table.
    serial: str | None = Field(default=None, min_length=1)

    @model_validator(mode="before")
    @classmethod
    def _simulated_offset_unit(cls, data: object) -> object:
        """The simulated offset is in the probe's quantity: volts, or amperes for current."""
        if isinstance(data, dict) and isinstance(data.get("simulated"), dict):
            sim = dict(data["simulated"])
            if "offset" in sim:
                dimension = "voltage" if data.get("kind") == "voltage" else "current"
                sim["offset"] = parse_quantity(sim["offset"], dimension)
            data = {**data, "simulated": sim}
        return data

    @model_validator(mode="after")
    def _one_scaling(self) -> ProbeEntry:
        needed = {"voltage": "attenuation", "shunt": "resistance",
                  "current_sensor": "sensitivity"}[self.kind]
        for name in ("attenuation", "resistance", "sensitivity"):
            value = getattr(self, name)
            if name == needed:
                if value is None:
                    raise ValueError(f"a {self.kind} probe needs '{needed}'")
                if value <= 0:
                    raise ValueError(f"'{needed}' must be positive")
            elif value is not None:
                raise ValueError(f"'{name}' does not apply to a {self.kind} probe")
        if abs(self.deskew) > 1e-6:
            raise ValueError("deskew beyond 1 us is not a probe delay; check the unit")
        if self.simulated is not None and abs(self.simulated.skew) > 1e-6:
            raise ValueError("simulated.skew beyond 1 us is not a probe delay; check the unit")
        return self

    @property
    def scale(self) -> float:
        """Physical value per channel volt (V/V or A/V)."""
        if self.kind == "voltage":
            return float(self.attenuation)  # type: ignore[arg-type]
        if self.kind == "shunt":
            return 1.0 / float(self.resistance)  # type: ignore[arg-type]
        return 1.0 / float(self.sensitivity)  # type: ignore[arg-type]

    @property
    def measures_current(self) -> bool:
        return self.kind != "voltage"


ThermalResistance = quantity("thermal_resistance")


class SwitchUnderTest(StrictModel):
    """The switch that drives the diode in the fixture: its part number and serial number
    (both optional; printed in the report's test set-up table)."""

    part: str | None = Field(default=None, min_length=1)
    serial: str | None = Field(default=None, min_length=1)

    def describe(self) -> str:
        """``"SW-9100, serial SWS-0042"``; what is not stated reads "not stated"."""
        return (f"{self.part or 'part not stated'}, "
                f"serial {self.serial or 'not stated'}")


class FixtureSpec(StrictModel):
    """The double-pulse fixture: load inductor, loop, bus capacitor and its bleeder."""

    load_inductance: Inductance = Field(gt=0)
    load_resistance: Resistance = Field(ge=0)
    stray_inductance: Inductance = Field(ge=0)
    inductor_saturation_current: Current = Field(gt=0)
    max_pulse_width: Time = Field(gt=0)
    bus_capacitance: Capacitance = Field(gt=0)
    bleeder_resistance: Resistance = Field(gt=0)
    switch_on_voltage: Voltage = Field(default=0.0, ge=0)
    #: thermal time constant of the device in the fixture towards the controlled plate
    #: (first-order estimate; benchrun.runner.thermal)
    thermal_time_constant: Time | None = Field(default=None, gt=0)
    #: thermal resistance of the same path, K/W
    thermal_resistance: ThermalResistance | None = Field(default=None, gt=0)
    #: wait after the handler put a new device in the fixture (default 5 time constants)
    swap_dwell: Time | None = Field(default=None, ge=0)
    #: where the thermal controller's sensor sits: the temperature plate or the device case
    temperature_sensor: Literal["plate", "case"] = "plate"
    #: the switch under test (the device that drives the diode), for the report
    switch: SwitchUnderTest | None = None
    #: how di/dt is set (switchable gate resistors or a drive-voltage range) with the
    #: nominal values of the switch model; without it a test point cannot ask for a di/dt
    gate_drive: GateDriveSpec | None = None

    def discharge_time(self, from_V: float, to_V: float = TOUCH_SAFE_V) -> float:
        """Time for the bleeder to bring the bus from ``from_V`` to ``to_V`` (RC decay).

        t = R·C·ln(V0/V1), the exponential discharge of a capacitor through a resistor
        (any circuit-theory text); IEC 60204-1 asks for ≤ 60 V within 5 s.
        """
        if from_V <= to_V:
            return 0.0
        return self.bleeder_resistance * self.bus_capacitance * math.log(from_V / to_V)


class SafetyLimits(StrictModel):
    """Bench-wide limits checked before anything is energised (DESIGN §8)."""

    max_bus_voltage: Voltage = Field(gt=0)
    max_current: Current = Field(gt=0)
    max_inductor_energy: Energy = Field(gt=0)
    max_capacitor_energy: Energy = Field(gt=0)
    touch_safe_voltage: Voltage = Field(default=TOUCH_SAFE_V, gt=0, le=TOUCH_SAFE_V)
    discharge_timeout: Time = Field(default=30.0, gt=0)


_AmbientTemperature = explicit("temperature")
_Relative = explicit("dimensionless")


class SiteConditions(StrictModel):
    """``site:`` block: the ambient conditions of the lab as the lab states them (optional;
    recorded in ``run.json`` as ``ambient`` and printed in the report). Values carry their
    units: ``ambient_temperature: 23 degC``, ``relative_humidity: 45 %``."""

    ambient_temperature: _AmbientTemperature | None = Field(default=None, gt=0)
    relative_humidity: _Relative | None = Field(default=None, ge=0, le=1)

    def record(self) -> dict[str, object]:
        """The ``ambient`` entry of ``run.json``: °C, % and where the values came from."""
        out: dict[str, object] = {"source": "bench file (site), as stated by the lab"}
        if self.ambient_temperature is not None:
            out["temperature_degC"] = round(self.ambient_temperature - 273.15, 6)
        if self.relative_humidity is not None:
            out["relative_humidity_percent"] = round(self.relative_humidity * 100, 6)
        return out


class CalibrationPolicy(StrictModel):
    """Warn when an instrument's calibration falls due within ``warn_days``."""

    warn_days: int = Field(default=30, ge=0)


#: What a bench id may hold (it becomes part of run ids and folder names).
BENCH_ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,62}$"


def default_bench_id() -> str:
    """The bench id used when the bench file names none: the host name (first label),
    with every character a bench id cannot hold replaced by ``-``."""
    host = socket.gethostname().split(".")[0] or "bench"
    cleaned = re.sub(r"[^A-Za-z0-9_.-]", "-", host).strip("-._")[:63]
    return cleaned or "bench"


class BenchIdentity(StrictModel):
    """``bench:`` block: the identity of the bench in a shared results database."""

    id: str = Field(default_factory=default_bench_id, pattern=BENCH_ID_PATTERN)


class BenchConfig(StrictModel):
    """A whole bench file."""

    name: str = "bench"
    bench: BenchIdentity = Field(default_factory=BenchIdentity)
    visa_library: str = "@py"
    instruments: Instruments
    probes: dict[str, ProbeEntry]
    fixture: FixtureSpec
    safety: SafetyLimits
    calibration: CalibrationPolicy = CalibrationPolicy()
    #: ambient conditions of the lab as stated (optional)
    site: SiteConditions | None = None

    @field_validator("probes")
    @classmethod
    def _known_signals(cls, probes: dict[str, ProbeEntry]) -> dict[str, ProbeEntry]:
        for name in probes:
            if name not in SIGNALS:
                raise ValueError(f"unknown signal {name!r}; use one of {', '.join(SIGNALS)}")
        for required in ("diode_voltage", "diode_current"):
            if required not in probes:
                raise ValueError(f"a probe for {required!r} is required")
        if probes["diode_current"].kind == "voltage":
            raise ValueError("diode_current needs a shunt or current_sensor probe")
        channels = [p.channel for p in probes.values()]
        if len(channels) != len(set(channels)):
            raise ValueError("two signals share one scope channel")
        return probes

    @property
    def bench_id(self) -> str:
        """The bench's identity (``bench.id``; default the host name)."""
        return self.bench.id

    @property
    def simulated(self) -> bool:
        """True when every instrument is the in-process simulated bench."""
        return all(entry.simulated for _, entry in self.instruments.items())


#: 10-90 % rise time × bandwidth of a single-pole (first-order) response: ln(9)/(2π) ≈ 0.35.
RISE_TIME_BANDWIDTH = math.log(9.0) / (2.0 * math.pi)


def system_rise_time(bench: BenchConfig, signal: str) -> float | None:
    """10-90 % rise time of the measurement chain of ``signal`` (probe and scope input).

    Each element's rise time is ``0.35 / bandwidth`` (a first-order response: ln 9/(2π)); the
    chain's is their root sum of squares (cascaded stages without overshoot, Valley & Wallman,
    Vacuum Tube Amplifiers, 1948, from memory). The scope input's bandwidth is the probe
    entry's ``channel_bandwidth``, else the scope's ``bandwidth``. None when the bench file
    states neither the probe's nor the input's bandwidth.
    """
    probe = bench.probes.get(signal)
    if probe is None:
        return None
    channel = probe.channel_bandwidth or bench.instruments.scope.bandwidth
    elements = [bw for bw in (probe.bandwidth, channel) if bw]
    if not elements:
        return None
    return math.sqrt(math.fsum((RISE_TIME_BANDWIDTH / bw) ** 2 for bw in elements))


def load_bench(path: str | Path) -> BenchConfig:
    """Load and validate a bench file; errors name file, line and field."""
    return load_model(BenchConfig, path)


@dataclass(frozen=True)
class CalibrationState:
    """Calibration status of one instrument on a given day."""

    role: str
    due: _dt.date | None
    days_left: int | None
    status: Literal["ok", "due-soon", "overdue", "unknown"]

    def describe(self) -> str:
        if self.due is None:
            return f"{self.role}: no calibration due date in the bench file"
        if self.status == "overdue":
            return f"{self.role}: calibration overdue since {self.due.isoformat()}"
        if self.status == "due-soon":
            return f"{self.role}: calibration due {self.due.isoformat()} ({self.days_left} days)"
        return f"{self.role}: calibration due {self.due.isoformat()}"


def calibration_states(bench: BenchConfig, today: _dt.date) -> list[CalibrationState]:
    """Classify every instrument's calibration due date against ``today``.

    An instrument is *overdue* once its due date has passed (due < today), *due-soon*
    when it falls due within ``bench.calibration.warn_days`` days.
    """
    states = []
    for role, entry in bench.instruments.items():
        due = entry.calibration_due
        if due is None:
            states.append(CalibrationState(role, None, None, "unknown"))
            continue
        days = (due - today).days
        if days < 0:
            status = "overdue"
        elif days <= bench.calibration.warn_days:
            status = "due-soon"
        else:
            status = "ok"
        states.append(CalibrationState(role, due, days, status))  # type: ignore[arg-type]
    return states
