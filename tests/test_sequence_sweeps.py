"""Sweeps in a sequence file: a grid of test points, expanded, de-duplicated, and still held to
the part's ratings and the bench's safety limits before anything is energised."""

from __future__ import annotations

from pathlib import Path

import pytest

from benchrun.config.sequence import MAX_SWEEP_POINTS, load_sequence
from benchrun.errors import ConfigError, SafetyError
from benchrun.runner.plan import expand_points

ROOT = Path(__file__).resolve().parents[1]
BENCH = ROOT / "sequences" / "bench-sim.yaml"

HEAD = ("part: DX-4425\nlot: LT-0140\ndevices: [SN0140-001]\n"
        "ratings: {vrrm: 1200 V, if_max: 30 A, tj_max: 150 degC, tj_min: -40 degC%s}\n")
TAIL = ("tolerances: {forward_current: 5 %, didt: 20 %, reverse_voltage: 5 %, "
        "temperature: 3 K}\n"
        "timing: {off_time: 3 us, second_pulse: 1 us}\n")


def _write(tmp_path, body, ifrm=""):
    path = tmp_path / "seq.yaml"
    path.write_text(HEAD % ifrm + body + TAIL)
    return path


def test_a_sweep_expands_into_every_combination_at_every_temperature(tmp_path):
    seq = load_sequence(_write(tmp_path, (
        "sweeps:\n"
        "  - label: grid\n"
        "    bus_voltage: [400 V, 800 V]\n"
        "    forward_current: [3 A, 15 A, 30 A]\n"
        "    didt: 600 A/us\n"
        "    temperatures: [-40 degC, 25 degC, 125 degC]\n")))
    points = expand_points(seq)
    assert len(points) == 2 * 3 * 3
    combos = {(p.bus_voltage_V, p.forward_current_A, round(p.temperature_K, 2)) for p in points}
    assert len(combos) == 18
    assert all(p.didt_A_per_s == pytest.approx(6e8) for p in points)
    assert {round(p.temperature_K - 273.15) for p in points} == {-40, 25, 125}
    assert points[0].label == "grid: 400 V, 3 A, 600 A/us @ -40 degC"


def test_crossing_sweeps_test_their_common_point_once(tmp_path):
    seq = load_sequence(_write(tmp_path, (
        "test_points:\n"
        "  - {label: nominal, bus_voltage: 600 V, forward_current: 30 A, didt: 600 A/us,"
        " temperatures: [25 degC]}\n"
        "sweeps:\n"
        "  - {label: IF, bus_voltage: 600 V, forward_current: [15 A, 30 A], didt: 600 A/us,"
        " temperatures: [25 degC, 125 degC]}\n"
        "  - {label: didt, bus_voltage: 600 V, forward_current: 30 A,"
        " didt: [300 A/us, 600 A/us], temperatures: [25 degC, 125 degC]}\n")))
    points = expand_points(seq)
    keys = [(p.forward_current_A, p.didt_A_per_s, round(p.temperature_K, 2)) for p in points]
    assert len(keys) == len(set(keys))  # nothing fired twice under two names
    # 30 A at 600 A/us: nominal at 25 degC, the IF sweep's at 125 degC only
    assert sorted(p.label for p in points if p.forward_current_A == 30.0
                  and p.didt_A_per_s == 6e8) == ["IF: 600 V, 30 A, 600 A/us @ 125 degC",
                                                 "nominal @ 25 degC"]
    assert len(points) == 1 + 3 + 2


@pytest.mark.parametrize("sweep, message", [
    ("{bus_voltage: 600 V, forward_current: [3 A, 30 A], temperatures: [25 degC]}",
     "'didt' targets or 'gate_resistance'"),
    ("{bus_voltage: 600 V, forward_current: [3 A, 3 A], didt: 600 A/us,"
     " temperatures: [25 degC]}", "listed twice"),
    ("{bus_voltage: 600 V, forward_current: [3 A, 30 A], didt: [600 A/us],"
     " gate_resistance: 10 ohm, temperatures: [25 degC]}", "one of them"),
    ("{bus_voltage: 600 V, forward_current: [3 uF], didt: 600 A/us,"
     " temperatures: [25 degC]}", "current"),
])
def test_sweep_mistakes_are_refused_at_file_and_line(tmp_path, sweep, message):
    with pytest.raises(ConfigError) as err:
        load_sequence(_write(tmp_path, f"sweeps:\n  - {sweep}\n"))
    assert message in str(err.value)
    assert "seq.yaml:6: sweeps.0" in str(err.value)


