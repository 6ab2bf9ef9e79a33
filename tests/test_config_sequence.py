"""Sequence file schema: part, lot, devices, test points, tolerances, settings."""

from __future__ import annotations

from pathlib import Path

import pytest

from benchrun.config.sequence import limits_path, load_sequence
from benchrun.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]

SEQ = """\
part: DX-4417
lot: LT-0117
devices: [A001, A002]
limits: ../limits/DX-4417.yaml
test_points:
  - bus_voltage: 600 V
    forward_current: 30 A
    temperatures: [25 degC, 125 degC]
    gate_resistance: 10 ohm
    repeats: 3
    shot_spacing: 200 ms
tolerances: {forward_current: 5 %, didt: 20 %, reverse_voltage: 4 %, temperature: 2 degC}
"""


def write(tmp_path, text, name="seq.yaml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_example_sequences_load():
    for path in sorted((ROOT / "sequences").glob("*.yaml")):
        if path.name.startswith("bench"):
            continue
        seq = load_sequence(path)
        assert seq.part and seq.lot
        assert seq.test_points


def test_quantities(tmp_path):
    seq = load_sequence(write(tmp_path, SEQ))
    point = seq.test_points[0]
    assert point.bus_voltage == 600.0
    assert point.forward_current == 30.0
    assert point.temperatures == pytest.approx([298.15, 398.15])  # kelvin inside
    assert point.shot_spacing == pytest.approx(0.2)
    assert seq.tolerances.forward_current == pytest.approx(0.05)
    assert seq.tolerances.didt == pytest.approx(0.2)
    assert seq.tolerances.temperature == pytest.approx(2.0)  # a difference, not 275.15 K
    assert seq.devices == ["A001", "A002"]
    assert seq.trim.mode == "single_pulse"


@pytest.mark.parametrize(("key", "bare"), [
    ("didt", "0.2"), ("forward_current", "5"), ("temperature", "2"), ("reverse_voltage", "'0.04'"),
])
def test_tolerance_without_unit_is_refused_at_its_line(tmp_path, key, bare):
    """A tolerance is written with its unit (5 %, 2 K): a bare number is refused at file:line."""
    text = SEQ.replace(
        "tolerances: {forward_current: 5 %, didt: 20 %, reverse_voltage: 4 %, temperature: 2 degC}",
        "tolerances:\n  forward_current: 5 %\n  didt: 20 %\n  reverse_voltage: 4 %\n"
        "  temperature: 2 K\n")
    lines = text.splitlines()
    number = next(i for i, line in enumerate(lines) if line.startswith(f"  {key}:")) + 1
    lines[number - 1] = f"  {key}: {bare}"
    path = write(tmp_path, "\n".join(lines) + "\n")
    with pytest.raises(ConfigError) as info:
        load_sequence(path)
    assert str(info.value).startswith(f"{path}:{number}: tolerances.{key}: ")
    assert "has no unit" in str(info.value)


def test_limits_path_relative_to_sequence(tmp_path):
    path = write(tmp_path, SEQ)
    seq = load_sequence(path)
    assert limits_path(seq, path) == (tmp_path / "../limits/DX-4417.yaml").resolve()


def test_needs_gate_resistance_or_didt(tmp_path):
    text = SEQ.replace("    gate_resistance: 10 ohm\n", "")
    with pytest.raises(ConfigError) as info:
        load_sequence(write(tmp_path, text))
    assert "gate_resistance" in str(info.value)
    assert info.value.line == 6


def test_didt_target_accepted(tmp_path):
    text = SEQ.replace("gate_resistance: 10 ohm", "didt: 500 A/us")
    seq = load_sequence(write(tmp_path, text))
    assert seq.test_points[0].didt == pytest.approx(5e8)


@pytest.mark.parametrize(
    ("old", "new", "field"),
    [
        ("forward_current: 30 A", "forward_current: 30 V", "test_points.0.forward_current"),
        ("repeats: 3", "repeats: 0", "test_points.0.repeats"),
        ("forward_current: 5 %", "forward_current: 150 %", "tolerances.forward_current"),
        ("temperature: 2 degC", "temperature: 2 A", "tolerances.temperature"),
        ("lot: LT-0117", "lot: LT-0117\nlott: x", "lott"),
        ("devices: [A001, A002]", "devices: [A001, A001]", "devices"),
    ],
)
def test_errors_name_field(tmp_path, old, new, field):
    with pytest.raises(ConfigError) as info:
        load_sequence(write(tmp_path, SEQ.replace(old, new)))
    assert info.value.field is not None and info.value.field.startswith(field)
    assert info.value.line is not None
    assert str(tmp_path / "seq.yaml") in str(info.value)


def test_low_voltage_trim_needs_voltage(tmp_path):
    with pytest.raises(ConfigError, match="bus_voltage"):
        load_sequence(write(tmp_path, SEQ + "trim: {mode: low_voltage}\n"))


def test_analysis_options_map_to_recovery_options(tmp_path):
    seq = load_sequence(write(tmp_path, SEQ + "analysis: {trr_method: threshold, "
                                              "lowpass: 200 MHz}\n"))
    values = seq.analysis.option_values()
    assert values["trr_method"] == "threshold"
    assert values["lowpass_hz"] == pytest.approx(2e8)
    assert values["fit_high"] == 0.9 and values["fit_low"] == 0.25  # DESIGN §3 defaults
