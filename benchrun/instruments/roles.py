"""Role drivers: what the runner calls, in SI units, whatever the instrument family.

Each driver is built from a session (:class:`~benchrun.instruments.session.InstrumentSession`
or any :class:`~benchrun.instruments.session.Transport`) and a command table
(:mod:`benchrun.instruments.commands`); every string it sends comes from the table.

Common to every driver
    ``identity()`` / ``identify()`` -> :class:`InstrumentIdentity` (from ``*IDN?``),
    ``reset()`` (``*RST``, ``*CLS``, ``*OPC?``), ``clear_status()``, ``event_status()``,
    ``drain_errors()`` -> list of (code, text), ``check_errors(context)`` raises
    :class:`~benchrun.errors.InstrumentReportedError` when the SCPI error queue was not empty.
    Every ``configure``/``set_*`` call drains the queue before returning.
    ``readback(name, **index)`` reads a setting back (tables that declare its ``query``);
    ``verify_settings()`` reads back every setting sent since the last call and returns the
    :class:`SettingMismatch` list (``benchrun bench check``).

:class:`Scope`
    ``configure(channels, sample_interval_s, record_length, t_start_s, trigger_source,
    trigger_level, trigger_slope="rising")`` (also the table's data-format ``setup`` commands
    and DC coupling where the table has ``channel_coupling``), ``arm_single()``, ``abort()``,
    ``wait_triggered(timeout_s) -> bool``, ``read_channel(name) -> ChannelTrace``,
    ``read_channels(names)``.
:class:`PulseSource`
    ``configure(first_pulse_s, off_time_s=0, second_pulse_s=0)`` (no second pulse = single
    pulse trim shot), ``set_gate_resistance(ohm)``, ``output(on)``, ``is_output_on()``,
    ``fire()`` (never repeated automatically after a dropped connection).
    With :class:`BusSupply`: ``has_watchdog``, ``arm_watchdog()``, ``refresh_watchdog()``
    (tables with an ``output_watchdog`` section).
:class:`BusSupply`
    ``set_voltage(V)``, ``set_current_limit(A)``, ``output(on)``, ``is_output_on()``,
    ``measure_voltage()``, ``measure_current()``.
:class:`ThermalController`
    ``set_temperature(K)``, ``setpoint()``, ``measure_temperature()`` (K), ``output(on)``.
:class:`Handler`
    ``list_devices()``, ``select(serial)``, ``selected()``.

:func:`connect` opens a session and builds the driver for a role in one call.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass
from typing import Any, ClassVar

import numpy as np

from benchrun.errors import ConfigError, InstrumentError, InstrumentReportedError, ProtocolError
from benchrun.instruments import scpi
from benchrun.instruments.commands import CommandTable, load_table
from benchrun.instruments.expressions import evaluate
from benchrun.instruments.session import DEFAULT_VISA_LIBRARY, InstrumentSession, Transport

#: Which scope input each analysis channel is wired to on the standard fixture.
DEFAULT_CHANNEL_MAP: dict[str, int] = {
    "diode_voltage": 1,
    "diode_current": 2,
    "switch_voltage": 3,
    "gate": 4,
}

#: Error-queue entries read at most per drain (a stuck queue must not loop forever).
MAX_ERROR_ENTRIES = 64


@dataclass(frozen=True)
class InstrumentIdentity:
    """An instrument's IEEE 488.2 identity (``*IDN?``) and where it was reached."""

    manufacturer: str
    model: str
    serial: str
    firmware: str
    resource: str
    family: str = ""

    def to_dict(self) -> dict[str, str]:
        return asdict(self)


@dataclass(frozen=True)
class SettingMismatch:
    """A setting that did not read back as sent (``read`` is None when it could not be read)."""

    role: str
    setting: str
    sent: str
    read: str | None
    detail: str = ""

    def line(self) -> str:
        if self.read is None:
            return f"{self.role}: {self.sent}: cannot read it back ({self.detail})"
        return f"{self.role}: {self.sent}: reads back {self.read!r}"


