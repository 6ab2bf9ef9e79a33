"""Sequence, bench and limits checked against each other before anything fires."""

from __future__ import annotations

from pathlib import Path

import pytest
from test_runner_support import BENCH, write_sequence

from benchrun.config.limits import load_limits
from benchrun.errors import ConfigError
from benchrun.runner.execute import RunOptions, prepare

ROOT = Path(__file__).resolve().parents[1]
LIMITS = ROOT / "limits" / "DX-4417.yaml"


def _sequence_with_limits(tmp_path, limits: Path, temperatures="[25 degC, 125 degC]",
                          extra=""):
    import re

    seq = write_sequence(tmp_path, temperatures=temperatures,
                         extra="ratings: {vrrm: 1200 V, if_max: 30 A, tj_max: 150 degC}\n"
                         + extra)
    seq.write_text(re.sub(r"(?m)^limits: .*$", f"limits: {limits}", seq.read_text()))
    return seq


def _line(path: Path, needle: str) -> int:
    return next(i + 1 for i, line in enumerate(path.read_text().splitlines()) if needle in line)


def test_untested_limits_condition_refused_before_firing(tmp_path):
    # the sequence tests 25 degC only; DX-4417's limits also require 125C: every device would
    # be graded "invalid" after all shots had fired
    seq = _sequence_with_limits(tmp_path, LIMITS, temperatures="[25 degC]")
    with pytest.raises(ConfigError) as info:
        prepare(seq, BENCH, RunOptions(out_dir=tmp_path / "out"))
    line = _line(LIMITS, "- name: 125C")
    assert str(info.value).startswith(f"{LIMITS}:{line}: conditions.1: condition '125C' is "
                                      "never tested by the sequence")
    assert not (tmp_path / "out").exists()  # no run folder, nothing fired


def test_condition_with_other_current_is_not_tested(tmp_path):
    # same temperatures, but the limits ask for 20 A and the sequence drives 30 A
    limits = tmp_path / "limits.yaml"
    limits.write_text(LIMITS.read_text().replace("forward_current: 30 A", "forward_current: 20 A"))
    seq = _sequence_with_limits(tmp_path, limits)
    with pytest.raises(ConfigError, match="condition '25C' is never tested"):
        prepare(seq, BENCH, RunOptions(out_dir=tmp_path / "out"))


def test_matching_files_pass(tmp_path):
    seq = _sequence_with_limits(tmp_path, LIMITS)
    prepared = prepare(seq, BENCH, RunOptions(out_dir=tmp_path / "out"))
    assert prepared.limits_file == LIMITS.resolve()


def test_switch_energy_limit_needs_switch_voltage(tmp_path):
    limits = tmp_path / "limits.yaml"
    limits.write_text(LIMITS.read_text().replace(
        "  - {metric: softness, min: 0.5}\n",
        "  - {metric: softness, min: 0.5}\n  - {metric: eon_J, max: 5 mJ}\n"))
    seq = _sequence_with_limits(tmp_path, limits)
    seq.write_text(seq.read_text().replace("switch_voltage: true", "switch_voltage: false"))
    with pytest.raises(ConfigError) as info:
        prepare(seq, BENCH, RunOptions(out_dir=tmp_path / "out"))
    assert f"limits.yaml:{_line(limits, 'eon_J')}: limits.2.metric: eon_J is measured only" \
        in str(info.value)


@pytest.mark.parametrize(("classes", "message"), [
    ("[{name: Q1, max: 5.5 uC}, {name: Q2, max: 5.0 uC}]", "is not above the previous class"),
    ("[{name: Q1}, {name: Q2, max: 5.0 uC}]", r"has no 'max' \(open above\)"),
    ("[{name: Q1, max: 5 uC}, {name: Q2, min: 4 uC, max: 6 uC}]", "overlaps the previous"),
    ("[{name: Q1, max: 5 uC}, {name: Q1, max: 6 uC}]", "is used twice"),
])
def test_bins_out_of_order_refused(tmp_path, classes, message):
    text = LIMITS.read_text()
    start = text.index("  classes:\n")
    end = text.index("\n\n", start)
    limits = tmp_path / "limits.yaml"
    limits.write_text(text[:start] + f"  classes: {classes}" + text[end:])
    with pytest.raises(ConfigError, match=message) as info:
        load_limits(limits)
    assert f"limits.yaml:{_line(limits, '  classes:')}: bins.classes.1" in str(info.value)


def test_shipped_limits_bins_are_in_order():
    assert [c.name for c in load_limits(LIMITS).bins.classes] == ["Q1", "Q2", "Q3"]


def test_negative_switching_frequency_refused(tmp_path):
    from benchrun.config import load_sequence

    seq = write_sequence(tmp_path, extra="loss: {switching_frequencies: [20 kHz, -50 kHz]}\n")
    with pytest.raises(ConfigError) as info:
        load_sequence(seq)
    assert f"seq.yaml:{_line(seq, 'loss:')}: loss.switching_frequencies: a switching " \
        "frequency must be positive" in str(info.value)


def test_sequence_tolerance_wider_than_the_limits_refused(tmp_path):
    # the runner accepts a shot within the sequence tolerance; grading judges it with the
    # limits' tolerance: a wider sequence tolerance means valid-looking shots graded invalid
    seq = _sequence_with_limits(tmp_path, LIMITS,
                                extra="tolerances: {forward_current: 10 %}\n")
    with pytest.raises(ConfigError) as info:
        prepare(seq, BENCH, RunOptions(out_dir=tmp_path / "out"))
    assert f"seq.yaml:{_line(seq, 'tolerances:')}: tolerances.forward_current: 10 % is wider " \
        "than the 5 %" in str(info.value)


def test_lowpass_above_nyquist_refused(tmp_path):
    # 1 ns sampling: Nyquist frequency 500 MHz (Nyquist-Shannon sampling theorem)
    seq = _sequence_with_limits(tmp_path, LIMITS, extra="analysis: {lowpass: 600 MHz}\n")
    with pytest.raises(ConfigError, match=r"analysis.lowpass: the low-pass corner 6e\+08 Hz "
                       r"is at or above the Nyquist frequency 5e\+08 Hz"):
        prepare(seq, BENCH, RunOptions(out_dir=tmp_path / "out"))
