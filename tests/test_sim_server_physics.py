"""One double-pulse shot on the physics-backed simulated bench, through pyvisa ``@py``.

Checks against outside references: the first pulse sets the load current by
t1 = L·I/(Vbus − Vsw) (inductor law, DESIGN.md §4), less the freewheeling droop
(VF + I·R)·t_off/L; a silicon PiN diode's reverse-recovery peak current rises with
temperature because the carrier lifetime grows (Lauritzen & Ma, IEEE Trans. Power Electronics
6(2), 1991; τ(T) law from compact-model practice).
"""

from __future__ import annotations

import time

import pytest

from benchrun.analysis.pipeline import ProbeCalibration, analyze_channels
from benchrun.instruments.roles import connect
from benchrun.simulator.physics import Fixture
from benchrun.simulator.server import SimulatedBench

PROBES = {"diode_voltage": 100.0, "diode_current": 50.0, "gate": 10.0}


def _shot(d) -> dict:
    d["scope"].arm_single()
    d["pulse"].fire()
    assert d["scope"].wait_triggered(30.0)  # returns as soon as the capture is there
    traces = d["scope"].read_channels(["diode_voltage", "diode_current"])
    first = traces["diode_voltage"]
    result = analyze_channels(first.t_start, first.dt,
                              {k: v.to_channel_data() for k, v in traces.items()},
                              {k: ProbeCalibration(PROBES[k]) for k in traces})
    return result.metrics()


def _settle(thermal, kelvin, tolerance=0.3, timeout_s=60.0):
    thermal.set_temperature(kelvin)
    thermal.output(True)
    deadline = time.monotonic() + timeout_s
    while abs(thermal.measure_temperature() - kelvin) > tolerance:
        assert time.monotonic() < deadline, "temperature did not settle"
        time.sleep(0.002)


def test_physics_shot_current_and_temperature_trend():
    fixture = Fixture()
    with SimulatedBench(seed=3, clock_speedup=20_000.0) as bench:
        d = {role: connect(role, res, timeout_s=30.0) for role, res in bench.resources.items()}
        serial = d["handler"].list_devices()[0]
        d["handler"].select(serial)
        assert d["handler"].selected() == serial
        d["supply"].set_current_limit(2.0)
        d["supply"].set_voltage(600.0)
        d["supply"].output(True)
        while d["supply"].measure_voltage() < 600.0:
            time.sleep(0.001)
        t1, gap, t2 = 10e-6, 5e-6, 3e-6
        d["pulse"].configure(t1, gap, t2)
        d["pulse"].set_gate_resistance(10.0)
        d["pulse"].output(True)
        d["scope"].configure({"diode_voltage": (1600.0, -200.0, 100.0),
                              "diode_current": (200.0, 0.0, 50.0),
                              "gate": (40.0, 0.0, 10.0)},
                             0.5e-9, 6000, t1 + gap - 0.5e-6, "gate", 7.5)
        _settle(d["thermal"], 298.15)
        cold = _shot(d)
        _settle(d["thermal"], 398.15)
        hot = _shot(d)
        d["pulse"].output(False)
        d["supply"].output(False)
        for drv in d.values():
            drv.session.close()
    ideal = 600.0 * t1 / fixture.load_inductance_H  # t1 = L·I/V → I = V·t1/L = 30 A
    assert cold["if_A"] == pytest.approx(ideal, rel=0.05)
    assert hot["irrm_A"] > 1.1 * cold["irrm_A"]
    assert hot["qrr_C"] > cold["qrr_C"]