@dataclass(frozen=True)
class ChannelTrace:
    """One scope channel as read: codes plus scaling, compatible with ``ChannelData``.

    Channel volts = ``codes * gain + offset`` (probe factor removed: multiply by the probe's
    scale for physical units); sample ``k`` is at ``t_start + k * dt`` relative to the trigger.
    ``code_min``/``code_max`` are the ADC limits (for clipping detection).
    """

    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int
    t_start: float
    dt: float

    def volts(self) -> np.ndarray:
        """Channel volts as float64."""
        return self.codes * self.gain + self.offset

    def to_channel_data(self) -> Any:
        """The analysis pipeline's ``ChannelData`` for this trace."""
        from benchrun.analysis.pipeline import ChannelData

        return ChannelData(codes=self.codes, gain=self.gain, offset=self.offset,
                           code_min=self.code_min, code_max=self.code_max)


class _Driver:
    role: ClassVar[str] = ""

    def __init__(self, session: Transport, table: CommandTable | str) -> None:
        self.session = session
        self.table = load_table(table) if isinstance(table, str) else table
        if self.table.role != self.role:
            raise ConfigError(f"command table {self.table.family} is for role "
                              f"{self.table.role!r}, not {self.role!r}", file=self.table.source)
        #: settings sent since the last verify_settings(): (name, index) -> inputs
        self._sent: dict[tuple[str, tuple[tuple[str, Any], ...]], dict[str, Any]] = {}

    # --- plumbing ----------------------------------------------------------------------------

    def _send(self, name: str, *, retry: bool = True, **inputs: Any) -> None:
        self.session.write(self.table.format(name, **inputs), retry=retry)
        if self.table.can_read_back(name):
            index = tuple((k, inputs[k]) for k in self.table.index_args(name))
            self._sent[(name, index)] = dict(inputs)

    # --- read-back -----------------------------------------------------------------------------

    def readback(self, name: str, **index: Any) -> dict[str, Any]:
        """Read setting ``name`` back: its wire values and driver-level (inverse) values."""
        return self._ask(f"{name}?", **index)

    @property
    def pending_settings(self) -> int:
        """Settings sent since the last :meth:`verify_settings` (each read back once)."""
        return len(self._sent)

    def forget_sent(self) -> None:
        """Drop the record of settings sent (they will not be read back)."""
        self._sent.clear()

    def verify_settings(self) -> list[SettingMismatch]:
        """Read back every setting sent since the last call; the ones that differ.

        Floats agree within 1 part in 10^6 (the 10 digits sent, and an instrument's own
        float formatting); everything else exactly.
        """
        sent, self._sent = self._sent, {}
        found = []
        for (name, index), inputs in sent.items():
            text = self.table.format(name, **inputs)
            expected = self.table.wire_values(name, **inputs)
            try:
                got = self.readback(name, **dict(index))
            except ProtocolError as exc:
                found.append(SettingMismatch(self.role, name, text, None, str(exc)))
                continue
            for key, want in expected.items():
                have = got.get(key)
                if not _same(want, have):
                    found.append(SettingMismatch(self.role, name, text,
                                                 _show(have, self.table, name, key)))
                    break
        return found

    def _ask(self, name: str, **inputs: Any) -> Any:
        return self.table.parse_reply(name, self.session.query(self.table.format(name, **inputs)))

    # --- IEEE 488.2 common -------------------------------------------------------------------

    def identity(self) -> InstrumentIdentity:
        """Ask ``*IDN?`` and parse the four fields."""
        fields = scpi.parse_idn(self._ask("identify"), self.table.idn_order)
        return InstrumentIdentity(fields.manufacturer, fields.model, fields.serial,
                                  fields.firmware, self.session.resource, self.table.family)

    identify = identity

    def reset(self) -> None:
        """``*RST`` then ``*CLS``, waiting for completion with ``*OPC?``."""
        self._send("reset")
        self._send("clear_status")
        self.operation_complete()

    def clear_status(self) -> None:
        self._send("clear_status")

    def operation_complete(self) -> None:
        """Block until the instrument reports all pending operations complete (``*OPC?``)."""
        value = self._ask("operation_complete")
        if value != 1:
            raise ProtocolError(f"{self.session.resource}: *OPC? answered {value}, expected 1")

    def event_status(self) -> int:
        """The standard event status register (``*ESR?``; reading clears it)."""
        return int(self._ask("event_status"))

    def drain_errors(self) -> list[tuple[int, str]]:
        """Read the SCPI error queue until ``0,"No error"``; return the entries read."""
        entries = []
        for _ in range(MAX_ERROR_ENTRIES):
            code, text = self._ask("next_error")
            if code == 0:
                return entries
            entries.append((code, text))
        raise ProtocolError(f"{self.session.resource}: error queue not empty after "
                            f"{MAX_ERROR_ENTRIES} reads: {entries[-3:]}")

    def check_errors(self, context: str) -> None:
        """Drain the error queue; raise InstrumentReportedError when it held entries."""
        entries = self.drain_errors()
        if entries:
            listed = "; ".join(f"{code},{text!r}" for code, text in entries)
            err = InstrumentReportedError(
                f"{self.role} {self.session.resource} reported after {context}: {listed}")
            err.entries = entries  # type: ignore[attr-defined]
            raise err


