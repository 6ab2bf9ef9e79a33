"""Worst-case snappiness as a qualification step, end to end on the simulated bench.

The shipped sequence ``sequences/dx4425-worstcase.yaml`` runs the invented snappy part DX-4425
(lot LT-0140) at its nominal point (30 A, 25 degC, 600 V, 10 ohm) and at the worst case for
snappy recovery marked ``qualification: worst_case_snappiness`` (3 A = 10 % of rated, -40 degC,
800 V, 4 ohm: fast commutation).  The simulator's physics (plasma-extent law,
benchrun.simulator.diode_models) makes the part snap there and stay soft at nominal; the
grading (benchrun.grading.worst_case) must flag every device at the worst case, on its worst
shot, and pass every nominal limit.  Expected VRM is VR + Ls·di/dt with Ls = 40 nH from the
bench file (KVL around the commutation loop).
"""

from __future__ import annotations

import csv

import pytest
from test_runner_support import BENCH, ROOT

from benchrun.config import load_bench, load_sequence
from benchrun.config.limits import WorstCaseSpec, load_limits
from benchrun.errors import ConfigError
from benchrun.grading import grade_lot
from benchrun.grading.decision import CONFORMING, INVALID, NONCONFORMING
from benchrun.grading.worst_case import grade_worst_case
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.store.rundata import load_run

SEQUENCE = ROOT / "sequences" / "dx4425-worstcase.yaml"
LIMITS = ROOT / "limits" / "DX-4425.yaml"


@pytest.fixture(scope="module")
def graded(tmp_path_factory):
    out = tmp_path_factory.mktemp("wc")
    bench = load_bench(BENCH)
    with simulated_bench(bench, load_sequence(SEQUENCE)) as sim:
        options = RunOptions(out_dir=out, sim_resources=sim.resources, clock=sim.clock,
                             ratings_lookup=sim.ratings, show_progress=False)
        outcome = run_sequence(SEQUENCE, BENCH, options)
    run = load_run(outcome.run_dir)
    lot = grade_lot(run.shots, load_limits(LIMITS), bench=bench,
                    analysis_options=run.manifest.get("analysis_options"))
    return outcome, run, lot


@pytest.mark.slow
def test_snappy_part_is_flagged_at_the_worst_case_and_passes_at_nominal(graded):
    outcome, _, lot = graded
    assert outcome.status == "complete"
    assert len(lot.worst_case) == 6
    for device in lot.devices:
        nominal = [g for g in device.grades if g.condition == "nominal"]
        assert nominal and all(g.outcome == CONFORMING for g in nominal), device.serial
        step = next(w for w in lot.worst_case if w.serial == device.serial)
        assert step.outcome == NONCONFORMING
        assert step.assessment.snap and "snap" in step.reason
        # graded on the worst of the valid shots at the marked point
        assert step.n >= 3 and step.shot in step.reason
        assert device.verdict == NONCONFORMING
        assert step.reason in device.reasons
    assert lot.disposition == "reject"
    assert lot.to_dict()["worst_case"][0]["assessment"]["stray_inductance_H"] == 40e-9


@pytest.mark.slow
def test_worst_case_point_is_marked_and_metrics_reach_the_curves(graded, tmp_path):
    from benchrun.characterize.curves import write_curves_csv

    _, run, _ = graded
    marked = {s.point.qualification for s in run.shots if s.point.label.startswith("worst")}
    assert marked == {"worst_case_snappiness"}
    path = write_curves_csv(run.shots, tmp_path / "curves.csv")
    with path.open(encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    for key in ("overshoot_V", "ring_amplitude_A", "vrm_dwell_s"):
        assert all(r[key] != "" for r in rows if r["valid"] == "True"), key
    # snap is a per-shot finding with a noise margin (benchrun.analysis.quality.is_snap): the
    # step grades each device on its worst shot, so each device shows it on a shot there,
    # and no shot at the nominal point shows it
    worst = [r for r in rows if r["label"].startswith("worst") and r["valid"] == "True"]
    assert {r["serial"] for r in worst if "snap" in r["flags"].split(";")} == {
        r["serial"] for r in worst}
    nominal = [r for r in rows if r["label"].startswith("nominal")]
    assert nominal and not any("snap" in r["flags"].split(";") for r in nominal)


@pytest.mark.slow
def test_without_the_bench_or_the_limits_block_the_step_is_invalid(graded):
    _, run, lot = graded
    points = {c["name"]: next((s.point for s in run.shots
                               if s.point.index == c["point_index"]), None)
              for c in lot.conditions}
    spec = load_limits(LIMITS).worst_case
    no_ls = grade_worst_case(run.shots, spec, points, stray_inductance_H=None)
    assert {g.outcome for g in no_ls} == {INVALID}
    assert "stray inductance" in no_ls[0].reason
    no_block = grade_worst_case(run.shots, None, points, stray_inductance_H=40e-9)
    assert {g.outcome for g in no_block} == {INVALID}


def test_limits_block_needs_units_and_a_known_condition(tmp_path):
    text = LIMITS.read_text(encoding="utf-8")
    spec = load_limits(LIMITS).worst_case
    assert isinstance(spec, WorstCaseSpec)
    assert spec.rated_voltage == 1200.0 and spec.max_overshoot_excess == pytest.approx(0.10)
    assert spec.max_ring_decay == pytest.approx(100e-9)
    bare = tmp_path / "bare.yaml"
    bare.write_text(text.replace("max_ring_decay: 100 ns", "max_ring_decay: 100"))
    with pytest.raises(ConfigError, match="max_ring_decay"):
        load_limits(bare)
    wrong = tmp_path / "wrong.yaml"
    wrong.write_text(text.replace("  condition: worst-case\n  rated_voltage",
                                  "  condition: coldest\n  rated_voltage"))
    with pytest.raises(ConfigError, match="coldest"):
        load_limits(wrong)


@pytest.mark.slow
def test_the_report_table_carries_the_step_reason(graded):
    from benchrun.report.facts_gather import _device_lines

    _, _, lot = graded
    lines, _ = _device_lines(lot)
    worst = [line for line in lines if line.condition == "worst-case"]
    assert len(worst) == 6
    assert all("worst-case snappiness at worst-case failed" in line.note for line in worst)


@pytest.mark.slow
def test_a_lot_graded_across_runs_grades_the_step_with_each_benchs_stray_inductance(
        graded, capsys):
    # grade --lot (and report --lot, verify of a lot report) grade through grade_across, whose
    # instrument inputs merge several benches: the step must still take Ls from the bench
    # that made each run, and agree with the one-run grade (KVL: VRM against VR + Ls·di/dt)
    import json

    from benchrun import cli

    outcome, _, lot = graded
    db = f"sqlite:///{outcome.run_dir / 'results.db'}"
    assert cli.main(["grade", db, "--lot", "LT-0140", "--json"]) == 0
    across = json.loads(capsys.readouterr().out)
    steps = across["grade"]["worst_case"] if "grade" in across else across["worst_case"]
    assert [s["outcome"] for s in steps] == [w.outcome for w in lot.worst_case]
    assert {s["assessment"]["stray_inductance_H"] for s in steps} == {40e-9}
