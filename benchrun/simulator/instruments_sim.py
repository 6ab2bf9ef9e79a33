"""State machines of the simulated instruments, driven by their command tables.

Each instrument receives one program message (a line), splits it into message units at
``;``, matches every unit against its family's command table
(:meth:`~benchrun.instruments.commands.CommandTable.match`) and runs the operation of that
name. Errors go to a real SCPI error queue (SCPI-1999 Vol. 2 §21.8): ``-113`` undefined
header, ``-224`` illegal parameter value, ``-222`` data out of range, ``-221`` settings
conflict, ``-350`` queue overflow; the matching IEEE 488.2 event status bits are set
(command error 0x20, execution error 0x10, device-dependent 0x08, query error 0x04).

The instruments share a :class:`BenchLink` (implemented by the simulated bench) that gives
them the accelerated clock and the coupled state: the supply's bus voltage, the thermal
controller's temperature, the handler's selected device and the scope's capture when the
pulse source fires.
"""

from __future__ import annotations

import inspect
import threading
from collections import deque
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from benchrun.instruments import scpi
from benchrun.instruments.commands import CommandSpec, CommandTable, WaveformSpec
from benchrun.instruments.expressions import evaluate
from benchrun.simulator.faults import FaultSwitches

ERROR_QUEUE_LENGTH = 16

ESR_OPC = 0x01
ESR_QUERY_ERROR = 0x04
ESR_DEVICE_ERROR = 0x08
ESR_EXECUTION_ERROR = 0x10
ESR_COMMAND_ERROR = 0x20


@dataclass(frozen=True)
class Block:
    """A binary block answer: header + payload (+ ``"\\n"``) sent without copying."""

    payload: memoryview
    terminator: bool


#: dispatch() result of a query that has no answer (an error was queued instead)
_NO_ANSWER = object()


class BenchLink(Protocol):
    """What instruments need from the bench they sit on."""

    lock: threading.RLock

    def now(self) -> float:
        """Simulated seconds since the bench started (accelerated clock)."""
        ...

    def fire(self, timing: tuple[float, float, float], gate_resistance_ohm: float,
             drive_V: float | None = None) -> str | None:
        """The pulse source fired; returns a reason string when nothing could happen."""
        ...

    def device_serials(self) -> list[str]: ...

    def device_identity(self, serial: str) -> tuple[str, str] | None: ...

    def bus_capacitance(self) -> float: ...

    def bleeder_ohm(self) -> float: ...