class Scope(_Driver):
    """Digitizing oscilloscope.

    Parameters
    ----------
    channel_map
        Analysis channel name → scope input number (default :data:`DEFAULT_CHANNEL_MAP`).
    """

    role = "scope"

    def __init__(self, session: Transport, table: CommandTable | str = "scope-generic",
                 channel_map: dict[str, int] | None = None) -> None:
        super().__init__(session, table)
        self.channel_map = dict(channel_map or DEFAULT_CHANNEL_MAP)
        self._probe: dict[int, float] = {}

    def _channel(self, name: str | int) -> int:
        if isinstance(name, int):
            return name
        try:
            return self.channel_map[name]
        except KeyError as exc:
            raise ConfigError(f"scope channel {name!r} not wired; known: "
                              f"{sorted(self.channel_map)}") from exc

    def configure(
        self,
        channels: dict[str, tuple[float, float, float]],
        sample_interval_s: float,
        record_length: int,
        t_start_s: float,
        trigger_source: str | int,
        trigger_level: float,
        trigger_slope: str = "rising",
    ) -> None:
        """Set up one single-shot capture.

        Parameters
        ----------
        channels
            ``{name: (range_full_scale, offset, probe_scale)}``: full-scale range and centre
            offset in probe units (V for a voltage probe, A for a current sensor), and the
            probe scale (probe units per channel volt). Inputs not listed are switched off.
        sample_interval_s, record_length
            Sampling; the record spans ``record_length * sample_interval_s``.
        t_start_s
            Time of the first sample relative to the trigger (negative = pre-trigger).
        trigger_source, trigger_level, trigger_slope
            Channel name (or input number), level in that channel's probe units, and edge
            (``"rising"``/``"falling"``).
        """
        wanted = {self._channel(name): spec for name, spec in channels.items()}
        wf = self.table.waveform
        assert wf is not None  # validated for scope tables
        for name in wf.setup:  # data format, byte order
            self._send(name)
        for ch in range(1, max(self.table.channels, max(wanted, default=0)) + 1):
            self._send("channel_display", channel=ch, state=ch in wanted)
        self._probe = {}
        coupling = self.table.has("channel_coupling")
        for ch, (full_scale, offset, probe) in sorted(wanted.items()):
            if coupling:
                self._send("channel_coupling", channel=ch, coupling="dc")
            self._send("channel_probe", channel=ch, factor=float(probe))
            self._send("channel_range", channel=ch, range=float(full_scale))
            self._send("channel_offset", channel=ch, offset=float(offset))
            self._probe[ch] = float(probe)
        self._send("sample_interval", interval=float(sample_interval_s))
        self._send("record_length", points=int(record_length))
        self._send("time_start", t_start=float(t_start_s))
        self._send("trigger_source", channel=self._channel(trigger_source))
        self._send("trigger_level", level=float(trigger_level))
        self._send("trigger_slope", slope=trigger_slope)
        self.operation_complete()
        self.check_errors("configuring the capture")

    def arm_single(self) -> None:
        """Arm one single-shot acquisition; returns once the scope is armed (``*OPC?``).

        Without the ``*OPC?`` round trip a fire command sent to the pulse source on another
        connection could overtake the arm command.
        """
        self._send("arm_single")
        self.operation_complete()

    def abort(self) -> None:
        """Stop an armed acquisition (tables with an ``abort`` command; else nothing)."""
        if self.table.has("abort"):
            self._send("abort")

    def acquisition_done(self) -> bool:
        return bool(self._ask("acquisition_done"))

    def wait_triggered(self, timeout_s: float, poll_s: float = 0.002,
                       expected_s: float | None = None, since: float | None = None) -> bool:
        """Poll until the armed acquisition completed; False when it did not within timeout.

        Without ``expected_s`` the interval between polls grows with the time already waited
        (a tenth of it, from ``poll_s / 8`` up to ``poll_s``): a quick acquisition is seen
        soon after it completed, a long one is not asked about hundreds of times. With
        ``expected_s`` (how long recent acquisitions took) the scope is asked once at once,
        then left alone until 80 % of that time, then asked every 1 % of it (within
        ``poll_s / 8`` to ``poll_s``) until twice that time has passed, then as without it:
        an acquisition as long as the recent ones is seen within about 1 % of its duration,
        at fewer queries than the growing interval needs. ``since``: the ``time.monotonic()``
        at which the acquisition was started (default: now); the times above count from it.
        """
        start = time.monotonic() if since is None else since
        deadline = start + timeout_s
        fast = poll_s / 8
        while True:
            if self.acquisition_done():
                return True
            now = time.monotonic()
            if now >= deadline:
                return False
            waited = now - start
            if expected_s is not None and waited < 0.8 * expected_s:
                pause = 0.8 * expected_s - waited
            elif expected_s is not None and waited < 2.0 * expected_s:
                pause = min(poll_s, max(fast, 0.01 * expected_s))
            else:
                pause = min(poll_s, max(fast, 0.1 * waited))
            time.sleep(min(pause, deadline - now))

    def read_channel(self, name: str | int) -> ChannelTrace:
        """Transfer one channel of the last acquisition (binary block) with its scaling."""
        ch = self._channel(name)
        wf = self.table.waveform
        assert wf is not None  # validated for scope tables
        if wf.select_source:
            self._send(wf.select_source, channel=ch)
        names: dict[str, float] = dict(self.table.constants)
        for key, command in wf.scaling_queries.items():
            names.update(self._scaling_values(key, command, ch))
        payload = self.session.query_block(self.table.format("waveform_data", channel=ch),
                                           terminator=wf.terminator_after_block)
        itemsize = 1 if wf.sample_format == "int8" else 2
        if len(payload) % itemsize:
            raise ProtocolError(f"{self.session.resource}: block of {len(payload)} bytes is "
                                f"not a whole number of {wf.sample_format} samples")
        codes = np.frombuffer(payload, dtype=wf.numpy_dtype).astype(np.int16)
        if codes.size == 0:
            self.check_errors(f"reading channel {name}")
            raise ProtocolError(f"{self.session.resource}: channel {name} returned no samples")
        probe = self._probe.get(ch, 1.0)
        return ChannelTrace(
            codes=codes,
            gain=evaluate(wf.gain, names) / probe,
            offset=evaluate(wf.offset, names) / probe,
            code_min=wf.code_min,
            code_max=wf.code_max,
            t_start=evaluate(wf.t_start, names),
            dt=evaluate(wf.dt, names),
        )

    def _scaling_values(self, key: str, command: str, channel: int) -> dict[str, float]:
        """One scaling query's values: a setting read back (its one value), the fields of a
        CSV scaling record, or a plain number."""
        wf = self.table.waveform
        assert wf is not None
        spec = self.table.spec(command)
        answer = self._ask(command, channel=channel)
        if spec.setting is not None:
            setting = self.table.spec(spec.setting)
            value_args = [a.name for a in setting.args if a.name not in
                          self.table.index_args(spec.setting)]
            return {key: float(answer[value_args[0]])}
        if key in wf.scaling_fields:
            fields = wf.scaling_fields[key]
            if len(answer) != len(fields):
                raise ProtocolError(f"{self.session.resource}: {spec.send} answered "
                                    f"{len(answer)} values, expected {len(fields)}")
            return {f: scpi.parse_float(v) for f, v in zip(fields, answer, strict=True)}
        return {key: float(answer)}

    def read_channels(self, names: list[str]) -> dict[str, ChannelTrace]:
        return {name: self.read_channel(name) for name in names}


