"""Limits files: the examples load, and every kind of mistake is reported at file:line."""

from __future__ import annotations

from pathlib import Path

import pytest
from grading_helpers import LIMITS_YAML, write_limits

from benchrun.config.limits import load_limits
from benchrun.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("name", ["DX-4417.yaml", "DX-5203.yaml"])
def test_example_limits_load(name):
    spec = load_limits(ROOT / "limits" / name)
    assert spec.part == name.removesuffix(".yaml")
    assert len(spec.conditions) == 2
    for condition in spec.conditions:
        assert spec.limits_at(condition.name)


def test_quantities_are_parsed_in_the_metric_dimension(tmp_path):
    spec = load_limits(write_limits(tmp_path))
    cold = {item.metric: item for item in spec.limits_at("25C")}
    assert cold["qrr_C"].max == pytest.approx(3.0e-6)
    assert cold["trr_s"].max == pytest.approx(400e-9)
    assert spec.conditions[1].temperature == pytest.approx(398.15)
    assert spec.tolerances.forward_current == pytest.approx(0.05)
    assert spec.bins is not None and spec.bins.classes[0].max == pytest.approx(4.5e-6)


def test_condition_specific_limit_overrides_the_general_one(tmp_path):
    text = LIMITS_YAML.replace("  - {metric: trr_s, max: 400 ns}\n",
                               "  - {metric: trr_s, max: 400 ns}\n"
                               "  - {metric: trr_s, condition: 25C, max: 250 ns}\n")
    spec = load_limits(write_limits(tmp_path, text))
    assert {i.metric: i.max for i in spec.limits_at("25C")}["trr_s"] == pytest.approx(250e-9)
    assert {i.metric: i.max for i in spec.limits_at("125C")}["trr_s"] == pytest.approx(400e-9)


def _error(tmp_path, old: str, new: str) -> ConfigError:
    assert old in LIMITS_YAML
    path = write_limits(tmp_path, LIMITS_YAML.replace(old, new))
    with pytest.raises(ConfigError) as info:
        load_limits(path)
    return info.value


def _line_of(text: str, needle: str) -> int:
    return next(n for n, line in enumerate(text.splitlines(), 1) if needle in line)


@pytest.mark.parametrize(
    ("old", "new", "needle", "message"),
    [
        # a charge written in volts
        ("{metric: qrr_C, condition: 25C, max: 3.0 uC}",
         "{metric: qrr_C, condition: 25C, max: 30 V}", "30 V", "not a charge"),
        # min > max
        ("{metric: trr_s, max: 400 ns}", "{metric: trr_s, min: 500 ns, max: 400 ns}",
         "500 ns", "greater than max"),
        # unknown metric
        ("{metric: trr_s, max: 400 ns}", "{metric: trrr_s, max: 400 ns}", "trrr_s",
         "unknown metric"),
        # unknown key
        ("aql: 1 %, acceptance_number: 0}", "aql: 1 %, acceptance_numbr: 0}",
         "acceptance_numbr", "unknown key"),
        # a limit at a condition that is not defined
        ("{metric: qrr_C, condition: 125C, max: 6.5 uC}",
         "{metric: qrr_C, condition: 150C, max: 6.5 uC}", "150C", "unknown condition"),
        # the same metric twice at one condition
        ("{metric: trr_s, max: 400 ns}", "{metric: qrr_C, condition: 25C, max: 2 uC}",
         "max: 2 uC", "two limits"),
        # a temperature tolerance in volts
        ("temperature: 3 K}", "temperature: 3 V}", "temperature: 3 V", "temperature"),
        # a bin edge in the wrong dimension
        ("{name: Q1, max: 4.5 uC}", "{name: Q1, max: 4.5 us}", "4.5 us", "not a charge"),
        # neither bound
        ("{metric: trr_s, max: 400 ns}", "{metric: trr_s}", "{metric: trr_s}", "min"),
        # unknown decision rule
        ("decision_rule: {rule: RULE", "decision_rule: {rule: lenient", "lenient", "rule"),
    ],
)
def test_bad_limits_fail_at_file_and_line(tmp_path, old, new, needle, message):
    err = _error(tmp_path, old, new)
    text = LIMITS_YAML.replace(old, new).replace("RULE", "guarded")
    assert err.file is not None and err.file.endswith("l.yaml")
    assert err.line == _line_of(text, needle)
    assert message in str(err)
    assert f"l.yaml:{err.line}:" in str(err)


def test_wrong_dimension_names_the_field(tmp_path):
    err = _error(tmp_path, "{metric: qrr_C, condition: 25C, max: 3.0 uC}",
                 "{metric: qrr_C, condition: 25C, max: 30 V}")
    assert err.field == "limits.0.max"


def test_extra_contributor_needs_exactly_one_bound(tmp_path):
    text = LIMITS_YAML.replace(
        "  coverage_factor: 2\n",
        "  coverage_factor: 2\n  extra:\n    - {metric: qrr_C, name: fixture, relative: 1 %, "
        "absolute: 5 nC}\n",
    )
    with pytest.raises(ConfigError, match="exactly one") as info:
        load_limits(write_limits(tmp_path, text))
    assert info.value.line == _line_of(text, "name: fixture")


def test_missing_file_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="cannot read"):
        load_limits(tmp_path / "absent.yaml")
