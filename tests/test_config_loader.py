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


# -- duplicate keys, tags, dates, sizes (a hostile or mistyped file never loads silently) ----
ROOT_DIR = __import__("pathlib").Path(__file__).resolve().parents[1]


def _with(tmp_path, source: str, old: str, new: str, name: str):
    text = (ROOT_DIR / source).read_text(encoding="utf-8")
    assert old in text
    path = tmp_path / name
    path.write_text(text.replace(old, new, 1), encoding="utf-8")
    return path


def _line_of(path, needle: str, nth: int = 1) -> int:
    hits = [i + 1 for i, line in enumerate(path.read_text().splitlines()) if needle in line]
    return hits[nth - 1]


def test_duplicate_key_in_bench_names_both_lines(tmp_path):
    from benchrun.config import load_bench

    # a second max_current would raise a safety limit silently (last one wins in plain YAML)
    path = _with(tmp_path, "sequences/bench-sim.yaml", "  max_current: 60 A\n",
                 "  max_current: 60 A\n  max_current: 600 A\n", "bench.yaml")
    first, second = _line_of(path, "max_current", 1), _line_of(path, "max_current", 2)
    with pytest.raises(ConfigError) as info:
        load_bench(path)
    assert str(info.value).startswith(f"{path}:{second}: safety.max_current: duplicate key")
    assert f"lines {first} and {second}" in str(info.value)


def test_duplicate_key_in_limits_is_refused(tmp_path):
    from benchrun.config.limits import load_limits

    # a second acceptance_number would turn a rejected lot into an accepted one
    path = _with(tmp_path, "limits/DX-4417.yaml", "  acceptance_number: 0\n",
                 "  acceptance_number: 0\n  acceptance_number: 3\n", "limits.yaml")
    with pytest.raises(ConfigError, match=r"lot.acceptance_number: duplicate key"):
        load_limits(path)


def test_duplicate_key_in_sequence_is_refused(tmp_path):
    from benchrun.config import load_sequence

    path = _with(tmp_path, "sequences/dx4417-demo.yaml", "    repeats: 2\n",
                 "    repeats: 2\n    repeats: 20\n", "seq.yaml")
    line = _line_of(path, "repeats: 20")
    with pytest.raises(ConfigError) as info:
        load_sequence(path)
    assert f"seq.yaml:{line}: test_points.0.repeats: duplicate key" in str(info.value)


def test_same_key_in_different_mappings_is_fine(tmp_path):
    text = ("name: a\npoints:\n  - {bus_voltage: 600 V, forward_current: 30 A}\n"
            "  - {bus_voltage: 400 V, forward_current: 20 A}\n")
    assert len(load_model(Seq, write(tmp_path, text)).points) == 2


def test_huge_quantity_is_refused_with_its_line(tmp_path):
    # 1e308 V passed the parser before and overflowed the stored-energy check (V**2)
    text = "name: a\npoints:\n  - bus_voltage: 1e308 V\n    forward_current: 30 A\n"
    with pytest.raises(ConfigError) as info:
        load_model(Seq, write(tmp_path, text))
    assert "seq.yaml:3: points.0.bus_voltage: '1e308 V' is beyond any bench quantity" in str(
        info.value)


def test_impossible_date_is_reported_at_its_line(tmp_path):
    from benchrun.config import load_bench

    path = _with(tmp_path, "sequences/bench-sim.yaml", "calibration_due: 2030-12-31, timeout",
                 "calibration_due: 2030-02-30, timeout", "bench.yaml")
    with pytest.raises(ConfigError) as info:
        load_bench(path)
    line = _line_of(path, "2030-02-30")
    assert str(info.value).startswith(
        f"{path}:{line}: instruments.scope.calibration_due: '2030-02-30' is not a valid date")


@pytest.mark.parametrize("value", ["!!python/object:os.system {}", "!!binary aGk=",
                                   "!!set {a, b}", "!local x"])
def test_non_plain_tags_are_refused(tmp_path, value):
    with pytest.raises(ConfigError) as info:
        load_model(Seq, write(tmp_path, f"name: {value}\npoints: []\n"))
    assert "seq.yaml:1: name: YAML tag" in str(info.value)
    assert "not allowed" in str(info.value)


def test_merge_keys_are_refused(tmp_path):
    text = "base: &b {bus_voltage: 600 V}\nname: a\npoints:\n  - <<: *b\n    bus_voltage: 1 V\n"
    with pytest.raises(ConfigError, match=r"seq.yaml:4: points.0: YAML key !!merge"):
        load_model(Seq, write(tmp_path, text))


def test_alias_bomb_is_refused_quickly(tmp_path):
    import time

    # nine levels of nine aliases: 9**9 (387 million) values once expanded
    lines = ['a: &a ["x", "x", "x", "x", "x", "x", "x", "x", "x"]']
    for level in range(9):
        this, prev = chr(98 + level), chr(97 + level)
        lines.append(f"{this}: &{this} [{', '.join(['*' + prev] * 9)}]")
    path = write(tmp_path, "\n".join(lines) + "\n")
    started = time.perf_counter()
    with pytest.raises(ConfigError, match="expands to more than 100000 values"):
        load_model(Seq, path)
    assert time.perf_counter() - started < 10  # generous: it stops after 1e5 nodes


def test_recursive_alias_is_refused(tmp_path):
    with pytest.raises(ConfigError, match="nested deeper than"):
        load_model(Seq, write(tmp_path, "name: &n [1, *n]\npoints: []\n"))


def test_oversized_document_is_refused(tmp_path):
    from benchrun.config.loader import MAX_DOCUMENT_BYTES

    path = write(tmp_path, "name: a\npoints: []\n# " + "x" * MAX_DOCUMENT_BYTES + "\n")
    with pytest.raises(ConfigError, match="larger than"):
        load_model(Seq, path)


def test_plain_anchors_and_aliases_still_work(tmp_path):
    text = ("name: a\npoints:\n  - &p {bus_voltage: 600 V, forward_current: 30 A}\n"
            "  - *p\n")
    seq = load_model(Seq, write(tmp_path, text))
    assert seq.points[1].bus_voltage == 600.0