class _SwitchedOutput(_Driver):
    """A driver whose instrument has an output that is switched on and off."""

    def output(self, on: bool) -> None:
        self._send("output", state=bool(on))
        if on:
            self.check_errors("switching the output on")

    def is_output_on(self) -> bool:
        return bool(self._ask("output_state"))

    def switch_off(self, attempts: int = 2) -> None:
        """Output off, confirmed by reading the state back; the command is sent again when
        the instrument still reports the output on (a dropped connection can swallow a
        command without any error at the sender).

        Raises
        ------
        InstrumentError
            The output still reads on after ``attempts`` off commands, or the state cannot
            be read.
        """
        for _ in range(attempts):
            self.output(False)
            if not self.is_output_on():
                return
        raise InstrumentError(f"{self.session.resource}: the output still reads on after "
                              f"{attempts} off commands")

    # --- output watchdog (tables with an ``output_watchdog`` section) ---------------------------

    @property
    def has_watchdog(self) -> bool:
        return self.table.watchdog_timeout_s is not None

    def arm_watchdog(self, timeout_s: float | None = None) -> None:
        """Start the instrument's output watchdog: it switches its output off by itself when
        no refresh comes for ``timeout_s`` (default: the table's timeout)."""
        seconds = self.table.watchdog_timeout_s if timeout_s is None else timeout_s
        self._send("watchdog_timeout", seconds=float(seconds or 0.0))
        self.check_errors("arming the output watchdog")

    def refresh_watchdog(self) -> None:
        self._send("watchdog_refresh")


