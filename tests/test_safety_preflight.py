"""Pre-flight refusals, calibration policy and the safe-state procedure (pure parts)."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pytest

from benchrun.config.bench import load_bench
from benchrun.config.sequence import PartRatings, load_sequence
from benchrun.errors import CalibrationOverdue, SafetyError
from benchrun.records import TestPoint
from benchrun.runner.plan import expand_points, plan_pulses
from benchrun.runner.safety import (
    check_calibration,
    check_shot,
    make_safe,
    peak_current,
    point_problems,
    preflight,
)

ROOT = Path(__file__).resolve().parents[1]
RATINGS = PartRatings(vrrm="1200 V", if_max="30 A", tj_max="150 degC")


@pytest.fixture(scope="module")
def bench():
    return load_bench(ROOT / "sequences" / "bench-sim.yaml")


@pytest.fixture(scope="module")
def sequence():
    return load_sequence(ROOT / "sequences" / "dx4417-demo.yaml")


def point(**kw):
    values = {"index": 0, "temperature_K": 298.15, "bus_voltage_V": 600.0,
              "forward_current_A": 30.0, "gate_resistance_ohm": 10.0, "label": "p"}
    values.update(kw)
    return TestPoint(**values)


def test_demo_sequence_passes(bench, sequence):
    preflight(expand_points(sequence), sequence, bench, sequence.ratings)


@pytest.mark.parametrize(
    ("changes", "reason"),
    [
        ({"bus_voltage_V": 1300.0}, "VRRM"),
        ({"forward_current_A": 35.0}, "exceeds the part's rating"),
        ({"temperature_K": 448.15}, "Tj max"),
        ({"temperature_K": 200.0}, "Tj min"),
        ({"didt_A_per_s": 2e10}, "peak reverse voltage"),  # 600 V + 40 nH * 20 A/ns = 1400 V
    ],
)
def test_part_ratings_refused(bench, sequence, changes, reason):
    problems = point_problems(point(**changes), sequence, bench, RATINGS)
    assert any(reason in p for p in problems), problems


def test_missing_ratings_refused(bench, sequence):
    with pytest.raises(SafetyError, match="no ratings"):
        preflight([point()], sequence, bench, None)


def test_fixture_limits(bench, sequence):
    big = PartRatings(vrrm="3000 V", if_max="500 A", tj_max="150 degC")
    # 75 A: t1 = 200 uH * 75 A / 600 V = 25 us; second pulse adds 600 V * 2 us / 200 uH = 6 A:
    # 81 A peak > 80 A saturation, > 60 A bench limit; 1/2*L*I^2 = 0.66 J < 1 J
    problems = point_problems(point(forward_current_A=75.0), sequence, bench, big)
    text = "\n".join(problems)
    assert "saturation" in text and "bench limit" in text
    assert "inductor energy" not in text
    # 1100 V: 1/2*C*V^2 = 0.5 * 100 uF * 1100^2 = 60.5 J > 60 J and above the 1000 V limit
    problems = point_problems(point(bus_voltage_V=1100.0), sequence, bench, big)
    text = "\n".join(problems)
    assert "capacitor energy" in text and "60.5 J" in text
    assert "bench limit 1000 V" in text


def test_pulse_width_limit(bench, sequence):
    big = PartRatings(vrrm="3000 V", if_max="500 A", tj_max="150 degC")
    # 100 V, 30 A: t1 = 200 uH * 30 A / 100 V = 60 us > 50 us maximum
    problems = point_problems(point(bus_voltage_V=100.0), sequence, bench, big)
    assert any("pulse width" in p for p in problems), problems


def test_preflight_lists_every_reason(bench, sequence):
    points = [point(bus_voltage_V=1300.0), point(index=1, forward_current_A=40.0)]
    with pytest.raises(SafetyError) as info:
        preflight(points, sequence, bench, RATINGS)
    text = str(info.value)
    assert "VRRM" in text and "40 A exceeds" in text


def test_peak_current_includes_second_pulse(bench, sequence):
    p = point()
    plan = plan_pulses(p, sequence, bench.fixture)
    # IF + V*t2/L = 30 A + 600 V * 2 us / 200 uH = 36 A (ideal inductor, DESIGN §4)
    assert peak_current(plan, p, bench) == pytest.approx(36.0)
    check_shot(plan, p, bench)
    with pytest.raises(SafetyError, match="pulse width"):
        check_shot(plan.with_first_pulse(80e-6), p, bench)


def test_calibration_policy(bench):
    soon = bench.instruments.scope.calibration_due - dt.timedelta(days=10)
    result = check_calibration(bench, soon)
    assert result.warnings and not result.overridden
    late = bench.instruments.scope.calibration_due + dt.timedelta(days=1)
    with pytest.raises(CalibrationOverdue, match="allow-overdue"):
        check_calibration(bench, late)
    result = check_calibration(bench, late, allow_overdue=True)
    assert result.overridden
    assert result.to_dict()["overdue_override"]


class FakeClock:
    def __init__(self):
        self.now = 0.0

    def monotonic(self):
        return self.now

    def sleep(self, seconds):
        self.now += seconds


def test_safe_state_waits_for_bleeder():
    clock = FakeClock()
    calls = []
    # bus decays through the bleeder: V(t) = 600 V * exp(-t / RC), RC = 2 s
    import math

    report = make_safe(lambda: calls.append("pulse"), lambda: calls.append("supply"),
                       lambda: 600.0 * math.exp(-clock.now / 2.0),
                       touch_safe_V=60.0, timeout_s=30.0, clock=clock, poll_s=0.1)
    assert calls == ["pulse", "supply"]  # pulse output first, then the supply
    assert report.reached and report.bus_voltage_V < 60.0
    # time to 60 V = RC*ln(10) = 4.6 s (capacitor discharge), within one poll step
    assert report.waited_s == pytest.approx(2.0 * math.log(10.0), abs=0.11)
    assert "safe state" in report.describe()


def test_safe_state_says_so_loudly_when_bus_stays_high():
    clock = FakeClock()

    def broken():
        raise OSError("no answer")

    report = make_safe(broken, lambda: None, lambda: 400.0, touch_safe_V=60.0,
                       timeout_s=5.0, clock=clock)
    assert not report.reached and not report.pulse_off and report.supply_off
    text = report.describe()
    assert "DANGER" in text and "400.0 V" in text and "no answer" in text
