"""Through the real VISA path (pyvisa ``@py`` → simulated SCPI bench → analysis), a silicon
diode's recovery changes the right way with the forward current and the commutation di/dt.

Outside reference (direction only): for a PiN diode the stored charge at commutation is
≈ τ·IF and the reverse-recovery peak grows with both IF and di/dt (Irrm ≈ √(2·Qrr·di/dt) for a
triangular recovery; Mohan, Undeland & Robbins, "Power Electronics", ch. 20, from memory;
Lauritzen & Ma, IEEE Trans. Power Electronics 6(2), 1991 for the charge-control model).
"""

from __future__ import annotations

import time

from benchrun.analysis.pipeline import ProbeCalibration, analyze_channels
from benchrun.instruments.roles import connect
from benchrun.simulator.server import SimulatedBench

PROBES = {"diode_voltage": 100.0, "diode_current": 50.0, "gate": 10.0}
GAP, SECOND = 5e-6, 3e-6


def _shot(d, t1: float, gate_ohm: float) -> dict:
    d["pulse"].configure(t1, GAP, SECOND)
    d["pulse"].set_gate_resistance(gate_ohm)
    d["scope"].configure({"diode_voltage": (1600.0, -200.0, 100.0),
                          "diode_current": (200.0, 0.0, 50.0),
                          "gate": (40.0, 0.0, 10.0)},
                         0.5e-9, 8000, t1 + GAP - 0.5e-6, "gate", 7.5)
    d["scope"].arm_single()
    d["pulse"].fire()
    assert d["scope"].wait_triggered(30.0)
    traces = d["scope"].read_channels(["diode_voltage", "diode_current"])
    first = traces["diode_voltage"]
    return analyze_channels(first.t_start, first.dt,
                            {k: v.to_channel_data() for k, v in traces.items()},
                            {k: ProbeCalibration(PROBES[k]) for k in traces}).metrics()


def test_recovery_grows_with_current_and_didt_through_visa():
    with SimulatedBench(seed=5, clock_speedup=20_000.0) as bench:
        d = {role: connect(role, res, timeout_s=30.0) for role, res in bench.resources.items()}
        try:
            d["handler"].select(d["handler"].list_devices()[0])
            d["supply"].set_current_limit(2.0)
            d["supply"].set_voltage(600.0)
            d["supply"].output(True)
            deadline = time.monotonic() + 60.0
            while d["supply"].measure_voltage() < 599.0:
                assert time.monotonic() < deadline, "bus did not charge"
                time.sleep(0.001)
            d["pulse"].output(True)
            base = _shot(d, 10e-6, 10.0)     # ≈ 30 A (I = V·t1/L, 200 µH)
            low_if = _shot(d, 5e-6, 10.0)    # ≈ 15 A, same gate drive
            slow = _shot(d, 10e-6, 40.0)     # ≈ 30 A, four times the gate resistance
        finally:
            d["pulse"].output(False)
            d["supply"].output(False)
            for drv in d.values():
                drv.session.close()
    # the first pulse sets the current: half the width, about half the current
    assert 0.4 < low_if["if_A"] / base["if_A"] < 0.6
    # less stored charge → smaller reverse peak and charge
    assert low_if["irrm_A"] < base["irrm_A"]
    assert low_if["qrr_C"] < base["qrr_C"]
    # a slower gate gives a slower commutation and a smaller reverse peak
    assert slow["didt_A_per_s"] < 0.8 * base["didt_A_per_s"]
    assert slow["irrm_A"] < base["irrm_A"]
