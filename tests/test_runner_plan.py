"""Pulse timing, trim correction, scope ranges and firing order."""

from __future__ import annotations

from pathlib import Path

import pytest
from scipy.integrate import solve_ivp

from benchrun.config.bench import load_bench
from benchrun.config.sequence import load_sequence
from benchrun.records import TestPoint
from benchrun.runner.plan import (
    corrected_first_pulse,
    droop,
    effective_inductance,
    expand_points,
    first_pulse_width,
    inductor_current,
    plan_pulses,
    plan_ranges,
    plan_run,
)

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def bench():
    return load_bench(ROOT / "sequences" / "bench-sim.yaml")


@pytest.fixture(scope="module")
def sequence():
    return load_sequence(ROOT / "sequences" / "dx4417-demo.yaml")


def test_lossless_pulse_width_textbook():
    # t1 = L*I/V (ideal inductor charged from a constant voltage, DESIGN §4): 200 uH, 30 A,
    # 600 V -> 10 us (hand calculation)
    assert first_pulse_width(30.0, 600.0, 200e-6) == pytest.approx(10e-6)


@pytest.mark.parametrize(("amps", "V", "L", "R"), [(30.0, 600.0, 200e-6, 0.02),
                                                 (20.0, 100.0, 1e-3, 1.5),
                                                 (50.0, 400.0, 80e-6, 0.5)])
def test_pulse_width_against_ode_solver(amps, V, L, R):
    # independent reference: scipy integrates L di/dt = V - R i from 0 over t1
    t1 = first_pulse_width(amps, V, L, R)
    sol = solve_ivp(lambda t, i: [(V - R * i[0]) / L], (0.0, t1), [0.0],
                    rtol=1e-10, atol=1e-12)
    assert sol.y[0, -1] == pytest.approx(amps, rel=1e-6)
    assert inductor_current(t1, V, L, R) == pytest.approx(amps, rel=1e-12)


def test_switch_voltage_reduces_drive():
    assert first_pulse_width(30.0, 600.0, 200e-6, 0.0, 5.0) == pytest.approx(200e-6 * 30 / 595)


def test_unreachable_current_is_refused():
    from benchrun.errors import SafetyError

    with pytest.raises(SafetyError, match="cannot be reached"):
        first_pulse_width(100.0, 10.0, 1e-3, 0.2)  # final value 50 A


def test_effective_inductance_inverts():
    L = effective_inductance(10e-6, 29.0, 600.0, 0.02)
    assert inductor_current(10e-6, 600.0, L, 0.02) == pytest.approx(29.0)


def test_trim_converges_on_a_different_inductor(bench, sequence):
    # the real inductor is 8 % below its nameplate: the calculated t1 overshoots the current
    point = expand_points(sequence)[0]
    plan = plan_pulses(point, sequence, bench.fixture)
    fx = bench.fixture
    true_L = 0.92 * fx.load_inductance

    def fire(t1):  # current at commutation for a given t1, in the same RL model
        return inductor_current(t1, point.bus_voltage_V, true_L, fx.load_resistance) - droop(
            point.forward_current_A, plan.off_time_s, fx)

    first = fire(plan.first_pulse_s)
    assert abs(first / point.forward_current_A - 1) > 0.05
    t1, L_eff = corrected_first_pulse(plan, point, first, point.bus_voltage_V, fx)
    assert L_eff == pytest.approx(true_L, rel=1e-9)
    assert fire(t1) == pytest.approx(point.forward_current_A, rel=1e-9)


def test_droop_formula(bench):
    # (VF + I*R)*t_off/L, DESIGN §4: (1.5 V + 30 A*0.02 ohm)*3 us/200 uH = 31.5 mA
    assert droop(30.0, 3e-6, bench.fixture) == pytest.approx(2.1 * 3e-6 / 200e-6)


def test_record_window_covers_double_pulse(bench, sequence):
    point = expand_points(sequence)[0]
    plan = plan_pulses(point, sequence, bench.fixture)
    assert plan.record_start_s < 0
    end = plan.record_start_s + plan.record_length_s
    assert end >= plan.first_pulse_s + plan.off_time_s + plan.second_pulse_s
    assert plan.points == pytest.approx(plan.record_length_s / plan.sample_interval_s, abs=1)
    longer = plan.with_first_pulse(plan.first_pulse_s + 1e-6)
    assert longer.record_length_s == pytest.approx(plan.record_length_s + 1e-6)


def test_ranges_cover_expected_values(bench, sequence):
    point = TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0,
                      forward_current_A=30.0, didt_A_per_s=1e9)
    ranges = plan_ranges(point, sequence, bench)
    cur = ranges["diode_current"]
    # the diode takes over IF + VR*t2/L = 30 A + 600 V * 2 us / 200 uH = 36 A after the
    # second pulse (ideal inductor, DESIGN §4); the runner chooses the gate resistor of a di/dt
    # point, so the switch may conduct on while the gate discharges from 15 V to Vth = 4 V
    # through the largest declared resistor, 47 ohm * 10 nF * ln(15/4) (RC discharge, any
    # circuit-theory text): 1.1 * (36 A + 600 V * that / 200 uH)
    import math

    delay = 47.0 * 10e-9 * math.log(15.0 / 4.0)
    assert cur.high == pytest.approx(1.1 * (36.0 + 600.0 * delay / 200e-6))
    plain = TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0,
                      forward_current_A=30.0, gate_resistance_ohm=10.0)
    # a point with its own resistor: 1.1 * 36 A = 39.6 A > 1.3 * IF = 39 A
    assert plan_ranges(plain, sequence, bench)["diode_current"].high == pytest.approx(39.6)
    assert cur.low <= -30.0  # Irrm expected = 1.0 * IF, with headroom
    volt = ranges["diode_voltage"]
    overshoot = 40e-9 * 1e9  # Ls * di/dt (DESIGN §4) = 40 V
    assert volt.low <= -(600.0 + overshoot)
    assert volt.high > 0
    assert "switch_voltage" in ranges and ranges["switch_voltage"].high > 600.0 + overshoot