class PulseSource(_SwitchedOutput):
    """Double-pulse gate driver."""

    role = "pulse"

    def configure(self, first_pulse_s: float, off_time_s: float = 0.0,
                  second_pulse_s: float = 0.0) -> None:
        """Set the pulse train; without a second pulse it is a single-pulse (trim) shot."""
        if second_pulse_s > 0.0:
            self._send("pulse_count", count=2)
            self._send("first_width", width=float(first_pulse_s))
            self._send("off_time", gap=float(off_time_s))
            self._send("second_width", width=float(second_pulse_s))
        else:
            self._send("pulse_count", count=1)
            self._send("first_width", width=float(first_pulse_s))
        self.check_errors("setting the pulse timing")

    def set_gate_resistance(self, ohm: float) -> None:
        self._send("gate_resistance", ohm=float(ohm))
        self.check_errors("setting the gate resistance")

    def set_drive_voltage(self, volts: float) -> None:
        """Turn-on gate-drive voltage (tables with a ``drive_voltage`` command)."""
        self._send("drive_voltage", volts=float(volts))
        self.check_errors("setting the gate-drive voltage")

    def fire(self) -> None:
        """Fire one pulse train. Never repeated by the session after a dropped connection."""
        self._send("fire", retry=False)


class BusSupply(_SwitchedOutput):
    """DC bus supply."""

    role = "supply"

    def set_voltage(self, volts: float) -> None:
        self._send("voltage", volts=float(volts))
        self.check_errors("setting the bus voltage")

    def set_current_limit(self, amps: float) -> None:
        self._send("current_limit", amps=float(amps))
        self.check_errors("setting the current limit")

    def measure_voltage(self) -> float:
        """Measured voltage at the output terminals (bus voltage), V."""
        return float(self._ask("measure_voltage"))

    def measure_current(self) -> float:
        return float(self._ask("measure_current"))


