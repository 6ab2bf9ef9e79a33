"""The simulated bench: one TCP SCPI server per instrument on 127.0.0.1.

pyvisa (any backend able to open ``TCPIP0::<host>::<port>::SOCKET``) talks to it exactly as to
a real bench::

    with SimulatedBench(seed=1, clock_speedup=100) as bench:
        resources = bench.resources          # {"scope": "TCPIP0::127.0.0.1::40123::SOCKET", ...}
        bench.faults["scope"].set(delay_s=2.0)

Each server runs in its own thread (``socketserver.ThreadingTCPServer``); messages are lines
terminated by ``"\\n"``; the instruments are the state machines of
:mod:`benchrun.simulator.instruments_sim` (the scope) and
:mod:`benchrun.simulator.instruments_sim_outputs` (the other roles), reading the *same* command
tables as the drivers.

Coupling: when the pulse source fires with its output on, a device in the fixture and the
scope armed, the bench builds the shot condition from the supply's bus voltage, the thermal
controller's temperature, the pulse timing and gate resistance and the selected device, asks
its :class:`CaptureModel` for the digitized channels (the physics model by default, cached per
condition) and stores them in the scope. Time-dependent state (temperature lag, bus charge
and bleeder discharge) runs on an accelerated clock: ``clock_speedup`` simulated seconds per
wall-clock second.
"""

from __future__ import annotations

import contextlib
import socket
import socketserver
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from benchrun.errors import InstrumentError
from benchrun.instruments import scpi
from benchrun.instruments.commands import load_table
from benchrun.simulator.faults import FaultSwitches
from benchrun.simulator.instruments_sim import Block, SimInstrument, SimScope
from benchrun.simulator.instruments_sim_outputs import (
    SIM_CLASSES,
    SimBusSupply,
    SimHandler,
    SimThermalController,
)

ROLES = ("scope", "pulse", "supply", "thermal", "handler")
DEFAULT_FAMILIES = {role: f"{role}-generic" for role in ROLES}

#: Scope input → signal on the simulated fixture (same as the drivers' default map).
DEFAULT_WIRING: dict[int, str] = {
    1: "diode_voltage",
    2: "diode_current",
    3: "switch_voltage",
    4: "gate",
}

#: Fixture electrical values used when the fixture object does not provide them.
DEFAULT_BUS_CAPACITANCE_F = 1.0e-3
DEFAULT_BLEEDER_OHM = 2.0e3


@dataclass(frozen=True)
class ShotCondition:
    """What the fixture sees when the pulse source fires (SI units, kelvin)."""

    serial: str
    bus_voltage_V: float
    temperature_K: float
    first_pulse_s: float
    off_time_s: float
    second_pulse_s: float
    gate_resistance_ohm: float
    #: turn-on gate-drive voltage; None = the simulated switch's own
    gate_drive_V: float | None = None


@dataclass(frozen=True)
class ChannelSetup:
    """One enabled scope input: the fixture signal on it and the scope's settings.

    ``range`` and ``offset`` are in probe units (full scale and centre), ``probe`` the
    configured probe factor (probe units per channel volt).
    """

    channel: int
    signal: str
    range: float
    offset: float
    probe: float


@dataclass(frozen=True)
class AcquisitionSetup:
    """The scope's settings at the moment of the trigger."""

    channels: tuple[ChannelSetup, ...]
    sample_interval_s: float
    record_length: int
    t_start_s: float
    trigger_signal: str
    trigger_level: float
    trigger_slope: str


@dataclass(frozen=True)
class CapturedChannel:
    """ADC codes of one input; channel volts = ``codes * gain + offset``."""

    codes: np.ndarray
    gain: float
    offset: float
    code_min: int
    code_max: int


@dataclass(frozen=True)
class Capture:
    """One single-shot acquisition: channels by scope input, sample k at t_start + k·dt."""

    channels: Mapping[int, CapturedChannel]
    t_start: float
    dt: float


class CaptureModel(Protocol):
    """Turns a shot condition and scope setup into a capture (None: the scope did not trigger)."""

    def capture(self, condition: ShotCondition, setup: AcquisitionSetup,
                catalog: Any, fixture: Any, rng: np.random.Generator) -> Capture | None: ...


#: Shot conditions a simulated bench keeps for inspection (tests); older ones are dropped.
SHOT_HISTORY = 1000


