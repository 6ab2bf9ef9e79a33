"""Per-shot condition checks, temperature stability, progress display and run log."""

from __future__ import annotations

import io
import logging

import pytest
from rich.console import Console

from benchrun.config.sequence import Tolerances
from benchrun.records import TestPoint
from benchrun.runner.conditions import StabilityTracker, check_conditions
from benchrun.runner.progress import RunProgress, close_run_log, open_run_log

POINT = TestPoint(index=0, temperature_K=398.15, bus_voltage_V=600.0, forward_current_A=30.0,
                  didt_A_per_s=1e9)
TOL = Tolerances(forward_current="5 %", didt="20 %", reverse_voltage="5 %", temperature="2 K")


def conditions(**kw):
    values = {"if_A": 30.0, "didt_A_per_s": 1e9, "vr_V": 600.0, "temperature_K": 398.15}
    values.update(kw)
    return values


def test_within_tolerance_is_valid():
    assert check_conditions(POINT, conditions(if_A=31.4, vr_V=571.0, temperature_K=396.2),
                            TOL).valid


@pytest.mark.parametrize(("key", "value"), [
    ("if_A", 31.6), ("if_A", 28.4), ("vr_V", 569.0), ("didt_A_per_s", 1.21e9),
    ("temperature_K", 400.2), ("temperature_K", None), ("if_A", None),
])
def test_out_of_tolerance_or_missing_is_invalid(key, value):
    check = check_conditions(POINT, conditions(**{key: value}), TOL)
    assert not check.valid
    assert any(key in flag for flag in check.flags)


def test_didt_not_checked_without_target():
    point = TestPoint(index=0, temperature_K=398.15, bus_voltage_V=600.0,
                      forward_current_A=30.0, gate_resistance_ohm=10.0)
    assert check_conditions(point, conditions(didt_A_per_s=3e9), TOL).valid


def test_stability_needs_the_whole_dwell_inside_the_band():
    tracker = StabilityTracker(target=398.15, band=1.0, dwell=30.0)
    readings = [(0, 390.0), (10, 397.5), (20, 397.9), (30, 399.3),  # 399.3 leaves the band
                (40, 398.6), (55, 398.3), (70, 398.2)]
    states = [tracker.update(t, v) for t, v in readings]
    # inside from t=40 on; stable once 30 s have passed inside the band (t=70)
    assert states == [False, False, False, False, False, False, True]


def test_progress_shows_device_temperature_and_count():
    buffer = io.StringIO()
    console = Console(file=buffer, force_terminal=True, width=120)
    with RunProgress(4, 1, console=console) as progress:
        progress.shooting("SN0117-007", 398.15, "nominal #2")
        progress.advance()
    text = buffer.getvalue()
    assert "SN0117-007" in text and "125.0 °C" in text and "2/4" in text


def test_run_log_file(tmp_path):
    handler = open_run_log(tmp_path / "run.log")
    try:
        logging.getLogger("benchrun.runner").info("fired shot %d", 7)
    finally:
        close_run_log(handler)
    text = (tmp_path / "run.log").read_text()
    assert "fired shot 7" in text and "Z INFO" in text
