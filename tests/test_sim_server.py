"""The simulated bench through a real VISA stack (pyvisa + pyvisa-py ``@py``) on loopback TCP.

Outside references: SCPI-1999 Vol. 2 §21.8 error codes (-113 undefined header, -222 data out
of range, -224 illegal parameter value) and IEEE 488.2-1992 §11.5.1 event status bits (command
error 0x20, execution error 0x10) — section numbers from memory; first-order step response
``1 - exp(-t/tau)`` and RC discharge ``V0·exp(-t/RC)`` (circuit theory textbooks).
"""

from __future__ import annotations

import itertools
import math
import types

import numpy as np
import pytest

from benchrun.errors import (
    ConnectionLost,
    InstrumentReportedError,
    InstrumentTimeout,
    ProtocolError,
)
from benchrun.instruments.roles import connect
from benchrun.instruments.session import InstrumentSession
from benchrun.simulator.capture import PatternCaptureModel
from benchrun.simulator.server import SimulatedBench

FIXTURE = types.SimpleNamespace(bus_capacitance_F=1e-3, bleeder_resistance_ohm=2e3)
CATALOG = {"K-0001": None, "K-0002": None}
#: I/O timeout of the sessions: generous, so that a loaded machine never turns a slow answer
#: into a timeout (a healthy answer takes milliseconds; a dropped connection is seen at once)
TIMEOUT_S = 10.0
#: Timeout of the one session that is meant to time out (a late answer, a truncated block)
SHORT_TIMEOUT_S = 0.3
#: Waits for a trigger that must come (return as soon as it does)
TRIGGER_WAIT_S = 30.0

SCOPE_CHANNELS = {"diode_voltage": (1600.0, -200.0, 100.0),
                  "diode_current": (400.0, 0.0, 50.0),
                  "gate": (40.0, 0.0, 10.0)}


def _bench(scope_family: str = "scope-generic") -> SimulatedBench:
    return SimulatedBench(catalog=CATALOG, fixture=FIXTURE, capture_model=PatternCaptureModel(),
                          clock_speedup=1000.0, families={"scope": scope_family})


@pytest.fixture(scope="module")
def bench():
    with _bench() as b:
        yield b


@pytest.fixture
def drivers(bench):
    for switches in bench.faults.values():
        switches.clear()
    opened = {role: connect(role, res, timeout_s=TIMEOUT_S) for role, res in
              bench.resources.items()}
    for d in opened.values():
        d.reset()
    yield opened
    for switches in bench.faults.values():
        switches.clear()
    for d in opened.values():
        d.session.close()


def _prepare_shot(d, first=50e-6, gap=5e-6, second=5e-6):
    d["handler"].select("K-0002")
    d["supply"].set_current_limit(5.0)
    d["supply"].set_voltage(600.0)
    d["supply"].output(True)
    d["pulse"].configure(first, gap, second)
    d["pulse"].set_gate_resistance(10.0)
    d["pulse"].output(True)
    d["scope"].configure(SCOPE_CHANNELS, 1e-9, 20_000, first + gap - 1e-6, "gate", 5.0)


def _wait_bus(supply, volts, limit=200):
    for _ in range(limit):
        if supply.measure_voltage() >= volts - 1e-6:
            return
    raise AssertionError("bus did not charge")


def test_identify_every_instrument(drivers, bench):
    for role, d in drivers.items():
        ident = d.identity()
        assert ident.manufacturer == "BENCHRUN-SIM"
        assert ident.serial == bench.instruments[role].serial
        assert ident.resource == bench.resources[role]
        assert ident.resource.startswith("TCPIP0::127.0.0.1::") and ident.resource.endswith(
            "::SOCKET")


@pytest.mark.parametrize("family", ["scope-generic", "scope-alt"])
def test_shot_codes_arrive_unchanged_for_both_families(family):
    with _bench(family) as b:
        d = {role: connect(role, res, family if role == "scope" else None, timeout_s=TIMEOUT_S)
             for role, res in b.resources.items()}
        _prepare_shot(d)
        _wait_bus(d["supply"], 600.0)
        d["scope"].arm_single()
        d["pulse"].fire()
        assert d["scope"].wait_triggered(TRIGGER_WAIT_S)
        traces = d["scope"].read_channels(["diode_voltage", "diode_current"])
        # the same samples computed directly from the pattern, quantised by the same ADC rule
        setup = b.acquisition_setup()
        model = PatternCaptureModel()
        expected = model.capture(b.shots[-1], setup, None, None, np.random.default_rng(0))
        for name, ch in (("diode_voltage", 1), ("diode_current", 2)):
            tr = traces[name]
            ref = expected.channels[ch]
            assert len(tr.codes) == 20_000
            probe = SCOPE_CHANNELS[name][2]
            np.testing.assert_allclose(tr.volts() * probe,
                                       (ref.codes * ref.gain + ref.offset) * probe,
                                       rtol=0, atol=1e-9 * probe)
        assert traces["diode_current"].dt == pytest.approx(1e-9)
        assert traces["diode_current"].t_start == pytest.approx(54e-6)
        # freewheeling current before the second turn-on: V·t1/L = 600·50e-6/200e-6 = 150 A
        i = traces["diode_current"].volts()[:500] * 50.0
        assert np.median(i) == pytest.approx(150.0, abs=400.0 / 255)
        for drv in d.values():
            drv.session.close()