class SimulatedBench:
    """Five simulated SCPI instruments on loopback TCP ports, coupled through one fixture.

    Parameters
    ----------
    catalog
        Devices the handler offers: a mapping ``serial → diode model`` or an object with
        ``serials`` and ``device(serial)`` (a virtual lot); default: the virtual catalogue of
        :mod:`benchrun.simulator.devices`.
    fixture
        The fixture (bus capacitance, load, stray inductance, bleeder); default: the physics
        module's default fixture.
    seed
        Seed of the noise generator (captures are reproducible for a seed and command order).
    clock_speedup
        Simulated seconds per wall-clock second for thermal lag and bus charge/discharge.
    families
        Command table per role (default ``<role>-generic``).
    capture_model
        What the scope captures (default: the physics model).
    wiring
        Scope input → fixture signal (default :data:`DEFAULT_WIRING`).
    """

    def __init__(
        self,
        catalog: Any = None,
        fixture: Any = None,
        seed: int = 0,
        clock_speedup: float = 100.0,
        *,
        families: Mapping[str, str] | None = None,
        capture_model: CaptureModel | None = None,
        wiring: Mapping[int, str] | None = None,
    ) -> None:
        if clock_speedup <= 0:
            raise ValueError("clock_speedup must be > 0")
        self.lock = threading.RLock()
        self.clock_speedup = float(clock_speedup)
        self.rng = np.random.default_rng(seed)
        self.seed = seed
        self.catalog = catalog if catalog is not None else _default_catalog()
        self.fixture = fixture if fixture is not None else _default_fixture()
        self.capture_model = capture_model if capture_model is not None else _physics_model()
        self.wiring = dict(wiring or DEFAULT_WIRING)
        self.families = {**DEFAULT_FAMILIES, **(families or {})}
        self._t0 = time.monotonic()
        self.instruments: dict[str, SimInstrument] = {}
        for index, role in enumerate(ROLES):
            table = load_table(self.families[role])
            if table.role != role:
                raise ValueError(f"family {table.family} is for role {table.role}, not {role}")
            serial = f"SIM{seed % 10000:04d}{index + 1:02d}"
            self.instruments[role] = SIM_CLASSES[role](table, self, serial, FaultSwitches())
        self.faults: dict[str, FaultSwitches] = {r: i.faults for r, i in self.instruments.items()}
        #: the conditions of the last shots fired, at most 2 x SHOT_HISTORY (a bounded record:
        #: a long run on the simulated bench keeps its memory flat); shots_fired counts all
        self.shots: list[ShotCondition] = []
        self.shots_fired = 0
        self._servers: dict[str, _InstrumentServer] = {}
        self._threads: list[threading.Thread] = []
        self._stopping = threading.Event()
        self.resources: dict[str, str] = {}

    # --- lifecycle ------------------------------------------------------------------------

    def start(self, host: str = "127.0.0.1", port_base: int = 0) -> dict[str, str]:
        """Start the five servers; return ``{role: VISA resource string}``.

        ``port_base=0`` picks free ports; otherwise the roles use ``port_base`` …
        ``port_base + 4`` in the order scope, pulse, supply, thermal, handler.
        """
        if self._servers:
            return dict(self.resources)
        self._stopping.clear()
        try:
            for index, role in enumerate(ROLES):
                port = port_base + index if port_base else 0
                server = _InstrumentServer((host, port), self.instruments[role], self._stopping)
                self._servers[role] = server
                thread = threading.Thread(target=server.serve_forever,
                                          kwargs={"poll_interval": 0.05},
                                          name=f"sim-{role}", daemon=True)
                thread.start()
                self._threads.append(thread)
                bound_host, bound_port = server.server_address[:2]
                self.resources[role] = f"TCPIP0::{bound_host}::{bound_port}::SOCKET"
        except OSError as exc:
            self.stop()
            raise InstrumentError(f"cannot start the simulated bench on {host}: {exc}") from exc
        return dict(self.resources)

    def stop(self) -> None:
        """Stop every server and close every open connection."""
        self._stopping.set()
        for server in self._servers.values():
            server.shutdown()
            server.close_connections()
            server.server_close()
        for thread in self._threads:
            thread.join(timeout=2.0)
        self._servers.clear()
        self._threads.clear()
        self.resources = {}

    def __enter__(self) -> SimulatedBench:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # --- accessors ----------------------------------------------------------------------------

    @property
    def scope(self) -> SimScope:
        return self.instruments["scope"]  # type: ignore[return-value]

    @property
    def supply(self) -> SimBusSupply:
        return self.instruments["supply"]  # type: ignore[return-value]

    @property
    def thermal(self) -> SimThermalController:
        return self.instruments["thermal"]  # type: ignore[return-value]

    @property
    def handler(self) -> SimHandler:
        return self.instruments["handler"]  # type: ignore[return-value]

    # --- BenchLink ----------------------------------------------------------------------------

    def now(self) -> float:
        """Simulated seconds since the bench was created."""
        return (time.monotonic() - self._t0) * self.clock_speedup

    def device_serials(self) -> list[str]:
        return _catalog_serials(self.catalog)

    def device_identity(self, serial: str) -> tuple[str, str] | None:
        """(part number, lot) of ``serial`` from a virtual lot or catalogue (None for a
        plain mapping of serials to models, which names neither)."""
        return catalog_identity(self.catalog, serial)

    def bus_capacitance(self) -> float:
        return float(_fixture_value(self.fixture, ("bus_capacitance_F", "bus_capacitance",
                                                   "c_bus_F"), DEFAULT_BUS_CAPACITANCE_F))

    def bleeder_ohm(self) -> float:
        return float(_fixture_value(self.fixture, ("bleeder_ohm", "bleeder_resistance_ohm",
                                                   "r_bleeder_ohm"), DEFAULT_BLEEDER_OHM))

    def fire(self, timing: tuple[float, float, float], gate_resistance_ohm: float,
             drive_V: float | None = None) -> str | None:
        """The pulse source fired: run the shot and fill the scope if it was armed."""
        serial = self.handler.selected
        if serial is None:
            return "no device in fixture"
        condition = ShotCondition(
            serial=serial,
            bus_voltage_V=self.supply.bus_voltage(),
            temperature_K=self.thermal.temperature(),
            first_pulse_s=timing[0],
            off_time_s=timing[1],
            second_pulse_s=timing[2],
            gate_resistance_ohm=gate_resistance_ohm,
            gate_drive_V=drive_V,
        )
        self.shots.append(condition)
        self.shots_fired += 1
        if len(self.shots) > 2 * SHOT_HISTORY:
            del self.shots[:SHOT_HISTORY]
        scope = self.scope
        if not scope.armed or scope.faults.state.no_trigger:
            return None
        setup = self.acquisition_setup()
        capture = self.capture_model.capture(condition, setup, self.catalog, self.fixture,
                                             self.rng)
        if capture is None:
            return None
        for ch, data in capture.channels.items():
            scope.store_trace(ch, data.codes, data.gain, data.offset, data.code_min,
                              data.code_max, capture.t_start, capture.dt)
        scope.complete_acquisition()
        return None

    def acquisition_setup(self) -> AcquisitionSetup:
        """The scope's current settings as the capture model sees them."""
        scope = self.scope
        channels = tuple(
            ChannelSetup(ch, self.wiring.get(ch, f"input{ch}"), s.range, s.offset, s.probe)
            for ch, s in sorted(scope.channels.items()) if s.display
        )
        return AcquisitionSetup(
            channels=channels,
            sample_interval_s=scope.sample_interval,
            record_length=scope.record_length,
            t_start_s=scope.t_start,
            trigger_signal=self.wiring.get(scope.trigger_channel, f"input{scope.trigger_channel}"),
            trigger_level=scope.trigger_level,
            trigger_slope=scope.trigger_slope,
        )


