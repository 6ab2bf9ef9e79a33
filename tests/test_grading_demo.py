"""The demo limits against the simulated demo lot: physics → analysis → grading.

The virtual lot LT-0117 (invented demo data) holds two lifetime-control outliers
(SN0117-004: τ × 1.5, SN0117-009: τ × 1.9). Stored charge grows with the carrier
lifetime (Qrr ≈ τ·IF for a slow commutation, Lauritzen & Ma 1991), so with the demo limits
those two must come out non-conforming and the nominal devices conforming; c = 0 rejects
the lot. This ties the example limits to the simulated parts; a change to either that
breaks the demo story fails here.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from benchrun.config.bench import load_bench
from benchrun.grading import grade_lot, load_limits
from benchrun.records import ShotResult, TestPoint

ROOT = Path(__file__).resolve().parents[1]
SERIALS = ("SN0117-001", "SN0117-003", "SN0117-004", "SN0117-009")


def _shots() -> list[ShotResult]:
    from benchrun.analysis import analyze_recovery
    from benchrun.simulator.devices import load_virtual_parts
    from benchrun.simulator.physics import (
        Fixture,
        PulseTiming,
        SwitchModel,
        first_pulse_for_current,
        simulate_double_pulse,
    )

    lot = load_virtual_parts().lot("LT-0117")
    fixture = Fixture(stray_inductance_H=40e-9, bus_capacitance_F=100e-6)  # bench-sim.yaml
    switch = SwitchModel(gate_resistance_ohm=10.0)
    timing = PulseTiming(first_pulse_for_current(fixture, 600.0, 30.0), 3e-6, 2e-6, post_s=2e-6)
    shots = []
    for index, temperature in enumerate((298.15, 398.15)):
        point = TestPoint(index=index, temperature_K=temperature, bus_voltage_V=600.0,
                          forward_current_A=30.0, gate_resistance_ohm=10.0, label="nominal")
        for serial in SERIALS:
            waves = simulate_double_pulse(fixture, switch, lot.device(serial), timing, 600.0,
                                          temperature)
            metrics = analyze_recovery(waves.t, waves.v_diode, waves.i_diode)
            values = {k: v for k, v in metrics.to_dict().items() if k != "flags"}
            shots.append(ShotResult(
                run_id="R-DEMO", part="DX-4417", lot="LT-0117", serial=serial, point=point,
                repeat=0, attempt=0, timestamp="2026-01-01T00:00:00Z",
                conditions={"if_A": values["if_A"], "didt_A_per_s": values["didt_A_per_s"],
                            "vr_V": values["vr_V"], "temperature_K": temperature},
                metrics=values,
                # ranges as the runner's plan sets them for the 125 °C recovery (common practice)
                acquisition={"sample_interval_s": 1e-9, "current_range_A": 160.0,
                             "voltage_range_V": 1000.0, "adc_bits": 8},
            ))
    return shots


@pytest.mark.slow
def test_demo_lot_grades_and_disposition():
    lot = grade_lot(_shots(), load_limits(ROOT / "limits" / "DX-4417.yaml"),
                    bench=load_bench(ROOT / "sequences" / "bench-sim.yaml"))
    verdicts = {d.serial: d.verdict for d in lot.devices}
    assert verdicts["SN0117-001"] == "conforming"
    assert verdicts["SN0117-003"] == "conforming"
    assert verdicts["SN0117-004"] == "non-conforming"
    assert verdicts["SN0117-009"] == "non-conforming"
    assert lot.disposition == "reject"
    worst_offender = lot.device("SN0117-009").grade("qrr_C", "125C")
    assert worst_offender.outcome == "non-conforming"
    assert "qrr_C at 125C" in " ".join(lot.device("SN0117-009").reasons)
    ratio = next(r for r in lot.statistics.ratios if r.metric == "qrr_C")
    assert 1.5 < ratio.mean < 3.5  # Qrr grows with temperature through τ(T) (DESIGN.md §4)
    # a conforming device is binned only when value ± w lies inside one class (the decision
    # rule applied to the class edges, ILAC-G8:09/2019 §4.2); otherwise unbinned with why
    device = lot.device("SN0117-001")
    grade = device.grade("qrr_C", "125C")
    low, high = grade.value - grade.guard_band, grade.value + grade.guard_band
    edges = (5.0e-6, 5.5e-6, 6.5e-6)  # limits/DX-4417.yaml, bins at 125 °C
    crosses = any(low < edge < high for edge in edges)
    assert (device.bin is None) == crosses
    assert device.bin_reason is not None
    if crosses:
        assert "straddles the class edge" in device.bin_reason