class SimInstrument:
    """Common IEEE 488.2 behaviour; subclasses add ``op_<command name>`` methods."""

    role = ""

    def __init__(self, table: CommandTable, bench: BenchLink, serial: str,
                 faults: FaultSwitches | None = None) -> None:
        self.table = table
        self.bench = bench
        self.serial = serial
        self.faults = faults or FaultSwitches()
        self.errors: deque[tuple[int, str]] = deque()
        self.esr = 0
        self.reset_state()

    # --- message handling -----------------------------------------------------------------

    def handle(self, message: str) -> list[str | Block]:
        """Process one program message; return the answers of its queries in order."""
        answers: list[str | Block] = []
        with self.bench.lock:
            for code, detail in self.faults.take_pending_errors():
                self.push_error(code, detail)
            for unit in scpi.split_units(message):
                unit = unit.strip()
                if not unit:
                    continue
                answer = self._handle_unit(unit)
                if answer is not None:
                    answers.append(answer)
        return answers

    def _handle_unit(self, unit: str) -> str | Block | None:
        try:
            found = self.table.match(unit)
        except (ValueError, KeyError, ZeroDivisionError) as exc:
            self.push_error(-224, f"{unit}: {exc}")
            return None
        if found is None:
            self.push_error(-113, unit.split()[0][:40])
            return None
        spec, values = found
        for name, (low, high) in spec.limits.items():
            v = values.get(name)
            if isinstance(v, int | float) and not low <= v <= high:
                self.push_error(-222, f"{name} {v:g} outside [{low:g}, {high:g}]")
                return None
        result = self.dispatch(spec.name, values)
        if not spec.is_query or result is _NO_ANSWER:
            return None
        if isinstance(result, Block):
            return result
        return self._format_answer(spec, result)

    def dispatch(self, name: str, values: dict[str, Any]) -> Any:
        """Run operation ``name`` (method ``op_<name>``) with the parameters it takes; a
        read-back query ``<setting>?`` is answered by ``read_<setting>`` (driver-level values
        of the setting as the instrument holds it)."""
        spec = self.table.commands.get(name)
        if spec is not None and spec.setting is not None:
            reader = getattr(self, f"read_{spec.setting}", None)
            if reader is None:
                self.push_error(-113, f"{spec.send}: not simulated")
                return _NO_ANSWER
            wanted = inspect.signature(reader).parameters
            return reader(**{k: v for k, v in values.items() if k in wanted})
        handler = getattr(self, f"op_{name}", None)
        if handler is None:  # a command this family declares that needs no simulated effect
            return None
        wanted = inspect.signature(handler).parameters
        return handler(**{k: v for k, v in values.items() if k in wanted})

    def _format_answer(self, spec: CommandSpec, value: Any) -> str:
        if spec.returns == "error":
            return str(value)
        return self.table.format_reply(spec.name, value)

    def push_error(self, code: int, detail: str = "") -> None:
        """Add an entry to the error queue and set the matching event status bit."""
        if -199 <= code <= -100:
            self.esr |= ESR_COMMAND_ERROR
        elif -299 <= code <= -200:
            self.esr |= ESR_EXECUTION_ERROR
        elif -499 <= code <= -400:
            self.esr |= ESR_QUERY_ERROR
        else:
            self.esr |= ESR_DEVICE_ERROR
        if len(self.errors) >= ERROR_QUEUE_LENGTH - 1:
            if len(self.errors) == ERROR_QUEUE_LENGTH - 1:
                self.errors.append((-350, scpi.SCPI_ERRORS[-350]))
            return
        self.errors.append((code, detail))

    # --- IEEE 488.2 common commands ----------------------------------------------------------

    def reset_state(self) -> None:
        """``*RST`` state of the instrument (subclasses extend)."""

    def op_identify(self) -> str:
        ident = self.table.simulated_identity
        fields = scpi.IdnFields(ident.get("manufacturer", "BENCHRUN-SIM"),
                                ident.get("model", self.role.upper()), self.serial,
                                ident.get("firmware", "0"))
        values = {"manufacturer": fields.manufacturer, "model": fields.model,
                  "serial": fields.serial, "firmware": fields.firmware}
        return ",".join(values[k] for k in self.table.idn_order)

    def op_reset(self) -> None:
        self.reset_state()

    def op_clear_status(self) -> None:
        self.errors.clear()
        self.esr = 0

    def op_operation_complete(self) -> int:
        return 1

    def op_event_status(self) -> int:
        value, self.esr = self.esr, 0
        return value

    def op_next_error(self) -> str:
        if not self.errors:
            return scpi.format_error_entry(0)
        code, detail = self.errors.popleft()
        return scpi.format_error_entry(code, detail)


# --- scope -------------------------------------------------------------------------------------


@dataclass
class ChannelSetting:
    display: bool = False
    range: float = 8.0
    offset: float = 0.0
    probe: float = 1.0
    coupling: str = "dc"


@dataclass(frozen=True)
class Trace:
    """One stored channel in the family's wire encoding."""

    data: np.ndarray  # family dtype, ready to send
    gain: float  # probe units per code
    offset: float  # probe units
    t_start: float
    dt: float


def encode_for_family(codes: np.ndarray, gain: float, offset: float, code_min: int,
                      code_max: int, wf: WaveformSpec) -> tuple[np.ndarray, float, float]:
    """Map ADC codes onto a family's code range and dtype, keeping volts unchanged.

    ``volts = codes*gain + offset`` before and ``family_codes*gain_f + offset_f`` after; the
    ADC limits ``code_min``/``code_max`` land on the family's ``code_min`` and (for an
    integer step) ``code_max``.
    """
    span_src = max(code_max - code_min, 1)
    span_fam = wf.code_max - wf.code_min
    step = span_fam // span_src if span_fam >= span_src else span_fam / span_src
    src = np.asarray(codes, dtype=np.int64)
    if isinstance(step, int):
        fam = (src - code_min) * step + wf.code_min
    else:
        fam = np.rint((src - code_min) * step).astype(np.int64) + wf.code_min
    fam = np.clip(fam, wf.code_min, wf.code_max).astype(wf.numpy_dtype)
    gain_f = gain / step
    offset_f = offset + gain * code_min - gain_f * wf.code_min
    return fam, float(gain_f), float(offset_f)