# --- TCP plumbing --------------------------------------------------------------------------------


class _InstrumentServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True
    block_on_close = False

    def __init__(self, address: tuple[str, int], instrument: SimInstrument,
                 stopping: threading.Event) -> None:
        self.instrument = instrument
        self.stopping = stopping
        self._connections: set[socket.socket] = set()
        self._conn_lock = threading.Lock()
        super().__init__(address, _ConnectionHandler)

    def track(self, sock: socket.socket, add: bool) -> None:
        with self._conn_lock:
            (self._connections.add if add else self._connections.discard)(sock)

    def close_connections(self) -> None:
        with self._conn_lock:
            connections = list(self._connections)
        for sock in connections:
            _hard_close(sock)


def _hard_close(sock: socket.socket) -> None:
    with contextlib.suppress(OSError):  # already closed by the peer
        sock.shutdown(socket.SHUT_RDWR)
    sock.close()


class _ConnectionHandler(socketserver.BaseRequestHandler):
    server: _InstrumentServer

    def handle(self) -> None:
        sock: socket.socket = self.request
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.server.track(sock, True)
        instrument = self.server.instrument
        buffer = bytearray()
        try:
            while not self.server.stopping.is_set():
                try:
                    chunk = sock.recv(65536)
                except OSError:
                    return
                if not chunk:
                    return
                buffer += chunk
                while b"\n" in buffer:
                    line, _, rest = bytes(buffer).partition(b"\n")
                    buffer = bytearray(rest)
                    if not self._serve_line(sock, instrument, line):
                        return
        finally:
            self.server.track(sock, False)

    def _serve_line(self, sock: socket.socket, instrument: SimInstrument, line: bytes) -> bool:
        """Answer one message; False when the connection is to be dropped."""
        faults = instrument.faults
        if faults.take_drop():
            _hard_close(sock)
            return False
        answers = instrument.handle(line.decode("ascii", errors="replace").strip())
        if not answers:
            return True
        state = faults.state
        if state.delay_s > 0 and self.server.stopping.wait(state.delay_s):
            return False
        try:
            _send_answers(sock, answers, state.garble_block_header, state.truncate_block)
        except OSError:
            return False
        return True


