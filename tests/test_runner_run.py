"""End-to-end runs on the simulated bench: stored shots, conditions, safe state, manifest."""

from __future__ import annotations

import json

import numpy as np
import pytest
from test_runner_support import BENCH, write_sequence

from benchrun.analysis import analyze_channels
from benchrun.config import load_bench, load_sequence
from benchrun.errors import CalibrationOverdue, ConfigError, SafetyError
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.shots import recovery_options
from benchrun.runner.simbench import simulated_bench
from benchrun.store.raw import RawRecord
from benchrun.store.rundata import load_run


def run_sim(seq_path, out, bench_path=BENCH, **kw):
    bench = load_bench(bench_path)
    seq = load_sequence(seq_path)
    with simulated_bench(bench, seq) as sim:
        options = RunOptions(out_dir=out, sim_resources=sim.resources, clock=sim.clock,
                             ratings_lookup=sim.ratings, show_progress=False, **kw)
        outcome = run_sequence(seq_path, bench_path, options)
        state = (sim.bench.instruments["pulse"].output_on, sim.bench.supply.output_on,
                 sim.bench.supply.bus_voltage())
    return outcome, state


@pytest.fixture(scope="module")
def two_temperature_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("run")
    seq = write_sequence(folder, repeats=2)
    return run_sim(seq, folder / "out")


@pytest.mark.slow
def test_every_planned_shot_stored_once(two_temperature_run):
    outcome, _ = two_temperature_run
    assert outcome.status == "complete"
    run = load_run(outcome.run_dir)
    tests = {(s.serial, s.point.index, s.repeat) for s in run.shots if s.valid}
    # 2 devices x 2 temperatures x 2 repeats, each with a valid shot
    assert len(tests) == 8
    identities = [(s.serial, s.point.index, s.repeat, s.attempt) for s in run.shots]
    assert len(identities) == len(set(identities))
    with RawRecord(outcome.run_dir / "raw.h5", "r") as raw:
        assert sorted(raw.keys()) == sorted(s.raw_ref.split("/", 1)[1] for s in run.shots)


@pytest.mark.slow
def test_measured_conditions_hit_the_targets(two_temperature_run):
    # the simulated inductor is 4 % off its nameplate: the trim must correct t1 so the
    # simulator's physics (an independent circuit solution) delivers 30 A +- 5 %
    outcome, _ = two_temperature_run
    run = load_run(outcome.run_dir)
    for shot in run.shots:
        if not shot.valid:
            continue
        assert shot.conditions["if_A"] == pytest.approx(30.0, rel=0.05)
        assert shot.conditions["vr_V"] == pytest.approx(600.0, rel=0.05)
        assert abs(shot.conditions["temperature_K"] - shot.point.temperature_K) <= 1.0
        assert shot.acquisition["adc_bits"] == pytest.approx(8.0, abs=0.01)
    assert outcome.trim_shots >= 1


@pytest.mark.slow
def test_outlier_shows_more_stored_charge_and_heat_raises_it(two_temperature_run):
    # physics: longer carrier lifetime (outlier 004) and higher temperature both raise Qrr
    # (tau(T) grows with T, DESIGN §4); a runner that mixed up devices or points fails this
    outcome, _ = two_temperature_run
    run = load_run(outcome.run_dir)

    def qrr(serial, celsius):
        values = [s.metrics["qrr_C"] for s in run.shots if s.valid and s.serial == serial
                  and abs(s.point.temperature_K - 273.15 - celsius) < 1]
        return float(np.mean(values))

    assert qrr("SN0117-004", 25) > 1.2 * qrr("SN0117-001", 25)
    assert qrr("SN0117-001", 125) > 1.3 * qrr("SN0117-001", 25)


@pytest.mark.slow
def test_reanalysis_of_raw_record_reproduces_stored_metrics(two_temperature_run):
    outcome, _ = two_temperature_run
    run = load_run(outcome.run_dir)
    seq = load_sequence(outcome.run_dir / "sequence.yaml")
    with RawRecord(outcome.run_dir / "raw.h5", "r") as raw:
        for shot in run.shots[:4]:
            stored = raw.read_shot(shot.raw_ref)
            again = analyze_channels(stored.t_start, stored.dt, stored.channels,
                                     stored.probes, recovery_options(seq)).metrics()
            for key, value in shot.metrics.items():
                if value is not None:
                    assert again[key] == value


@pytest.mark.slow
def test_reanalysis_from_the_raw_record_reproduces_flags_with_the_chain_rise_times(
        two_temperature_run):
    # the bench file's bandwidths give each chain a rise time (tr = 0.35/BW, first-order
    # system; benchrun.config.bench.system_rise_time) that rise_time_limited needs: it is
    # stored with every raw shot and the re-analysis (report, verify) uses it
    from benchrun.config.bench import system_rise_time
    from benchrun.report.raw_waveforms import raw_shot_probes, reanalyze_raw_shot

    outcome, _ = two_temperature_run
    run = load_run(outcome.run_dir)
    bench = load_bench(outcome.run_dir / "bench.yaml")
    options = run.manifest.get("analysis_options")
    with RawRecord(outcome.run_dir / "raw.h5", "r") as raw:
        for shot in run.shots[:4]:
            stored = raw.read_shot(shot.raw_ref)
            probes = raw_shot_probes(stored)
            for name in ("diode_current", "diode_voltage"):
                assert probes[name].rise_time_s == pytest.approx(system_rise_time(bench, name))
            _, flags = reanalyze_raw_shot(stored, options)
            assert [f for f in shot.flags if not f.startswith("condition:")] == list(flags)