def test_scpi_error_queue_and_event_status(bench):
    session = InstrumentSession(bench.resources["supply"], timeout_s=TIMEOUT_S)
    try:
        session.write("*CLS")
        session.write("SOURce:BOGus 1")
        session.write("SOURce:VOLTage:LEVel abc")
        session.write("SOURce:VOLTage:LEVel 5000")
        assert session.query("*ESR?") == str(0x20 | 0x10)
        entries = [session.query("SYSTem:ERRor?") for _ in range(4)]
        assert [e.split(",")[0] for e in entries] == ["-113", "-224", "-222", "0"]
        assert entries[3] == '0,"No error"'
        session.write("SOURce:BOGus 1")
        session.write("*CLS")
        assert session.query("SYSTem:ERRor?") == '0,"No error"'
        # several message units in one line, answers joined with ';'
        assert session.query("OUTPut:STATe?;MEASure:CURRent:DC?").split(";")[0] in ("0", "1")
    finally:
        session.close()


def test_bleeder_discharge_follows_rc(drivers, bench):
    supply = drivers["supply"]
    supply.set_current_limit(5.0)
    supply.set_voltage(600.0)
    supply.output(True)
    _wait_bus(supply, 600.0)
    supply.output(False)
    assert supply.is_output_on() is False
    readings = [supply.measure_voltage() for _ in range(5)]
    assert readings[0] <= 600.0
    assert all(b <= a for a, b in itertools.pairwise(readings))
    # V(t0 + RC) = V0/e (RC discharge), on the simulated clock
    sim = bench.supply
    t0 = bench.now()
    v0 = sim.bus_voltage(t0)
    rc = FIXTURE.bus_capacitance_F * FIXTURE.bleeder_resistance_ohm
    assert sim.bus_voltage(t0 + rc) == pytest.approx(v0 / math.e, rel=1e-9)


def test_thermal_first_order_lag(drivers, bench):
    thermal = drivers["thermal"]
    thermal.set_temperature(398.15)
    thermal.output(True)
    # *OPC? answered on the same connection: the server has run both commands, so the state
    # read below is the one they set (whatever the driver does after a write)
    thermal.operation_complete()
    sim = bench.thermal
    t0 = bench.now()
    T0 = sim.temperature(t0)
    # step response of a first-order lag: 1 - 1/e of the step after one time constant
    assert sim.temperature(t0 + sim.tau_s) == pytest.approx(
        398.15 + (T0 - 398.15) / math.e, rel=1e-9)
    assert thermal.setpoint() == pytest.approx(398.15)
    first = thermal.measure_temperature()
    later = thermal.measure_temperature()
    assert T0 - 0.01 <= first <= later + 1e-3 <= 398.15 + 1e-3
    thermal.output(False)


# --- faults: every one ends in a clear benchrun error or a successful retry, never a hang -----


def test_delayed_answer_times_out_then_session_recovers(drivers, bench):
    supply = drivers["supply"]
    supply.session.timeout_s = SHORT_TIMEOUT_S
    bench.faults["supply"].set(delay_s=3 * SHORT_TIMEOUT_S)  # cannot arrive in time, any load
    with pytest.raises(InstrumentTimeout, match="no answer"):
        supply.measure_voltage()
    bench.faults["supply"].clear()
    supply.session.timeout_s = TIMEOUT_S
    # the late answer must not be taken for the next one: the session reopened
    assert supply.is_output_on() is False
    assert supply.session.reconnects >= 1


def test_dropped_connection_is_retried_once(drivers, bench):
    handler = drivers["handler"]
    bench.faults["handler"].set(drop_connections=1)
    assert handler.list_devices() == ["K-0001", "K-0002"]
    assert handler.session.reconnects == 1


def test_connection_that_keeps_dropping_is_connection_lost(drivers, bench):
    bench.faults["handler"].set(drop_connections=-1)
    with pytest.raises(ConnectionLost):
        drivers["handler"].list_devices()


def test_setting_swallowed_by_a_drop_is_sent_again(drivers, bench):
    bench.faults["supply"].set(drop_connections=1)
    drivers["supply"].set_voltage(321.0)  # the write is lost, the error query finds the drop
    assert bench.supply.setpoint == 321.0


