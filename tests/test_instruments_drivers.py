"""Role drivers: the exact SCPI strings each call sends, per family (recording fake session).

The expected strings are the command tables' dialects (SCPI-1999 subsystems plus headers of our
own, see tests/test_instruments_dialects.py); IEEE 488.2 common commands (*IDN?, *RST, *CLS,
*OPC?) per IEEE 488.2-1992 §10.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchrun.errors import InstrumentReportedError, ProtocolError
from benchrun.instruments import scpi
from benchrun.instruments.roles import (
    BusSupply,
    Handler,
    InstrumentIdentity,
    PulseSource,
    Scope,
    ThermalController,
)


class RecordingSession:
    """Stands in for InstrumentSession: records what is sent, answers from a script."""

    resource = "TCPIP0::fake::1::SOCKET"

    def __init__(self, answers=None, blocks=None):
        self.sent: list[str] = []
        self.retry_flags: dict[str, bool] = {}
        self.answers = {"*OPC?": ["1"]}
        for key, value in (answers or {}).items():
            self.answers[key] = list(value) if isinstance(value, list) else [value]
        self.blocks = blocks or {}

    def write(self, command, *, retry=True):
        self.sent.append(command)
        self.retry_flags[command] = retry

    def query(self, command, *, retry=True):
        self.sent.append(command)
        if command.startswith("SYST"):
            queue = self.answers.get(command, [])
            return queue.pop(0) if queue else '0,"No error"'
        queue = self.answers[command]
        return queue.pop(0) if len(queue) > 1 else queue[0]

    def query_block(self, command, *, terminator, retry=True):
        self.sent.append(command)
        self.last_terminator = terminator
        return self.blocks[command]


CONFIG = {
    "channels": {"diode_voltage": (1600.0, -200.0, 100.0), "diode_current": (100.0, 0.0, 50.0)},
    "sample_interval_s": 5e-10,
    "record_length": 8000,
    "t_start_s": 1.45e-5,
    "trigger_source": "gate",
    "trigger_level": 7.5,
}


def test_scope_generic_configure_strings():
    session = RecordingSession()
    Scope(session, "scope-generic").configure(**CONFIG)
    assert session.sent == [
        "FORMat:DATA INTeger,8",
        "INPut1:STATe 1", "INPut2:STATe 1", "INPut3:STATe 0", "INPut4:STATe 0",
        "INPut1:COUPling DC", "INPut1:PSCale 100", "SENSe1:VOLTage:RANGe:PTPeak 1600",
        "SENSe1:VOLTage:RANGe:OFFSet -200",
        "INPut2:COUPling DC", "INPut2:PSCale 50", "SENSe2:VOLTage:RANGe:PTPeak 100",
        "SENSe2:VOLTage:RANGe:OFFSet 0",
        "SENSe:SWEep:TINTerval 5e-10", "SENSe:SWEep:POINts 8000",
        "SENSe:SWEep:OFFSet:TIME 1.45e-05",
        "TRIGger:SEQuence:SOURce INTernal4", "TRIGger:SEQuence:LEVel 7.5",
        "TRIGger:SEQuence:SLOPe POSitive",
        "*OPC?", "SYSTem:ERRor?",
    ]


def test_scope_alt_configure_strings():
    session = RecordingSession()
    Scope(session, "scope-alt").configure(**CONFIG, trigger_slope="falling")
    assert session.sent == [
        "FORMat:DATA INTeger,16", "FORMat:BORDer NORMal",
        "INPut1:STATe 1", "INPut2:STATe 1", "INPut3:STATe 0", "INPut4:STATe 0",
        "INPut1:COUPling DC", "INPut1:PGAin 0.01", "SENSe1:VOLTage:RANGe:UPPer 800",
        "SENSe1:VOLTage:RANGe:OFFSet -200",
        "INPut2:COUPling DC", "INPut2:PGAin 0.02", "SENSe2:VOLTage:RANGe:UPPer 50",
        "SENSe2:VOLTage:RANGe:OFFSet 0",
        "SENSe:SWEep:TINTerval 5e-10", "SENSe:SWEep:POINts 8000", "TRIGger:DELay 1.45e-05",
        "TRIGger:SOURce INTernal4", "TRIGger:LEVel 7.5", "TRIGger:SLOPe NEGative",
        "*OPC?", "SYSTem:ERRor:NEXT?",
    ]


def test_scope_arm_wait_and_read_generic():
    codes = np.array([-128, -1, 0, 10, 127], dtype=np.int8)
    session = RecordingSession(
        answers={"STATus:OPERation:CONDition?": ["32", "0"],
                 "SENSe2:VOLTage:RANGe:PTPeak?": "127.5", "SENSe2:VOLTage:RANGe:OFFSet?": "-20",
                 "SENSe:SWEep:TINTerval?": "5e-10", "SENSe:SWEep:OFFSet:TIME?": "1.45e-05"},
        blocks={"TRACe:DATA? TRACE2": bytearray(codes.tobytes())},
    )
    scope = Scope(session, "scope-generic")
    scope.configure(**CONFIG)
    session.sent.clear()
    scope.arm_single()
    assert scope.wait_triggered(30.0, poll_s=0.0)  # done at the second poll
    trace = scope.read_channel("diode_current")
    assert session.sent == [
        "INITiate:IMMediate", "*OPC?", "STATus:OPERation:CONDition?",
        "STATus:OPERation:CONDition?", "SENSe2:VOLTage:RANGe:PTPeak?",
        "SENSe2:VOLTage:RANGe:OFFSet?", "SENSe:SWEep:TINTerval?", "SENSe:SWEep:OFFSet:TIME?",
        "TRACe:DATA? TRACE2",
    ]
    assert session.last_terminator is True
    assert trace.codes.dtype == np.int16
    assert trace.codes.tolist() == [-128, -1, 0, 10, 127]
    # probe units: code * 127.5/255 - 20 (A); channel volts: divided by the 50 A/V probe
    assert trace.gain == pytest.approx(0.5 / 50) and trace.offset == pytest.approx(-20 / 50)
    assert trace.dt == 5e-10 and trace.t_start == 1.45e-05
    assert (trace.code_min, trace.code_max) == (-128, 127)


def test_scope_read_alt_big_endian_without_terminator():
    codes = np.array([-32768, -256, 0, 2560, 32512], dtype=">i2")
    session = RecordingSession(
        answers={"TRACe1:SCALing?": "0.025,-200,5e-10,1e-6"},
        blocks={"TRACe1:DATA?": bytearray(codes.tobytes())},
    )
    scope = Scope(session, "scope-alt")
    scope.configure(**CONFIG)
    session.sent.clear()
    trace = scope.read_channel("diode_voltage")
    assert session.sent == ["TRACe1:SCALing?", "TRACe1:DATA?"]
    assert session.last_terminator is False
    assert trace.codes.tolist() == [-32768, -256, 0, 2560, 32512]
    # probe units per code, then / 100 V/V probe
    assert trace.gain == pytest.approx(0.025 / 100)
    assert trace.offset == pytest.approx(-2.0)
    assert trace.dt == 5e-10 and trace.t_start == 1e-6


def test_scope_alt_scaling_record_with_missing_fields_is_protocol_error():
    session = RecordingSession(answers={"TRACe1:SCALing?": "0.025,-200"},
                               blocks={"TRACe1:DATA?": bytearray(b"\x00\x01")})
    with pytest.raises(ProtocolError, match="expected 4"):
        Scope(session, "scope-alt").read_channel(1)


def test_scope_wait_triggered_times_out():
    session = RecordingSession(answers={"STATus:OPERation:CONDition?": "32"})
    assert Scope(session, "scope-generic").wait_triggered(0.02, poll_s=0.005) is False


def test_scope_odd_byte_count_is_protocol_error():
    session = RecordingSession(
        answers={"TRACe1:SCALing?": "1,0,1e-9,0"},
        blocks={"TRACe1:DATA?": bytearray(b"\x00\x01\x02")})
    with pytest.raises(ProtocolError, match="whole number"):
        Scope(session, "scope-alt").read_channel(1)


def test_pulse_double_and_single_pulse_strings():
    session = RecordingSession()
    pulse = PulseSource(session, "pulse-generic")
    pulse.configure(1e-5, 5e-6, 3e-6)
    pulse.set_gate_resistance(10)
    pulse.output(True)
    pulse.fire()
    pulse.configure(2.5e-5)  # single-pulse trim shot
    pulse.output(False)
    assert session.sent == [
        "SOURce:PULSe:COUNt 2", "SOURce:PULSe:WIDTh 1e-05", "GDRive:GAP 5e-06",
        "GDRive:SECond:WIDTh 3e-06", "SYSTem:ERRor?", "GDRive:RESistance 10", "SYSTem:ERRor?",
        "OUTPut:STATe 1", "SYSTem:ERRor?", "INITiate:IMMediate", "SOURce:PULSe:COUNt 1",
        "SOURce:PULSe:WIDTh 2.5e-05", "SYSTem:ERRor?", "OUTPut:STATe 0",
    ]
    # a shot is never repeated silently
    assert session.retry_flags["INITiate:IMMediate"] is False


def test_supply_thermal_handler_strings():
    session = RecordingSession(answers={"MEASure:VOLTage:DC?": "599.8", "OUTPut:STATe?": "1",
                                        "MEASure:TEMPerature?": "125.02",
                                        "SOURce:TEMPerature:LEVel?": "125",
                                        "HANDler:DUT:CATalog?": '"SN0117-001","SN0117-002"',
                                        "HANDler:DUT:SELect?": '"SN0117-002"'})
    supply = BusSupply(session, "supply-generic")
    supply.set_current_limit(1.0)
    supply.set_voltage(600)
    supply.output(True)
    assert supply.measure_voltage() == pytest.approx(599.8)
    assert supply.is_output_on() is True
    thermal = ThermalController(session, "thermal-generic")
    thermal.set_temperature(398.15)
    assert thermal.measure_temperature() == pytest.approx(398.17)
    assert thermal.setpoint() == pytest.approx(398.15)
    thermal.output(False)
    handler = Handler(session, "handler-generic")
    assert handler.list_devices() == ["SN0117-001", "SN0117-002"]
    handler.select("SN0117-002")
    assert handler.selected() == "SN0117-002"
    assert session.sent == [
        "SOURce:CURRent:LEVel 1", "SYSTem:ERRor?", "SOURce:VOLTage:LEVel 600", "SYSTem:ERRor?",
        "OUTPut:STATe 1", "SYSTem:ERRor?", "MEASure:VOLTage:DC?", "OUTPut:STATe?",
        "SOURce:TEMPerature:LEVel 125", "SYSTem:ERRor?", "MEASure:TEMPerature?",
        "SOURce:TEMPerature:LEVel?", "OUTPut:STATe 0",
        "HANDler:DUT:CATalog?", 'HANDler:DUT:SELect "SN0117-002"', "SYSTem:ERRor?",
        "HANDler:DUT:SELect?",
    ]


def test_identity_reset_and_error_drain():
    session = RecordingSession(answers={
        "*IDN?": "BENCHRUN-SIM,SUPPLY-1K5,SIM000003,3.3",
        "SYSTem:ERRor?": ['-222,"Data out of range;volts 2000"', '-113,"Undefined header"',
                          '0,"No error"'],
    })
    supply = BusSupply(session, "supply-generic")
    assert supply.identity() == InstrumentIdentity(
        "BENCHRUN-SIM", "SUPPLY-1K5", "SIM000003", "3.3", session.resource, "supply-generic")
    supply.reset()
    with pytest.raises(InstrumentReportedError, match="-222") as info:
        supply.set_voltage(2000)
    assert info.value.entries == [(-222, "Data out of range;volts 2000"),
                                  (-113, "Undefined header")]
    assert session.sent[:5] == ["*IDN?", "*RST", "*CLS", "*OPC?", "SOURce:VOLTage:LEVel 2000"]


def test_stuck_error_queue_does_not_loop_forever():
    session = RecordingSession(answers={"SYSTem:ERRor?": ['-350,"Queue overflow"'] * 200})
    with pytest.raises(ProtocolError, match="not empty"):
        Handler(session, "handler-generic").drain_errors()


def test_table_for_the_wrong_role_is_refused():
    from benchrun.errors import ConfigError

    with pytest.raises(ConfigError, match="role"):
        Scope(RecordingSession(), "supply-generic")


def test_block_payload_helpers_agree_with_driver_decoding():
    # what the simulator sends for an int16 big-endian family decodes to the same codes
    codes = np.arange(-5, 5, dtype=">i2")
    block = scpi.encode_block(codes.tobytes(), terminator=False)
    decoded = np.frombuffer(scpi.parse_block(block, terminator=False), dtype=">i2")
    assert decoded.tolist() == list(range(-5, 5))


def test_trigger_wait_with_an_expected_duration_asks_few_times():
    # the scope is left alone for 80 % of the expected acquisition time, then asked every
    # 1 % of it: an acquisition as long as expected is seen with about 20 queries, where the
    # growing-interval rule alone asks every 2 ms (common practice: poll near the end)
    import time as _time

    from benchrun.instruments import roles

    class FakeScope:
        wait_triggered = roles.Scope.wait_triggered

        def __init__(self, duration_s):
            self.done_at = _time.monotonic() + duration_s
            self.asked = 0

        def acquisition_done(self):
            self.asked += 1
            return _time.monotonic() >= self.done_at

    expected = FakeScope(0.06)
    assert expected.wait_triggered(2.0, expected_s=0.06)
    plain = FakeScope(0.06)
    assert plain.wait_triggered(2.0)
    assert expected.asked < plain.asked
    assert expected.asked <= 2 + int(0.2 * 0.06 / (0.01 * 0.06)) + 3
    never = FakeScope(10.0)
    assert never.wait_triggered(0.05, expected_s=0.06) is False


def test_trigger_wait_counts_from_the_fire():
    # ``since`` = when the acquisition was started: work done between the fire command and
    # the wait (the runner starts its work that overlaps the acquisition there) must not
    # push the first poll after 80 % of the expected time further out
    import time as _time

    from benchrun.instruments import roles

    class FakeScope:
        wait_triggered = roles.Scope.wait_triggered

        def __init__(self, done_at):
            self.done_at = done_at

        def acquisition_done(self):
            return _time.monotonic() >= self.done_at

    fired = _time.monotonic()
    scope = FakeScope(fired + 0.30)
    _time.sleep(0.25)  # busy until shortly before the expected end
    assert scope.wait_triggered(5.0, expected_s=0.30, since=fired)
    late = _time.monotonic() - scope.done_at
    # from the fire: polled every 1 % of 0.30 s from 0.24 s on; counted from the call it
    # would have slept until 0.25 + 0.24 s
    assert late < 0.1, late
    never = FakeScope(fired + 10.0)
    started = _time.monotonic()
    assert never.wait_triggered(0.3, expected_s=0.30, since=started - 0.25) is False
    assert _time.monotonic() - started < 0.2  # the timeout counts from the fire too


def test_verify_settings_reads_every_sent_setting_back_and_reports_differences():
    # the instrument coerced the range (1600 -> 2000) and ignored the trigger slope
    session = RecordingSession(answers={
        "INPut1:STATe?": "1", "INPut2:STATe?": "1", "INPut3:STATe?": "0", "INPut4:STATe?": "0",
        "INPut1:COUPling?": "DC", "INPut2:COUPling?": "DC",
        "INPut1:PSCale?": "100", "INPut2:PSCale?": "50",
        "SENSe1:VOLTage:RANGe:PTPeak?": "2000", "SENSe2:VOLTage:RANGe:PTPeak?": "100",
        "SENSe1:VOLTage:RANGe:OFFSet?": "-200", "SENSe2:VOLTage:RANGe:OFFSet?": "0",
        "SENSe:SWEep:TINTerval?": "5.0000000001e-10", "SENSe:SWEep:POINts?": "8000",
        "SENSe:SWEep:OFFSet:TIME?": "1.45e-05", "TRIGger:SEQuence:SOURce?": "INT4",
        "TRIGger:SEQuence:LEVel?": "7.5", "TRIGger:SEQuence:SLOPe?": "NEG",
    })
    scope = Scope(session, "scope-generic")
    scope.configure(**CONFIG)
    found = scope.verify_settings()
    assert [m.line() for m in found] == [
        "scope: SENSe1:VOLTage:RANGe:PTPeak 1600: reads back '2000'",
        "scope: TRIGger:SEQuence:SLOPe POSitive: reads back 'NEGative'",
    ]
    assert scope.verify_settings() == []  # nothing sent since


def test_watchdog_strings():
    session = RecordingSession()
    supply = BusSupply(session, "supply-generic")
    assert supply.has_watchdog
    supply.arm_watchdog()
    supply.refresh_watchdog()
    assert session.sent == ["WDOG:TIMeout 2", "SYSTem:ERRor?", "WDOG:REFResh"]