class SimScope(SimInstrument):
    """Single-shot digitizing scope; captures what the bench produces when the pulse fires."""

    role = "scope"

    def reset_state(self) -> None:
        n = max(self.table.channels, 4)
        self.channels = {ch: ChannelSetting(display=(ch == 1)) for ch in range(1, n + 1)}
        self.sample_interval = 1e-9
        self.record_length = 10_000
        self.t_start = 0.0
        self.trigger_channel = 1
        self.trigger_level = 0.0
        self.trigger_slope = "rising"
        self.armed = False
        self.done = False
        self.traces: dict[int, Trace] = {}
        self.source = 1

    def op_channel_display(self, channel: int, state: bool) -> None:
        self.channels[channel].display = state

    def op_channel_range(self, channel: int, range: float) -> None:
        self.channels[channel].range = range

    def op_channel_offset(self, channel: int, offset: float) -> None:
        self.channels[channel].offset = offset

    def op_channel_probe(self, channel: int, factor: float) -> None:
        self.channels[channel].probe = factor

    def op_channel_coupling(self, channel: int, coupling: str) -> None:
        self.channels[channel].coupling = coupling

    def read_channel_display(self, channel: int) -> dict[str, Any]:
        return {"state": self.channels[channel].display}

    def read_channel_coupling(self, channel: int) -> dict[str, Any]:
        return {"coupling": self.channels[channel].coupling}

    def read_channel_range(self, channel: int) -> dict[str, Any]:
        return {"range": self.channels[channel].range}

    def read_channel_offset(self, channel: int) -> dict[str, Any]:
        return {"offset": self.channels[channel].offset}

    def read_channel_probe(self, channel: int) -> dict[str, Any]:
        return {"factor": self.channels[channel].probe}

    def read_sample_interval(self) -> dict[str, Any]:
        return {"interval": self.sample_interval}

    def read_record_length(self) -> dict[str, Any]:
        return {"points": self.record_length}

    def read_time_start(self) -> dict[str, Any]:
        return {"t_start": self.t_start}

    def read_trigger_source(self) -> dict[str, Any]:
        return {"channel": self.trigger_channel}

    def read_trigger_level(self) -> dict[str, Any]:
        return {"level": self.trigger_level}

    def read_trigger_slope(self) -> dict[str, Any]:
        return {"slope": self.trigger_slope}

    def op_abort(self) -> None:
        self.armed = False

    def op_sample_interval(self, interval: float) -> None:
        self.sample_interval = interval

    def op_record_length(self, points: int) -> None:
        self.record_length = points

    def op_time_start(self, t_start: float) -> None:
        self.t_start = t_start

    def op_trigger_source(self, channel: int) -> None:
        self.trigger_channel = channel

    def op_trigger_level(self, level: float) -> None:
        self.trigger_level = level

    def op_trigger_slope(self, slope: str) -> None:
        self.trigger_slope = slope

    def op_arm_single(self) -> None:
        self.armed = True
        self.done = False

    def op_acquisition_done(self) -> bool:
        return self.done

    def op_waveform_source(self, channel: int) -> None:
        self.source = channel

    def _trace(self, channel: int | None) -> Trace | None:
        ch = self.source if channel is None else channel
        trace = self.traces.get(ch)
        if trace is None:
            self.push_error(-221, f"no data on channel {ch}")
        return trace

    def op_waveform_data(self, channel: int | None = None) -> Block | str:
        trace = self._trace(channel)
        wf = self.table.waveform
        assert wf is not None
        data = trace.data if trace is not None else np.zeros(0, dtype=wf.numpy_dtype)
        return Block(memoryview(data).cast("B"), wf.terminator_after_block)

    def _scaling(self, key: str, channel: int | None) -> Any:
        trace = self._trace(channel)
        wf = self.table.waveform
        assert wf is not None
        fields = wf.scaling_names(key)
        if trace is None:
            values = [0.0] * len(fields)
        else:
            names = {**self.table.constants, "gain": trace.gain, "offset": trace.offset,
                     "dt": trace.dt, "t_start": trace.t_start}
            values = [evaluate(wf.simulated[f], names) for f in fields]
        if key in wf.scaling_fields:
            return [scpi.format_value(float(v)) for v in values]
        return values[0]

    def dispatch(self, name: str, values: dict[str, Any]) -> Any:
        # scaling queries are named by the table: answer each from its `simulated`
        # expression(s), except a setting read back (answered from the setting)
        wf = self.table.waveform
        assert wf is not None
        for key, command in wf.scaling_queries.items():
            if name == command and self.table.commands[name].setting is None:
                return self._scaling(key, values.get("channel"))
        return super().dispatch(name, values)

    def store_trace(self, channel: int, codes: np.ndarray, gain: float, offset: float,
                    code_min: int, code_max: int, t_start: float, dt: float) -> None:
        """Keep one acquired channel (channel-input codes with volts = codes*gain+offset)."""
        wf = self.table.waveform
        assert wf is not None
        probe = self.channels[channel].probe
        data, gain_f, offset_f = encode_for_family(codes, gain * probe, offset * probe,
                                                   code_min, code_max, wf)
        self.traces[channel] = Trace(data, gain_f, offset_f, t_start, dt)

    def complete_acquisition(self) -> None:
        self.armed = False
        self.done = True


# --- pulse source ------------------------------------------------------------------------------
