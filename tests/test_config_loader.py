"""YAML loading reports file:line:field for every kind of mistake."""

from __future__ import annotations

import pytest

from benchrun.config.loader import Current, StrictModel, Voltage, load_model
from benchrun.errors import ConfigError


class Point(StrictModel):
    bus_voltage: Voltage
    forward_current: Current


class Seq(StrictModel):
    name: str
    points: list[Point]


def write(tmp_path, text):
    path = tmp_path / "seq.yaml"
    path.write_text(text)
    return path


def test_loads_quantities(tmp_path):
    path = write(tmp_path, "name: a\npoints:\n  - bus_voltage: 600 V\n    forward_current: 30 A\n")
    seq = load_model(Seq, path)
    assert seq.points[0].bus_voltage == 600.0
    assert seq.points[0].forward_current == 30.0


def test_wrong_dimension_names_file_line_field(tmp_path):
    text = "name: a\npoints:\n  - bus_voltage: 600 V\n    forward_current: 30 V\n"
    with pytest.raises(ConfigError) as info:
        load_model(Seq, write(tmp_path, text))
    err = info.value
    assert err.line == 4
    assert err.field == "points.0.forward_current"
    assert "seq.yaml:4: points.0.forward_current:" in str(err)


def test_unknown_key_is_an_error(tmp_path):
    text = "name: a\nponts: []\npoints: []\n"
    with pytest.raises(ConfigError) as info:
        load_model(Seq, write(tmp_path, text))
    assert info.value.line == 2
    assert "unknown key" in str(info.value)


def test_missing_key(tmp_path):
    with pytest.raises(ConfigError, match="required"):
        load_model(Seq, write(tmp_path, "name: a\n"))


def test_bad_yaml_has_line(tmp_path):
    with pytest.raises(ConfigError) as info:
        load_model(Seq, write(tmp_path, "name: a\npoints: [\n  - x: : :\n"))
    assert info.value.line is not None