def test_a_runaway_grid_is_refused(tmp_path):
    currents = ", ".join(f"{i} A" for i in range(1, 31))
    volts = ", ".join(f"{v} V" for v in range(100, 1000, 50))
    assert MAX_SWEEP_POINTS < 30 * 18
    with pytest.raises(ConfigError, match="at most"):
        load_sequence(_write(tmp_path, f"sweeps:\n  - {{bus_voltage: [{volts}], "
                                       f"forward_current: [{currents}], didt: 600 A/us, "
                                       "temperatures: [25 degC]}\n"))


def test_no_points_at_all_is_refused(tmp_path):
    with pytest.raises(ConfigError, match="'test_points' or 'sweeps'"):
        load_sequence(_write(tmp_path, ""))


def test_a_sweep_beyond_the_ratings_is_refused_before_energising(tmp_path):
    """10-200 % of the rated 30 A: 60 A exceeds IF max unless the sequence states IFRM, and the
    bench's own current limit still holds (IF plus the second pulse's rise)."""
    from benchrun.runner.execute import RunOptions, prepare

    body = ("sweeps:\n  - {bus_voltage: 600 V, forward_current: [3 A, 30 A, 60 A],"
            " didt: 600 A/us, temperatures: [25 degC]}\n")
    with pytest.raises(SafetyError, match=r"60 A exceeds the part's rating 30 A \(IF max\)"):
        prepare(_write(tmp_path, body), BENCH, RunOptions(out_dir=tmp_path / "runs"))
    # with IFRM = 60 A stated the rating allows it, the bench's 60 A limit does not:
    # 60 A + 600 V x 1 us / 200 uH = 63 A (ideal inductor)
    with pytest.raises(SafetyError) as err:
        prepare(_write(tmp_path, body, ", ifrm: 60 A"), BENCH,
                RunOptions(out_dir=tmp_path / "runs"))
    assert "rating" not in str(err.value)
    assert "exceeds the bench limit 60 A" in str(err.value)
    ok = ("sweeps:\n  - {bus_voltage: 600 V, forward_current: [3 A, 30 A, 45 A],"
          " didt: 600 A/us, temperatures: [25 degC]}\n")
    prepare(_write(tmp_path, ok, ", ifrm: 60 A"), BENCH, RunOptions(out_dir=tmp_path / "runs"))


def test_the_shipped_characterisation_sweep_is_sane():
    """The shipped DX-4425 sweep: IF 10-150 % of rated, di/dt, VR and temperature (three or
    more, down to sub-zero), a nominal and a worst-case snappiness point, and it passes the
    pre-flight checks on the example bench."""
    from benchrun.runner.execute import RunOptions, prepare

    path = ROOT / "sequences" / "dx4425-characterize.yaml"
    seq = load_sequence(path)
    points = expand_points(seq)
    assert len(points) <= 60 and seq.devices != "all"
    rated = seq.ratings.if_max
    currents = {p.forward_current_A / rated for p in points}
    assert min(currents) == pytest.approx(0.1) and max(currents) >= 1.5
    assert len({p.didt_A_per_s for p in points}) >= 4
    assert len({p.bus_voltage_V for p in points}) >= 3
    temps = {p.temperature_K for p in points}
    assert len(temps) >= 3 and min(temps) < 273.15
    worst = [p for p in points if p.label.startswith("worst-case")]
    assert len(worst) == 1
    w = worst[0]
    assert 0.05 <= w.forward_current_A / rated <= 0.10
    assert w.temperature_K == min(temps) and w.bus_voltage_V == max(p.bus_voltage_V
                                                                      for p in points)
    assert w.didt_A_per_s >= 6e8  # faster than the nominal point
    assert any(p.label.startswith("nominal") for p in points)
    prep = prepare(path, BENCH, RunOptions(out_dir=Path("/nonexistent")))
    assert prep.bench.fixture.gate_drive is not None