def test_fire_is_never_repeated_after_a_drop(drivers, bench):
    _prepare_shot(drivers)
    shots = bench.instruments["pulse"].shots
    bench.faults["pulse"].set(drop_connections=1)
    drivers["pulse"].fire()  # swallowed by the drop
    drivers["pulse"].output(False)  # must still go through
    # the query confirms (or, after reconnecting, repeats) the output-off write
    assert drivers["pulse"].is_output_on() is False
    assert bench.instruments["pulse"].shots == shots
    assert drivers["pulse"].session.unconfirmed_lost == ["INITiate:IMMediate"]


def test_garbled_block_header_is_protocol_error(drivers, bench):
    _prepare_shot(drivers)
    _wait_bus(drivers["supply"], 600.0)
    drivers["scope"].arm_single()
    drivers["pulse"].fire()
    assert drivers["scope"].wait_triggered(TRIGGER_WAIT_S)
    bench.faults["scope"].set(garble_block_header=True)
    with pytest.raises(ProtocolError, match="digit"):
        drivers["scope"].read_channel("diode_current")
    bench.faults["scope"].set(garble_block_header=False, truncate_block=True)
    # the rest of the block never comes: only the timeout ends the read (kept short here;
    # the header and the first half arrive long before it)
    drivers["scope"].session.timeout_s = 1.0
    with pytest.raises(ProtocolError, match="truncated"):
        drivers["scope"].read_channel("diode_current")
    drivers["scope"].session.timeout_s = TIMEOUT_S
    bench.faults["scope"].clear()
    assert len(drivers["scope"].read_channel("diode_current").codes) == 20_000


def test_injected_error_entries_surface_after_configuring(drivers, bench):
    bench.faults["pulse"].inject_errors([(-222, "second pulse too long"), (-200, "driver hot")])
    with pytest.raises(InstrumentReportedError, match="-222") as info:
        drivers["pulse"].configure(10e-6, 5e-6, 3e-6)
    assert [code for code, _ in info.value.entries] == [-222, -200]
    drivers["pulse"].configure(10e-6, 5e-6, 3e-6)  # queue drained: no error now


def test_no_trigger(drivers, bench):
    _prepare_shot(drivers)
    bench.faults["scope"].set(no_trigger=True)
    drivers["scope"].arm_single()
    drivers["pulse"].fire()
    assert drivers["scope"].wait_triggered(0.05) is False


def test_trigger_level_never_crossed_gives_no_capture(drivers, bench):
    _prepare_shot(drivers)
    drivers["scope"].configure(SCOPE_CHANNELS, 1e-9, 1000, 0.0, "gate", 30.0)
    drivers["scope"].arm_single()
    drivers["pulse"].fire()
    assert drivers["scope"].wait_triggered(0.05) is False


def test_fire_without_device_or_output_is_reported(drivers):
    drivers["pulse"].output(True)
    drivers["pulse"].fire()
    errors = drivers["pulse"].drain_errors()
    assert errors and errors[0][0] == -221 and "no device" in errors[0][1]


def test_thermal_controller_that_never_settles(drivers, bench):
    bench.faults["thermal"].set(thermal_no_settle=True)
    sim = bench.thermal
    t = bench.now()
    values = [sim.temperature(t + k * 5.0) for k in range(8)]
    assert max(values) - min(values) > 4.0  # well outside any stability tolerance
    before = bench.now()
    measured = drivers["thermal"].measure_temperature()
    span = [sim.temperature(x) for x in np.linspace(before, bench.now(), 200)]
    assert min(span) - 0.01 <= measured <= max(span) + 0.01


def test_unknown_fault_switch_is_refused(bench):
    with pytest.raises(ValueError, match="unknown fault"):
        bench.faults["scope"].set(explode=True)


def test_unreachable_instrument_is_connection_lost():
    with SimulatedBench(catalog=CATALOG, fixture=FIXTURE,
                        capture_model=PatternCaptureModel()) as b:
        resource = b.resources["handler"]
    with pytest.raises(ConnectionLost, match="cannot open"):
        connect("handler", resource, timeout_s=TIMEOUT_S)


def test_sim_command_prints_resources(capsys):
    import argparse
    import threading

    from benchrun.commands import sim

    stop = threading.Event()
    args = argparse.Namespace(host="127.0.0.1", port_base=0, seed=0, clock_speedup=100.0)
    thread = threading.Thread(target=sim.run, args=(args, stop))
    thread.start()
    stop.set()
    thread.join(timeout=60)
    assert not thread.is_alive()
    out = capsys.readouterr().out
    for role in ("scope", "pulse", "supply", "thermal", "handler"):
        assert f"{role}" in out
    assert out.count("::SOCKET") == 5
