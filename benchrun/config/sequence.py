"""Sequence file schema: what to test (part, lot, devices, test points) and how.

Loaded with :func:`load_sequence`; errors name file, line and field, unknown keys are errors.
Quantities are written as engineers write them. Example (``sequences/dx4417-demo.yaml``)::

    part: DX-4417
    lot: LT-0117
    devices: all            # every device the handler holds, or a list of serials
    limits: ../limits/DX-4417.yaml
    test_points:
      - bus_voltage: 600 V
        forward_current: 30 A
        temperatures: [25 degC, 125 degC]
        gate_resistance: 10 ohm
        repeats: 2
        shot_spacing: 0.2 s
    tolerances: {forward_current: 5 %, didt: 25 %, reverse_voltage: 5 %, temperature: 3 K}

The ``tolerances`` are written with their units: relative ones ``"5 %"`` (a bare ``0.05`` is
refused), temperature tolerances and bands as temperature *differences* (``"3 K"``;
``"3 degC"`` is read as a difference here).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, field_validator, model_validator

from benchrun.config.explicit import ExplicitTemperatureBand, ExplicitTolerance
from benchrun.config.loader import (
    Current,
    CurrentSlope,
    Frequency,
    Resistance,
    StrictModel,
    Temperature,
    TemperatureBand,
    Time,
    Tolerance,
    Voltage,
    load_model,
)

#: A relative tolerance: "5 %" or 0.05.
Fraction = Tolerance

#: Lot names: they name run folders (``<out>/<lot>-<time>``), so letters, digits, ``.``,
#: ``_`` and ``-`` only, starting with a letter or digit (no ``/``, no ``..``, no spaces).
LOT_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")
#: Serials: letters, digits and ``. _ - + / # :``, starting with a letter or digit, at most 64
#: characters. They are sent to the handler as quoted SCPI strings and escaped one-to-one in
#: raw-record keys (:func:`benchrun.runner.shots.key_safe_serial`); never used in paths.
SERIAL_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._+/#:-]{0,63}")


def check_lot(value: str) -> str:
    """``value`` when it is a valid lot name (:data:`LOT_PATTERN`), else ``ValueError``."""
    if not LOT_PATTERN.fullmatch(value):
        raise ValueError(f"lot name {value!r} is not allowed: use letters, digits, '.', '_' "
                         "and '-' (starting with a letter or digit, at most 64); it names "
                         "the run folder")
    return value


def check_serial(value: str) -> str:
    """``value`` when it is a valid serial (:data:`SERIAL_PATTERN`), else ``ValueError``."""
    if not SERIAL_PATTERN.fullmatch(value):
        raise ValueError(f"serial {value!r} is not allowed: use letters, digits and "
                         "'. _ - + / # :' (starting with a letter or digit, at most 64)")
    return value


class PartRatings(StrictModel):
    """Absolute maximum ratings of the part (from its datasheet)."""

    vrrm: Voltage = Field(gt=0)
    if_max: Current = Field(gt=0)
    tj_max: Temperature = Field(gt=0)
    tj_min: Temperature = Field(default=218.15, gt=0)
    #: repetitive peak forward current (optional): the double pulse conducts for
    #: microseconds, so a test point may go up to it; without it ``if_max`` bounds IF
    ifrm: Current | None = Field(default=None, gt=0)

    @property
    def max_test_current(self) -> float:
        """Highest forward current a test point may ask for: IFRM when stated, else IF max."""
        return self.if_max if self.ifrm is None else max(self.ifrm, self.if_max)


class TestPointSpec(StrictModel):
    """One test condition, swept over its temperatures."""

    __test__ = False  # not a pytest test class

    label: str = ""
    bus_voltage: Voltage = Field(gt=0)
    forward_current: Current = Field(gt=0)
    temperatures: list[Temperature] = Field(min_length=1)
    gate_resistance: Resistance | None = Field(default=None, gt=0)
    didt: CurrentSlope | None = Field(default=None, gt=0)
    repeats: int = Field(default=1, ge=1, le=1000)
    shot_spacing: Time = Field(default=0.5, ge=0)
    #: the qualification step this point serves: ``worst_case_snappiness`` grades its worst
    #: shot by the limits file's ``worst_case`` block (benchrun.analysis.snappiness)
    qualification: Literal["worst_case_snappiness"] | None = None

    @model_validator(mode="after")
    def _drive(self) -> TestPointSpec:
        if self.gate_resistance is None and self.didt is None:
            raise ValueError("give 'gate_resistance' or a 'didt' target")
        return self


def _as_list(value: Any) -> Any:
    """A single value of a sweep axis is a one-element list."""
    return value if isinstance(value, list) else [value]


#: Largest number of test points the sweeps of one sequence may expand into (before the
#: temperatures): a mistyped sweep must not plan a run of days.
MAX_SWEEP_POINTS = 400


class SweepSpec(StrictModel):
    """A grid of test points: every combination of the listed values (a characterisation
    sweep). Each axis takes one value or a list; each combination is one test point at every
    temperature of ``temperatures``::

        sweeps:
          - label: IF sweep
            bus_voltage: 600 V
            forward_current: [3 A, 7.5 A, 15 A, 30 A, 45 A]
            didt: 600 A/us
            temperatures: [-40 degC, 25 degC, 125 degC]
    """

    label: str = "sweep"
    bus_voltage: Annotated[list[Voltage], BeforeValidator(_as_list)] = Field(min_length=1)
    forward_current: Annotated[list[Current], BeforeValidator(_as_list)] = Field(min_length=1)
    didt: Annotated[list[CurrentSlope], BeforeValidator(_as_list)] | None = None
    gate_resistance: Annotated[list[Resistance], BeforeValidator(_as_list)] | None = None
    temperatures: list[Temperature] = Field(min_length=1)
    repeats: int = Field(default=1, ge=1, le=1000)
    shot_spacing: Time = Field(default=0.5, ge=0)

    @model_validator(mode="after")
    def _axes(self) -> SweepSpec:
        if (self.didt is None) == (self.gate_resistance is None):
            raise ValueError("give 'didt' targets or 'gate_resistance' values (one of them)")
        for name in ("bus_voltage", "forward_current", "didt", "gate_resistance"):
            values = getattr(self, name) or []
            if any(v <= 0 for v in values):
                raise ValueError(f"every {name} value must be positive")
            if len(set(values)) != len(values):
                raise ValueError(f"a {name} value is listed twice")
        if len(self.combinations()) > MAX_SWEEP_POINTS:
            raise ValueError(f"the sweep expands into {len(self.combinations())} test points "
                             f"(at most {MAX_SWEEP_POINTS}); sweep fewer values")
        return self

    def combinations(self) -> list[tuple[float, float, float | None, float | None]]:
        """(bus voltage, forward current, di/dt, gate resistance) of every grid point, in
        file order (voltage slowest, then current, then the drive)."""
        drives: list[tuple[float | None, float | None]] = (
            [(d, None) for d in self.didt] if self.didt is not None
            else [(None, r) for r in self.gate_resistance or []])
        return [(v, i, d, r) for v in self.bus_voltage for i in self.forward_current
                for d, r in drives]

    def expand(self) -> list[TestPointSpec]:
        """One :class:`TestPointSpec` per grid point, labelled with its values."""
        from benchrun.units import format_si

        points = []
        for volts, amps, didt, ohms in self.combinations():
            drive = (f"{didt / 1e6:g} A/us" if didt is not None
                     else format_si(float(ohms or 0.0), "ohm"))
            points.append(TestPointSpec(
                label=f"{self.label}: {format_si(volts, 'V')}, {format_si(amps, 'A')}, {drive}",
                bus_voltage=volts, forward_current=amps, temperatures=self.temperatures,
                didt=didt, gate_resistance=ohms, repeats=self.repeats,
                shot_spacing=self.shot_spacing))
        return points


class Tolerances(StrictModel):
    """Allowed deviation of the measured conditions from the requested ones (per shot),
    written with their units (``"5 %"``, ``"3 K"``; a bare number is refused,
    :mod:`benchrun.config.explicit`)."""

    forward_current: ExplicitTolerance = 0.05
    didt: ExplicitTolerance = 0.25
    reverse_voltage: ExplicitTolerance = 0.05
    temperature: ExplicitTemperatureBand = 3.0


class ThermalSettings(StrictModel):
    """Temperature changes: stable within ``band`` for ``dwell``, then ``soak``; give up after
    ``timeout``."""

    band: TemperatureBand = 1.0
    dwell: Time = Field(default=60.0, ge=0)
    soak: Time = Field(default=300.0, ge=0)
    timeout: Time = Field(default=3600.0, gt=0)
    poll_interval: Time = Field(default=1.0, gt=0)


class TrimSettings(StrictModel):
    """Trim shots that correct the first-pulse width t1 before the real shots.

    ``single_pulse`` fires the first pulse alone at the test voltage; ``low_voltage`` fires
    it at ``bus_voltage`` (same t1 scales with V, see :func:`benchrun.runner.plan`); ``off``
    trusts the calculated t1.
    """

    mode: Literal["single_pulse", "low_voltage", "off"] = "single_pulse"
    bus_voltage: Voltage | None = Field(default=None, gt=0)
    tolerance: Fraction = 0.02
    max_shots: int = Field(default=4, ge=1, le=20)

    @model_validator(mode="after")
    def _voltage(self) -> TrimSettings:
        if self.mode == "low_voltage" and self.bus_voltage is None:
            raise ValueError("low_voltage trim needs 'bus_voltage'")
        return self


class TimingSettings(StrictModel):
    """Double-pulse timing and capture beyond the first pulse width (which is calculated)."""

    off_time: Time = Field(default=3e-6, gt=0)
    second_pulse: Time = Field(default=2e-6, gt=0)
    pre_trigger: Time = Field(default=1e-6, ge=0)
    post_margin: Time = Field(default=1e-6, ge=0)
    sample_interval: Time = Field(default=1e-9, gt=0)


class ExpectedValues(StrictModel):
    """Rough expectations that set the scope ranges (never used as results)."""

    irrm_fraction: float = Field(default=1.0, gt=0, le=5)
    overshoot_margin: float = Field(default=1.5, ge=1, le=5)
    didt: CurrentSlope | None = Field(default=None, gt=0)


class AnalysisSettings(StrictModel):
    """Passed to the analysis as ``RecoveryOptions`` (DESIGN §3 defaults)."""

    fit_high: float = Field(default=0.9, gt=0, lt=1)
    fit_low: float = Field(default=0.25, gt=0, lt=1)
    trr_method: Literal["extrapolate", "threshold"] = "extrapolate"
    trr_threshold_fraction: float = Field(default=0.25, gt=0, lt=1)
    integration_end_fraction: float = Field(default=0.02, gt=0, lt=1)
    integration_window: Literal["fraction", "trr_end", "triangle"] = "fraction"
    lowpass: Frequency | None = Field(default=None, gt=0)

    @model_validator(mode="after")
    def _order(self) -> AnalysisSettings:
        if self.fit_low >= self.fit_high:
            raise ValueError("fit_low must be below fit_high")
        return self

    def option_values(self) -> dict[str, Any]:
        """Keyword arguments for ``RecoveryOptions``."""
        return {
            "fit_high": self.fit_high,
            "fit_low": self.fit_low,
            "trr_method": self.trr_method,
            "trr_threshold_fraction": self.trr_threshold_fraction,
            "integration_end_fraction": self.integration_end_fraction,
            "integration_window": self.integration_window,
            "lowpass_hz": self.lowpass,
        }


class LossSettings(StrictModel):
    """Switching frequencies for the loss estimate, and the kind of recovery of the part.

    ``recovery``: ``stored-charge`` (PiN diode, default: Err is dissipated and counted) or
    ``capacitive`` (Schottky diode: Err is stored in the depletion capacitance and returned, so
    the loss per commutation is the switch's recovery share only; see
    :mod:`benchrun.loss.estimate`).
    """

    switching_frequencies: list[Frequency] = Field(default_factory=list)
    recovery: Literal["stored-charge", "capacitive"] = "stored-charge"

    @field_validator("switching_frequencies")
    @classmethod
    def _positive(cls, values: list[float]) -> list[float]:
        for value in values:
            if value <= 0:
                raise ValueError(f"a switching frequency must be positive, got {value:g} Hz")
        return values


class SequenceConfig(StrictModel):
    """A whole sequence file."""

    name: str = ""
    part: str = Field(min_length=1)
    lot: str = Field(min_length=1)
    ratings: PartRatings | None = None
    devices: Literal["all"] | list[str] = "all"
    limits: str | None = None
    test_points: list[TestPointSpec] = Field(default_factory=list)
    sweeps: list[SweepSpec] = Field(default_factory=list)
    tolerances: Tolerances = Tolerances()
    thermal: ThermalSettings = ThermalSettings()
    trim: TrimSettings = TrimSettings()
    timing: TimingSettings = TimingSettings()
    expected: ExpectedValues = ExpectedValues()
    analysis: AnalysisSettings = AnalysisSettings()
    loss: LossSettings = LossSettings()
    switch_voltage: bool = False
    retry_invalid: int = Field(default=1, ge=0, le=3)

    @field_validator("lot")
    @classmethod
    def _lot(cls, value: str) -> str:
        return check_lot(value)

    @model_validator(mode="after")
    def _some_points(self) -> SequenceConfig:
        if not self.test_points and not self.sweeps:
            raise ValueError("give 'test_points' or 'sweeps' (at least one test point)")
        return self

    def point_sources(self) -> list[tuple[TestPointSpec, tuple[str, int]]]:
        """Every test point entry, the sweeps expanded, with where it was written
        (``("test_points", i)`` or ``("sweeps", j)``): explicit points first, then each
        sweep's grid in file order."""
        out: list[tuple[TestPointSpec, tuple[str, int]]] = [
            (spec, ("test_points", i)) for i, spec in enumerate(self.test_points)]
        seen: dict[tuple, set[float]] = {}
        for spec, _ in out:
            seen.setdefault(_drive_key(spec), set()).update(spec.temperatures)
        for j, sweep in enumerate(self.sweeps):
            for spec in sweep.expand():
                # a grid point an earlier entry already tests (two sweeps crossing at the
                # nominal point) is tested once, at the temperatures not yet covered
                done = seen.setdefault(_drive_key(spec), set())
                left = [t for t in spec.temperatures if t not in done]
                if not left:
                    continue
                done.update(left)
                if len(left) != len(spec.temperatures):
                    spec = spec.model_copy(update={"temperatures": left})
                out.append((spec, ("sweeps", j)))
        return out

    def all_points(self) -> list[TestPointSpec]:
        """The explicit test points followed by every sweep's grid points."""
        return [spec for spec, _ in self.point_sources()]

    @field_validator("devices")
    @classmethod
    def _serials(cls, value: Any) -> Any:
        if isinstance(value, list):
            if not value:
                raise ValueError("the device list is empty")
            if len(set(value)) != len(value):
                raise ValueError("a serial is listed twice")
            for serial in value:
                if not serial.strip():
                    raise ValueError("empty serial")
                check_serial(serial)
        return value


def _drive_key(spec: TestPointSpec) -> tuple:
    return (spec.bus_voltage, spec.forward_current, spec.didt, spec.gate_resistance)


def load_sequence(path: str | Path) -> SequenceConfig:
    """Load and validate a sequence file; errors name file, line and field."""
    return load_model(SequenceConfig, path)


def limits_path(sequence: SequenceConfig, sequence_path: str | Path) -> Path | None:
    """The limits file named by the sequence, resolved relative to the sequence file."""
    if sequence.limits is None:
        return None
    path = Path(sequence.limits)
    if not path.is_absolute():
        path = Path(sequence_path).resolve().parent / path
    return path.resolve()