def test_current_window_planned_from_the_part_limits(bench, sequence):
    """The diode-current window comes from the part's Irrm limit at the point's condition
    (limits/DX-4417.yaml: 48 A at 25 °C, 68 A at 125 °C) with the stated headroom, and from
    irrm_fraction·IF where no condition applies; nothing measured enters it."""
    from benchrun.config.limits import load_limits
    from benchrun.runner.plan import RANGE_HEADROOM, planned_irrm

    limits = load_limits(ROOT / "limits" / "DX-4417.yaml")
    cold = TestPoint(index=0, temperature_K=298.15, bus_voltage_V=600.0, forward_current_A=30.0)
    hot = TestPoint(index=1, temperature_K=398.15, bus_voltage_V=600.0, forward_current_A=30.0)
    other = TestPoint(index=2, temperature_K=298.15, bus_voltage_V=600.0, forward_current_A=20.0)
    assert planned_irrm(cold, sequence, limits) == (48.0, "the part's Irrm limit")
    assert plan_ranges(cold, sequence, bench, limits)["diode_current"].low == pytest.approx(
        -RANGE_HEADROOM * 48.0)
    assert plan_ranges(hot, sequence, bench, limits)["diode_current"].low == pytest.approx(
        -RANGE_HEADROOM * 68.0)
    # the 20 A loss-reference point belongs to no condition (they name 30 A)
    fraction = sequence.expected.irrm_fraction
    assert planned_irrm(other, sequence, limits)[0] == pytest.approx(fraction * 20.0)
    assert plan_ranges(other, sequence, bench)["diode_current"].low == pytest.approx(
        -RANGE_HEADROOM * fraction * 20.0)


def test_points_and_firing_order(sequence):
    points = expand_points(sequence)
    assert [p.index for p in points] == list(range(len(points)))
    # the demo has a 30 A point and a 20 A loss-reference point, both at 25 and 125 degC:
    # every point of the first temperature comes before any of the second
    assert [p.temperature_K for p in points] == pytest.approx([298.15, 298.15, 398.15, 398.15])
    steps = plan_run(sequence, ["A1", "A2", "A3"])
    assert len(steps) == 2
    shots = steps[0].shots
    per_device = sum(spec.repeats for spec in sequence.test_points)
    assert len(shots) == 3 * per_device
    assert [s.serial for s in shots[:per_device]] == ["A1"] * per_device  # device by device
    ids = [s.identity for step in steps for s in step.shots]
    assert len(ids) == len(set(ids))


def test_temperatures_grouped_across_points(tmp_path):
    text = (ROOT / "sequences" / "dx4417-demo.yaml").read_text()
    text = text.replace("test_points:\n", "test_points:\n  - bus_voltage: 400 V\n"
                        "    forward_current: 15 A\n    temperatures: [125 degC]\n"
                        "    gate_resistance: 22 ohm\n")
    path = tmp_path / "seq.yaml"
    path.write_text(text)
    seq = load_sequence(path)
    points = expand_points(seq)
    temps = [p.temperature_K for p in points]
    assert temps == sorted(temps, key=lambda t: [398.15, 298.15].index(t))
    assert len(plan_run(seq, ["X"])) == 2
    assert points[0].bus_voltage_V == 400.0  # first-listed temperature (125 degC) first


def test_worst_case_point_voltage_window_reaches_the_rating(bench):
    """At a point marked for the worst-case snappiness step the voltage window reaches 1.1·VRRM
    (the step judges a snap-off overshoot and a reverse voltage clamped near the rating:
    dynamic avalanche suspected at 90 % of VRRM, limits/DX-4425.yaml), so neither clips."""
    seq = load_sequence(ROOT / "sequences" / "dx4425-worstcase.yaml")
    vrrm = seq.ratings.vrrm
    marked = TestPoint(index=0, temperature_K=233.15, bus_voltage_V=800.0,
                       forward_current_A=3.0, didt_A_per_s=1.5e9,
                       qualification="worst_case_snappiness")
    plain = TestPoint(index=1, temperature_K=233.15, bus_voltage_V=800.0,
                      forward_current_A=3.0, didt_A_per_s=1.5e9)
    assert plan_ranges(marked, seq, bench)["diode_voltage"].low == pytest.approx(-1.1 * vrrm)
    overshoot = 40e-9 * 1.5e9 * seq.expected.overshoot_margin  # Ls·di/dt × margin
    assert plan_ranges(plain, seq, bench)["diode_voltage"].low == pytest.approx(
        -1.1 * (800.0 + overshoot))