class ThermalController(_Driver):
    """Temperature controller; kelvin in and out whatever the wire unit."""

    role = "thermal"

    def set_temperature(self, kelvin: float) -> None:
        self._send("setpoint", kelvin=float(kelvin))
        self.check_errors("setting the temperature")

    def setpoint(self) -> float:
        """The setpoint as the controller reports it, K."""
        return float(self.readback("setpoint")["kelvin"])

    def is_output_on(self) -> bool:
        return bool(self._ask("output_state"))

    def measure_temperature(self) -> float:
        """Measured device temperature, K."""
        return float(self._ask("measure_temperature"))

    def output(self, on: bool) -> None:
        self._send("output", state=bool(on))
        if on:
            self.check_errors("switching the temperature control on")


class Handler(_Driver):
    """Device handler / fixture selector."""

    role = "handler"

    def list_devices(self) -> list[str]:
        return [s for s in self._ask("list_devices") if s]

    def select(self, serial: str) -> None:
        """Place device ``serial`` in the fixture.

        The serial is sent as IEEE 488.2 string program data (§7.7.5: in double quotes, an
        embedded double quote doubled), so a space, comma, semicolon or quote in it cannot
        break the command. The table's template holds the quotes (``SELect "{serial}"``);
        the body is escaped here.
        """
        self._send("select", serial=scpi.string_body(serial))
        self.check_errors(f"selecting device {serial}")

    def selected(self) -> str | None:
        value = self._ask("selected")
        return None if value.upper() in ("", "NONE") else value

    def device_identity(self, serial: str) -> tuple[str, str] | None:
        """(part number, lot) of device ``serial`` as the handler reports it; None when the
        family's table has no such query or the handler does not know the device."""
        if not self.table.has("device_identity"):
            return None
        fields = [f.strip() for f in self._ask("device_identity", serial=serial)]
        if len(fields) != 2 or not all(fields) or "UNKNOWN" in (f.upper() for f in fields):
            return None
        return fields[0], fields[1]


def _same(want: Any, have: Any) -> bool:
    if isinstance(want, float) and isinstance(have, int | float):
        return abs(want - have) <= 1e-6 * max(abs(want), abs(have)) + 1e-15
    return bool(want == have)


def _show(value: Any, table: CommandTable, name: str, key: str) -> str:
    spec = table.spec(name)
    try:
        return spec.arg(key).to_wire(value)
    except (KeyError, ValueError, TypeError):
        return str(value)


DRIVERS: dict[str, type[_Driver]] = {
    "scope": Scope,
    "pulse": PulseSource,
    "supply": BusSupply,
    "thermal": ThermalController,
    "handler": Handler,
}


def connect(
    role: str,
    resource: str,
    family: str | None = None,
    *,
    visa_library: str = DEFAULT_VISA_LIBRARY,
    timeout_s: float = 5.0,
    **driver_options: Any,
) -> Any:
    """Open a session to ``resource`` and return the role driver using ``family``'s table.

    ``family`` defaults to ``"<role>-generic"``; it may also be a path to a table file.
    """
    if role not in DRIVERS:
        raise ConfigError(f"unknown instrument role {role!r}; known: {sorted(DRIVERS)}")
    table = load_table(family or f"{role}-generic")
    session = InstrumentSession(resource, visa_library=visa_library, timeout_s=timeout_s)
    try:
        return DRIVERS[role](session, table, **driver_options)
    except Exception:
        session.close()
        raise
