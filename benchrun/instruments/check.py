"""Identify-and-configure dry run of a bench (``benchrun bench check``): nothing is fired.

:func:`check_bench` opens every instrument a bench file names, asks its identity (``*IDN?``)
and compares the model with the models its command table is written for
(``identity.models``), then sends every setting a sequence would use (scope ranges, offsets,
probes, coupling, time base and trigger of each test point; pulse widths and gate
resistance, double and single pulse; for di/dt control, when a point has a di/dt target,
every declared gate resistor or both ends of the drive-voltage range; the supply's voltage
setpoint with its output OFF; the thermal setpoint with its output OFF), reads each one back
(the tables' ``query``) and drains the SCPI error queue (``SYSTem:ERRor?``) after each step.
Every mismatch and every error-queue entry becomes one line. At the end every output is
switched off and read back, the supply's setpoint is put back to 0 V and the scope's
acquisition is aborted.

No output is ever switched on and no pulse is fired: the check is meant for a new instrument
or a new command table on a real bench, before the first run.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from benchrun.config.bench import BenchConfig
from benchrun.config.sequence import SequenceConfig
from benchrun.errors import (
    BenchrunError,
    InstrumentError,
    InstrumentReportedError,
    InstrumentTimeout,
)
from benchrun.instruments.roles import connect

#: Line kinds; ``mismatch`` and ``error`` make the check fail.
KINDS = ("info", "ok", "mismatch", "error")

#: Roles whose output the check makes sure is off, in the order it switches them off.
OUTPUT_ROLES = ("pulse", "supply", "thermal")


@dataclass(frozen=True)
class CheckLine:
    """One finding: ``kind`` (``info``, ``ok``, ``mismatch``, ``error``), role, text."""

    kind: str
    role: str
    text: str

    def render(self) -> str:
        label = {"info": "", "ok": "ok: ", "mismatch": "MISMATCH ",
                 "error": "SCPI ERROR "}[self.kind]
        return f"{self.role:8s} {label}{self.text}"


@dataclass
class CheckReport:
    """All findings of one check, in order."""

    lines: list[CheckLine] = field(default_factory=list)
    settings_read_back: int = 0

    @property
    def mismatches(self) -> int:
        return sum(1 for line in self.lines if line.kind == "mismatch")

    @property
    def errors(self) -> int:
        return sum(1 for line in self.lines if line.kind == "error")

    @property
    def passed(self) -> bool:
        return self.mismatches == 0 and self.errors == 0


class _Checker:
    def __init__(self, bench: BenchConfig, on_line: Callable[[CheckLine], None] | None) -> None:
        self.bench = bench
        self.report = CheckReport()
        self.on_line = on_line
        self.drivers: dict[str, Any] = {}

    def add(self, kind: str, role: str, text: str) -> None:
        line = CheckLine(kind, role, text)
        self.report.lines.append(line)
        if self.on_line is not None:
            self.on_line(line)

    # --- identity ----------------------------------------------------------------------------

    def open(self, resources: dict[str, str]) -> None:
        for role, entry in self.bench.instruments.items():
            options = {}
            if role == "scope":
                options["channel_map"] = {n: p.channel for n, p in self.bench.probes.items()}
            try:
                driver = connect(role, resources[role], entry.family,
                                 visa_library=self.bench.visa_library, timeout_s=entry.timeout,
                                 **options)
            except BenchrunError as exc:
                self.add("error", role, f"cannot open {resources[role]}: {exc}")
                continue
            if self.identify(role, driver):
                self.drivers[role] = driver
            else:
                _close(driver)

    def identify(self, role: str, driver: Any) -> bool:
        """Ask ``*IDN?``; False (instrument left out) when it does not fit the table."""
        table = driver.table
        try:
            ident = driver.identity()
        except BenchrunError as exc:
            self.add("error", role, f"no identity from {driver.session.resource}: {exc}")
            return False
        self.add("info", role, f"{ident.manufacturer} {ident.model} s/n {ident.serial}, "
                               f"firmware {ident.firmware} ({table.family} at {ident.resource})")
        if table.models and not any(fnmatch.fnmatchcase(ident.model.upper(), m.upper())
                                    for m in table.models):
            self.add("mismatch", role,
                     f"*IDN? model {ident.model!r} is not one the command table "
                     f"{table.family} is written for ({', '.join(table.models)}): wrong "
                     "family in the bench file? Settings not checked.")
            return False
        if not table.models:
            self.add("info", role, f"table {table.family} lists no models: identity not "
                                   "compared")
        try:
            old = driver.drain_errors()
            driver.clear_status()
        except InstrumentTimeout as exc:
            self.add("mismatch", role, f"no answer to the table's error query "
                                       f"{table.spec('next_error').send} ({exc}): the "
                                       "instrument does not know this table's headers: wrong "
                                       "family? Not checked further.")
            return False
        except BenchrunError as exc:
            self.add("error", role, f"cannot read the error queue: {exc}")
            return False
        if old:
            self.add("info", role, f"{len(old)} entries already in the error queue "
                                   f"(cleared): {_entries(old)}")
        return True

    # --- outputs ---------------------------------------------------------------------------

    def outputs_off_at_start(self) -> None:
        for role in OUTPUT_ROLES:
            driver = self.drivers.get(role)
            if driver is None or not driver.table.has("output_state"):
                continue
            if self.guard(role, driver.is_output_on):
                self.add("mismatch", role, "output is ON before the check; switching it off")
                self.guard(role, lambda d=driver: d.output(False))

    def outputs_off_at_end(self) -> None:
        states = []
        for role in OUTPUT_ROLES:
            driver = self.drivers.get(role)
            if driver is None:
                continue
            if role == "supply":
                self.guard(role, lambda d=driver: d.set_voltage(0.0))
            switch_off = getattr(driver, "switch_off", None)
            if switch_off is not None:
                done = self.guard(role, switch_off, default=False) is not False
            else:
                done = self.guard(role, lambda d=driver: d.output(False),
                                  default=False) is not False
                if done and driver.table.has("output_state"):
                    done = not self.guard(role, driver.is_output_on, default=True)
            text = "off" if done else "NOT confirmed off"
            if role == "supply" and done:
                volts = self.guard(role, driver.measure_voltage)
                if volts is not None:
                    text += f" (bus {volts:.1f} V, setpoint 0 V)"
            states.append(f"{role} {text}")
            if not done:
                self.add("mismatch", role, "output not confirmed off: switch it off by hand")
        scope = self.drivers.get("scope")
        if scope is not None:
            self.guard("scope", scope.abort)
        if states:
            self.add("info", "outputs", ", ".join(states))

    def guard(self, role: str, call: Callable[[], Any], default: Any = None) -> Any:
        """Run one instrument call; an instrument error becomes a line (and ``default``)."""
        try:
            return call()
        except InstrumentReportedError as exc:
            for code, text in getattr(exc, "entries", []):
                self.add("error", role, f'{code},"{text}"')
        except (BenchrunError, ValueError) as exc:
            self.add("error", role, str(exc))
        return default

    # --- settings ----------------------------------------------------------------------------

    def apply(self, role: str, what: str, call: Callable[[Any], None]) -> None:
        """Send settings (``call(driver)``), then read back every one and report differences.

        After an error-queue entry "undefined header" (-113) the instrument does not speak
        this table's dialect: its settings are not read back (each would wait for a timeout).
        """
        driver = self.drivers.get(role)
        if driver is None:
            return
        try:
            call(driver)
        except InstrumentReportedError as exc:
            entries = getattr(exc, "entries", [])
            for code, text in entries:
                self.add("error", role, f'{code},"{text}" after {what}')
            if any(code == -113 for code, _ in entries):
                self.add("mismatch", role, "the instrument does not know this table's "
                                           "headers: wrong family? Not checked further.")
                driver.forget_sent()
                self.drivers.pop(role)
                _close(driver)
                return
        except InstrumentError as exc:
            self.add("error", role, f"{what}: {exc}; not checked further")
            self.drivers.pop(role)
            _close(driver)
            return
        pending = driver.pending_settings
        try:
            found = driver.verify_settings()
            found_errors = driver.drain_errors()
        except InstrumentError as exc:
            self.add("error", role, f"reading back after {what}: {exc}; not checked further")
            self.drivers.pop(role)
            _close(driver)
            return
        self.report.settings_read_back += pending
        for mismatch in found:
            self.add("mismatch", role, mismatch.line().split(": ", 1)[1])
        for code, text in found_errors:
            self.add("error", role, f'{code},"{text}" reading back after {what}')

    def close(self) -> None:
        for driver in self.drivers.values():
            _close(driver)


def check_bench(bench: BenchConfig, resources: dict[str, str],
                sequence: SequenceConfig | None = None, *, limits: Any = None,
                on_line: Callable[[CheckLine], None] | None = None) -> CheckReport:
    """Identify every instrument, set and read back every setting, leave every output off.

    Parameters
    ----------
    bench
        The bench file (instruments, probes, fixture, safety limits).
    resources
        Role → VISA resource string (``sim`` placeholders already resolved).
    sequence
        The sequence whose settings are checked; without it the scope is set up with the
        bench's probes and ranges from its safety limits, and the supply setpoint to 0 V.
    limits
        The sequence's limits (``LimitsSpec``), which set the current windows as in a run
        (:func:`benchrun.runner.plan.plan_ranges`).
    on_line
        Called with every finding as it is made (for printing progress).
    """
    checker = _Checker(bench, on_line)
    try:
        checker.open(resources)
        checker.outputs_off_at_start()
        for role, what, call in _steps(bench, sequence, limits):
            checker.apply(role, what, call)
        if "handler" in checker.drivers and sequence is not None:
            _check_devices(checker, sequence)
    finally:
        checker.outputs_off_at_end()
        checker.close()
    if checker.report.passed:
        checker.add("ok", "bench", f"{checker.report.settings_read_back} settings read back "
                                   "as set, no SCPI errors")
    return checker.report


def _steps(bench: BenchConfig, sequence: SequenceConfig | None, limits: Any = None
           ) -> list[tuple[str, str, Callable[[Any], None]]]:
    """(role, description, call(driver)) for every group of settings, in sending order."""
    if sequence is None:
        return _bench_only_steps(bench)
    from benchrun.runner.plan import expand_points, plan_pulses, plan_ranges

    steps: list[tuple[str, str, Callable[[Any], None]]] = []
    for point in expand_points(sequence):
        plan = plan_pulses(point, sequence, bench.fixture)
        ranges = plan_ranges(point, sequence, bench, limits)
        channels = {name: (r.span, r.center, bench.probes[name].scale)
                    for name, r in ranges.items()}
        volts = point.bus_voltage_V
        label = point.label or f"point {point.index + 1}"

        def scope(d: Any, channels: dict = channels, plan: Any = plan, volts: float = volts
                  ) -> None:
            # the runner's set-up (Station.configure_scope): trigger on the diode voltage
            # falling through half the bus voltage at the first turn-on
            d.configure(channels, plan.sample_interval_s, plan.points, plan.record_start_s,
                        "diode_voltage", -0.5 * volts, "falling")

        def pulse(d: Any, plan: Any = plan, rg: float | None = point.gate_resistance_ohm
                  ) -> None:
            if rg is not None:
                d.set_gate_resistance(rg)
            d.configure(plan.first_pulse_s, plan.off_time_s, plan.second_pulse_s)

        def single(d: Any, plan: Any = plan) -> None:
            d.configure(plan.first_pulse_s)

        steps += [
            ("scope", f"the capture of {label}", scope),
            ("pulse", f"the double pulse of {label}", pulse),
            ("pulse", f"the single (trim) pulse of {label}", single),
            ("supply", f"the {volts:g} V setpoint of {label} (output off)",
             lambda d, v=volts: d.set_voltage(v)),
        ]
        if "thermal" in dict(bench.instruments.items()):
            steps.append(("thermal", f"the setpoint of {label} (output off)",
                          lambda d, k=point.temperature_K: d.set_temperature(k)))
    return steps + _gate_drive_steps(bench, sequence)


def _gate_drive_steps(bench: BenchConfig, sequence: SequenceConfig
                      ) -> list[tuple[str, str, Callable[[Any], None]]]:
    """The settings di/dt control may send (a test point with a di/dt target): every
    declared gate resistor, or the one resistor at both ends of the drive-voltage range."""
    from benchrun.runner.plan import expand_points

    gate = bench.fixture.gate_drive
    if gate is None or not any(p.didt_A_per_s for p in expand_points(sequence)):
        return []
    if gate.sets_drive_voltage:
        (rg,) = gate.resistors
        low, high = gate.drive_voltage_range  # type: ignore[misc]

        def drive(d: Any, volts: float) -> None:
            d.set_gate_resistance(rg)
            d.set_drive_voltage(volts)

        return [("pulse", f"the di/dt control's drive voltage {v:g} V through {rg:g} ohm",
                 lambda d, v=v: drive(d, v)) for v in (low, high)]
    return [("pulse", f"the di/dt control's gate resistor {r:g} ohm",
             lambda d, r=r: d.set_gate_resistance(r)) for r in gate.resistors]


def _bench_only_steps(bench: BenchConfig) -> list[tuple[str, str, Callable[[Any], None]]]:
    """Without a sequence: the bench's probes on ranges spanning its safety limits."""
    vmax, imax = bench.safety.max_bus_voltage, bench.safety.max_current
    channels = {}
    for name, probe in bench.probes.items():
        top = 20.0 if name == "gate" else (imax if probe.measures_current else vmax)
        channels[name] = (2.2 * top, 0.0, probe.scale)

    def scope(d: Any) -> None:
        d.configure(channels, 1e-9, 10_000, -1e-6, "diode_voltage", -0.5 * vmax, "falling")

    return [("scope", "the probes and safety-limit ranges", scope),
            ("supply", "a 0 V setpoint (output off)", lambda d: d.set_voltage(0.0))]


def _check_devices(checker: _Checker, sequence: SequenceConfig) -> None:
    handler = checker.drivers["handler"]
    held = checker.guard("handler", handler.list_devices, default=None)
    if held is None:
        return
    if sequence.devices == "all":
        checker.add("info", "handler", f"holds {len(held)} devices")
        return
    missing = [s for s in sequence.devices if s not in held]
    if missing:
        checker.add("mismatch", "handler", f"devices of the sequence not held: "
                                           f"{', '.join(missing)}")


def _entries(entries: list[tuple[int, str]]) -> str:
    return "; ".join(f'{code},"{text}"' for code, text in entries)


def _close(driver: Any) -> None:
    close = getattr(driver.session, "close", None)
    if close is not None:
        close()
