"""Junction temperature: energy per shot, the minimum shot interval of the first-order fixture
model, the dwell after a device swap, and the temperature sensor recorded."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from test_runner_support import BENCH, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.errors import SafetyError
from benchrun.instruments.roles import PulseSource
from benchrun.runner.execute import RunOptions, prepare, run_sequence
from benchrun.runner.plan import expand_points, plan_pulses
from benchrun.runner.simbench import simulated_bench
from benchrun.runner.thermal import min_interval, piled_up_rise, shot_energy, shot_heat
from benchrun.store.raw import RawRecord


def test_closed_form_pile_up_matches_a_numerical_solution_of_the_rc_network():
    # independent check: integrate C dT/dt = P(t) - T/R (scipy solve_ivp) for a train of
    # short heat pulses and compare with the geometric-series closed form used for the
    # minimum interval (first-order RC network, common practice)
    tau, rth, energy, interval, shots = 2.0, 1.5, 0.1, 0.05, 40
    cth = tau / rth
    width = 1e-4  # pulse far shorter than tau: the closed form's instantaneous deposit
    power = energy / width

    def rhs(t, y):
        on = (t % interval) < width
        return [(power * on - y[0] / rth) / cth]

    t_end = (shots - 1) * interval + width
    sol = solve_ivp(rhs, (0.0, t_end), [0.0], max_step=width / 4, rtol=1e-8, atol=1e-10)
    numeric = float(sol.y[0, -1])
    assert numeric == pytest.approx(piled_up_rise(energy * rth / tau, interval, tau, shots),
                                    rel=2e-3)


def test_minimum_interval_keeps_the_steady_pile_up_at_the_tolerance():
    rise, interval = min_interval(0.1, 2.0, 1.5, 3.0)
    assert rise == pytest.approx(0.1 * 1.5 / 2.0)
    steady = piled_up_rise(rise, interval, 2.0, 10**6)
    assert steady == pytest.approx(3.0, rel=1e-9)
    assert piled_up_rise(rise, 0.5 * interval, 2.0, 10**6) > 3.0
    assert min_interval(10.0, 2.0, 1.5, 3.0)[1] is None  # one shot alone is too much


def test_energy_per_shot_of_the_demo_point():
    # 600 V, 30 A, L = 200 uH: the inductor still holds 1/2*L*Ipk^2 (about 0.1 J) after the
    # second pulse (energy of an inductor, any circuit-theory text), three orders above Err
    bench = load_bench(BENCH)
    seq = load_sequence(write_sequence_tmp())
    point = expand_points(seq)[0]
    conduction, tail, recovery = shot_energy(point, seq, bench)
    plan = plan_pulses(point, seq, bench.fixture)
    i_pk = 30.0 + 600.0 * plan.second_pulse_s / 200e-6  # RL rise with R*t/L << 1
    assert tail == pytest.approx(0.5 * 200e-6 * i_pk**2, rel=1e-3)
    assert 0.09 < tail < 0.2
    assert conduction == pytest.approx(3.0 * 30.0 * plan.off_time_s)
    # Irrm = 2*IF (expected irrm_fraction), di/dt 1000 A/us: VR*Irrm^2/(di/dt)
    assert recovery == pytest.approx(600.0 * 60.0**2 / 1e9)
    heat = shot_heat(point, seq, bench)
    assert heat.min_interval_s == pytest.approx(
        -2.0 * math.log(1 - heat.energy_J * 1.5 / 2.0 / 3.0))


_TMP: list = []


def write_sequence_tmp():
    import tempfile
    from pathlib import Path

    folder = Path(tempfile.mkdtemp())
    _TMP.append(folder)
    return write_sequence(folder, temperatures="[25 degC]")


def test_a_shot_that_alone_heats_beyond_the_tolerance_is_refused(tmp_path):
    bench = tmp_path / "bench.yaml"
    bench.write_text(BENCH.read_text().replace("thermal_resistance: 1.5 K/W",
                                               "thermal_resistance: 100 K/W"))
    seq = write_sequence(tmp_path, temperatures="[25 degC]")
    with pytest.raises(SafetyError, match="one shot heats the device"):
        prepare(seq, bench, _opts(tmp_path))


def _opts(tmp_path):
    from benchrun.config.sequence import PartRatings

    return RunOptions(out_dir=tmp_path, ratings_lookup=lambda part: PartRatings(
        vrrm=1200.0, if_max=30.0, tj_max=423.15, tj_min=233.15))


class RecordingClock:
    """The simulated bench's clock, recording every wait asked of it."""

    def __init__(self, clock) -> None:
        self.clock, self.sleeps = clock, []

    def monotonic(self) -> float:
        return self.clock.monotonic()

    def sleep(self, seconds: float) -> None:
        self.sleeps.append(seconds)
        self.clock.sleep(seconds)


@pytest.mark.slow
def test_dwell_after_each_swap_spacing_and_sensor_are_applied_and_recorded(tmp_path,
                                                                           monkeypatch):
    seq = write_sequence(tmp_path, devices="[SN0117-001, SN0117-002]",
                         temperatures="[25 degC]", repeats=4)
    seq.write_text(seq.read_text().replace("shot_spacing: 0.02 s", "shot_spacing: 0 s"))
    # a slow fixture (tau 100 s, 300 K/W: a test value) so the thermal interval, about 10 s,
    # is longer than the accelerated bench's own time between shots
    bench_path = tmp_path / "bench.yaml"
    bench_path.write_text(BENCH.read_text()
                          .replace("thermal_time_constant: 2 s", "thermal_time_constant: 100 s")
                          .replace("thermal_resistance: 1.5 K/W", "thermal_resistance: 300 K/W"))
    bench = load_bench(bench_path)
    with simulated_bench(bench, load_sequence(seq)) as sim:
        clock = RecordingClock(sim.clock)
        # every fire command, on the runner's clock, with the device the bench holds
        fired_at: list[tuple[str, float]] = []
        original = PulseSource.fire

        def fire(self, *args, **kwargs):
            fired_at.append((sim.bench.handler.selected, clock.monotonic()))
            return original(self, *args, **kwargs)

        monkeypatch.setattr(PulseSource, "fire", fire)
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=clock, ratings_lookup=sim.ratings, show_progress=False)
        outcome = run_sequence(seq, bench_path, options)
    assert outcome.status == "complete"
    manifest = json.loads((outcome.run_dir / "run.json").read_text())
    thermal = manifest["thermal"]
    assert thermal["temperature_sensor"] == "plate"
    assert thermal["swap_dwell_s"] == pytest.approx(500.0)  # 5 x tau
    interval = thermal["points"]["0"]["min_interval_s"]
    assert 5.0 < interval < 20.0
    # one dwell per device put in the fixture
    assert sum(1 for s in clock.sleeps if s == pytest.approx(500.0)) == 2
    # shots of one device (trim shots included) never closer than the minimum interval
    for device in ("SN0117-001", "SN0117-002"):
        gaps = np.diff([t for serial, t in fired_at if serial == device])
        assert gaps.size >= 3 and gaps.min() >= interval
    with RawRecord(outcome.run_dir / "raw.h5", "r") as raw:
        attrs = [raw.read_shot(key).attrs for key in raw]
    assert attrs and all(a["temperature_sensor"] == "plate" for a in attrs)
