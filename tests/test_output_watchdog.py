"""Output watchdogs: what software cannot do after kill -9, the instruments do themselves.

The simulated pulse source and supply declare an output watchdog in their command tables
(``WDOG:TIMeout``/``WDOG:REFResh``, our own headers); the runner arms it when it first
energises the bus and refreshes it from a thread. These tests show the simulated outputs going
off by themselves once the refreshes stop, and a ``kill -9`` of a run on the simulated bench
(started as its own process, like a real bench) leaving pulse and supply outputs OFF after the
timeout. The bus then decays through the bleeder: V0·exp(-t/RC) (RC discharge, any
circuit-theory text).
"""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time

import pytest

from benchrun.instruments.roles import connect
from benchrun.instruments.session import InstrumentSession
from benchrun.simulator.server import SimulatedBench
from tests.bench_process import ROOT, SimProcess, env
from tests.test_runner_support import write_sequence


def test_simulated_outputs_go_off_when_refreshes_stop():
    with SimulatedBench(seed=2, clock_speedup=1.0) as bench:
        supply = connect("supply", bench.resources["supply"], timeout_s=10)
        pulse = connect("pulse", bench.resources["pulse"], timeout_s=10)
        try:
            supply.set_current_limit(5.0)
            supply.set_voltage(100.0)
            supply.output(True)
            pulse.output(True)
            for driver in (supply, pulse):
                driver.arm_watchdog(0.4)
            assert float(supply.readback("watchdog_timeout")["seconds"]) == 0.4
            for _ in range(6):  # refreshed every 0.1 s for 0.6 s: longer than the timeout
                time.sleep(0.1)
                supply.refresh_watchdog()
                pulse.refresh_watchdog()
            assert supply.is_output_on() and pulse.is_output_on()
            volts_on = supply.measure_voltage()
            assert volts_on == pytest.approx(100.0, abs=0.5)
            t_last = time.monotonic()
            time.sleep(0.25)
            assert supply.is_output_on() and pulse.is_output_on()  # within the timeout
            time.sleep(0.35)
            assert not supply.is_output_on() and not pulse.is_output_on()
            # the bus has been discharging since the timeout ran out, not since it was asked
            elapsed = time.monotonic() - (t_last + 0.4)
            tau = bench.bleeder_ohm() * bench.bus_capacitance()
            expected = volts_on * math.exp(-elapsed / tau)
            assert supply.measure_voltage() == pytest.approx(expected, rel=0.02)
            # tripped: disarmed until armed again; a fire with the output off is refused
            assert float(supply.readback("watchdog_timeout")["seconds"]) == 0.0
        finally:
            supply.session.close()
            pulse.session.close()


def test_an_unarmed_watchdog_never_switches_off():
    with SimulatedBench(seed=2) as bench:
        supply = connect("supply", bench.resources["supply"], timeout_s=10)
        try:
            supply.output(True)
            time.sleep(0.3)
            assert supply.is_output_on()
        finally:
            supply.switch_off()
            supply.session.close()


def _ask(resource: str, query: str) -> str:
    session = InstrumentSession(resource, timeout_s=10)
    try:
        return session.query(query)
    finally:
        session.close()


def test_kill_9_of_a_run_leaves_the_simulated_outputs_off_after_the_timeout(tmp_path):
    sim = SimProcess()
    run = None
    try:
        bench = sim.bench_file(tmp_path)
        seq = write_sequence(
            tmp_path, devices="[SN0117-001]", temperatures="[25 degC]", repeats=400,
            extra="ratings: {vrrm: 1200 V, if_max: 30 A, tj_max: 150 degC}\n")
        seq.write_text(seq.read_text().replace(
            "thermal: {band: 1 K, dwell: 10 s, soak: 10 s, timeout: 1800 s, poll_interval: 2 s}",
            "thermal: {band: 2 K, dwell: 0.2 s, soak: 0 s, timeout: 60 s, poll_interval: 0.1 s}"))
        run = subprocess.Popen(
            [sys.executable, "-m", "benchrun.cli", "run", str(seq), "--bench", str(bench),
             "--out", str(tmp_path / "runs"), "--no-progress"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env(), cwd=ROOT)
        res = sim.resources
        deadline = time.monotonic() + 240
        while True:  # wait until the run is firing: bus up, gate drive on
            assert run.poll() is None, "the run ended before it was killed"
            assert time.monotonic() < deadline, "the run never energised the bus"
            if (_ask(res["pulse"], "OUTPut:STATe?") == "1"
                    and float(_ask(res["supply"], "MEASure:VOLTage:DC?")) > 500):
                break
            time.sleep(0.2)
        assert float(_ask(res["supply"], "WDOG:TIMeout?")) == 2.0  # armed by the runner
        os.kill(run.pid, signal.SIGKILL)
        run.wait(timeout=30)
        killed = time.monotonic()
        # nothing made the bench safe: the outputs are still on right after the kill ...
        assert _ask(res["supply"], "OUTPut:STATe?") == "1"
        # ... and off once the 2 s timeout has run out without a refresh
        while time.monotonic() - killed < 2.0 + 3.0:
            states = (_ask(res["pulse"], "OUTPut:STATe?"), _ask(res["supply"], "OUTPut:STATe?"))
            if states == ("0", "0"):
                break
            time.sleep(0.1)
        assert states == ("0", "0")
        assert time.monotonic() - killed >= 0.5  # not switched off by the dying process
    finally:
        if run is not None and run.poll() is None:
            run.kill()
            run.wait()
        sim.stop()


def test_station_arms_once_refreshes_and_arms_again_after_a_fault(monkeypatch):
    import types

    from benchrun.config import load_bench
    from benchrun.runner import station as station_module
    from tests.bench_process import BENCH

    class FakeDriver:
        def __init__(self, role):
            self.role = role
            self.has_watchdog = role in ("pulse", "supply")
            self.table = types.SimpleNamespace(watchdog_timeout_s=0.2)
            self.session = types.SimpleNamespace(reconnects=0, close=lambda: None)
            self.armed = self.refreshed = 0

        def arm_watchdog(self):
            self.armed += 1

        def refresh_watchdog(self):
            self.refreshed += 1

    monkeypatch.setattr(station_module, "connect", lambda role, *a, **k: FakeDriver(role))
    bench = load_bench(BENCH)
    station = station_module.Station(bench, {r: "fake" for r, _ in bench.instruments.items()},
                                     types.SimpleNamespace(monotonic=time.monotonic,
                                                           sleep=time.sleep))
    try:
        station._arm_watchdogs()
        station._arm_watchdogs()  # energised again: not armed again
        pulse, supply, scope = (station.drivers[r] for r in ("pulse", "supply", "scope"))
        assert (pulse.armed, supply.armed) == (1, 1)
        time.sleep(0.3)  # refreshed every quarter of the 0.2 s timeout
        assert pulse.refreshed >= 2 and supply.refreshed >= 2 and scope.refreshed == 0
        station.forget_settings()  # after an instrument fault
        station._arm_watchdogs()
        assert (pulse.armed, supply.armed) == (2, 2)
    finally:
        station.close()
    after = pulse.refreshed
    time.sleep(0.15)
    assert pulse.refreshed == after  # close() stops the refreshes