@pytest.mark.slow
def test_safe_state_and_manifest(two_temperature_run):
    outcome, (pulse_on, supply_on, bus_V) = two_temperature_run
    assert not pulse_on and not supply_on
    assert bus_V < 60.0  # IEC 61140 / IEC 62368-1 ES1 touch-safe limit
    assert outcome.safe_state is not None and outcome.safe_state.reached
    manifest = json.loads((outcome.run_dir / "run.json").read_text())
    assert manifest["status"] == "complete"
    assert set(manifest["instruments"]) == {"scope", "pulse", "supply", "thermal", "handler"}
    assert manifest["safe_state"]["reached"] is True
    assert set(manifest["files"]) >= {"raw.h5", "sequence.yaml", "bench.yaml", "limits.yaml"}
    assert manifest["analysis_options"]["fit_high"] == 0.9
    log = (outcome.run_dir / "run.log").read_text()
    assert "stable at" in log and "safe state" in log


@pytest.mark.parametrize(("old", "new"), [
    ("limits: ", "limits: /nonexistent/"),                       # missing limits file
    ("shot_spacing: 0.02 s", "shot_spacing: 0.02 s\n    repeat: 2"),  # unknown key
])
def test_bad_file_fires_nothing(tmp_path, old, new):
    seq = write_sequence(tmp_path)
    good = load_sequence(seq)
    seq.write_text(seq.read_text().replace(old, new, 1))
    with simulated_bench(load_bench(BENCH), good) as sim:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False)
        with pytest.raises(ConfigError):
            run_sequence(seq, BENCH, options)
        assert sim.bench.shots == []
        assert not sim.bench.supply.output_on
    assert not (tmp_path / "out").exists()


def test_unsafe_setting_refused_before_energising(tmp_path):
    seq = write_sequence(tmp_path, temperatures="[25 degC, 175 degC]")
    bench = load_bench(BENCH)
    with simulated_bench(bench, load_sequence(seq)) as sim:
        options = RunOptions(out_dir=tmp_path / "out", sim_resources=sim.resources,
                             clock=sim.clock, ratings_lookup=sim.ratings, show_progress=False)
        with pytest.raises(SafetyError, match="Tj max"):
            run_sequence(seq, BENCH, options)
        assert sim.bench.shots == []  # nothing fired
        assert not sim.bench.supply.output_on
    assert not (tmp_path / "out").exists()


def test_overdue_calibration_refused_then_overridden_and_recorded(tmp_path):
    import datetime as dt

    seq = write_sequence(tmp_path, devices="[SN0117-002]", temperatures="[25 degC]")
    late = dt.date(2031, 1, 2)  # bench-sim.yaml instruments are due 2030-12-31
    with pytest.raises(CalibrationOverdue, match="overdue"):
        run_sim(seq, tmp_path / "out", today=late)
    outcome, _ = run_sim(seq, tmp_path / "out", today=late, allow_overdue_calibration=True)
    manifest = json.loads((outcome.run_dir / "run.json").read_text())
    assert manifest["allow_overdue_calibration"] is True
    assert any("scope" in text for text in manifest["calibration"]["overdue_override"])
    assert "OVERRIDDEN" in (outcome.run_dir / "run.log").read_text()


@pytest.mark.slow
def test_low_voltage_trim_hits_the_current(tmp_path):
    # trim shots at 100 V with the test's t1 (six times less stored energy), then the
    # inductance found there sets t1 for 600 V: the RL model of DESIGN §4 carries over
    seq = write_sequence(tmp_path, devices="[SN0117-003]", temperatures="[25 degC]",
                         extra="trim: {mode: low_voltage, bus_voltage: 100 V, tolerance: 2 %}\n")
    outcome, state = run_sim(seq, tmp_path / "out")
    assert outcome.status == "complete" and outcome.trim_shots >= 1
    shot = load_run(outcome.run_dir).shots[0]
    assert shot.valid
    assert shot.conditions["if_A"] == pytest.approx(30.0, rel=0.05)
    assert state[2] < 60.0


@pytest.mark.slow
def test_results_in_another_database(tmp_path):
    seq = write_sequence(tmp_path, devices="[SN0117-005]", temperatures="[25 degC]")
    url = f"sqlite:///{tmp_path / 'shared.db'}"
    outcome, _ = run_sim(seq, tmp_path / "out", db_url=url)
    assert not (outcome.run_dir / "results.db").exists()
    manifest = json.loads((outcome.run_dir / "run.json").read_text())
    assert manifest["store_url"] == url
    run = load_run(outcome.run_dir)  # found through the manifest
    assert len(run.shots) == 1 and run.shots[0].valid


@pytest.mark.slow
def test_bleeder_failure_is_reported_loudly(tmp_path, monkeypatch):
    # the bench file says 20 kOhm, the fixture's bleeder has gone open (20 MOhm): the bus
    # holds its charge (RC = 2000 s) and the runner must not claim a safe state
    import dataclasses

    from benchrun.runner import simbench

    real = simbench.sim_fixture
    monkeypatch.setattr(simbench, "sim_fixture", lambda bench: dataclasses.replace(
        real(bench), bleeder_resistance_ohm=20e6))
    seq = write_sequence(tmp_path, devices="[SN0117-005]", temperatures="[25 degC]")
    with pytest.raises(SafetyError, match="DANGER"):
        run_sim(seq, tmp_path / "out")
    run_dir = next((tmp_path / "out").iterdir())
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["safe_state"]["reached"] is False
    assert manifest["safe_state"]["bus_voltage_V"] > 60.0
    assert "SAFE STATE NOT CONFIRMED" in (run_dir / "run.log").read_text()