def _send_answers(sock: socket.socket, answers: list[str | Block], garble: bool,
                  truncate: bool) -> None:
    texts: list[str] = []
    for answer in answers:
        if isinstance(answer, Block):
            if texts:
                sock.sendall((";".join(texts) + "\n").encode("ascii"))
                texts = []
            header = scpi.block_header(len(answer.payload))
            if garble:
                header = b"#X" + header[2:]
            if truncate:
                sock.sendall(header + bytes(answer.payload[: len(answer.payload) // 2]))
                continue  # the rest never comes
            sock.sendall(header)
            sock.sendall(answer.payload)
            if answer.terminator:
                sock.sendall(b"\n")
        else:
            texts.append(answer)
    if texts:
        sock.sendall((";".join(texts) + "\n").encode("ascii"))


# --- catalogue and fixture adapters --------------------------------------------------------------


def _catalog_serials(catalog: Any) -> list[str]:
    if isinstance(catalog, Mapping):
        return [str(s) for s in catalog]
    serials = getattr(catalog, "serials", None)
    if callable(serials):
        serials = serials()
    if serials is not None:
        return [str(s) for s in serials]
    lots = getattr(catalog, "lots", None)  # a VirtualCatalog: every lot's serials
    if isinstance(lots, Mapping):
        return [str(s) for lot in lots.values() for s in lot.serials]
    raise TypeError("catalog must be a mapping serial → device, a lot or a catalogue")


def catalog_identity(catalog: Any, serial: str) -> tuple[str, str] | None:
    """(part number, lot id) of ``serial``: from the lot holding it in a catalogue with
    ``lot_of``, from a lot itself (``lot_id`` and ``part``); None otherwise."""
    lot_of = getattr(catalog, "lot_of", None)
    lot = lot_of(serial) if callable(lot_of) else catalog
    part = getattr(getattr(lot, "part", None), "name", None)
    lot_id = getattr(lot, "lot_id", None)
    if part is None or lot_id is None:
        return None
    return str(part), str(lot_id)


def catalog_device(catalog: Any, serial: str) -> Any:
    """The diode model of ``serial`` in ``catalog`` (mapping or object with ``device()``)."""
    if isinstance(catalog, Mapping):
        return catalog[serial]
    device: Callable[[str], Any] = catalog.device
    return device(serial)


def _fixture_value(fixture: Any, names: tuple[str, ...], default: float) -> float:
    for name in names:
        value = getattr(fixture, name, None)
        if value is not None:
            return float(value)
    return default


def _default_catalog() -> Any:
    from benchrun.simulator import devices

    return devices.load_virtual_parts()


def _default_fixture() -> Any:
    from benchrun.simulator import physics

    return physics.Fixture()


def _physics_model() -> CaptureModel:
    from benchrun.simulator.capture import PhysicsCaptureModel

    return PhysicsCaptureModel()
