"""grade_lot end to end on constructed shots, and regrading a stored run from the CLI.

The shot values are invented demo numbers; the expected outcomes follow from the decision
rules' definitions (ILAC-G8:09/2019 §4.2) and the budgets checked in test_uncertainty.py.
"""

from __future__ import annotations

import json
import random
import shutil
from dataclasses import replace
from pathlib import Path

import pytest
from grading_helpers import COLD, HOT, INPUTS, LIMITS_YAML, shot, write_limits

from benchrun.cli import main
from benchrun.config.limits import load_limits
from benchrun.errors import GradingError
from benchrun.grading import grade_lot
from benchrun.records import TestPoint

ROOT = Path(__file__).resolve().parents[1]


def _lot():
    """S000/S001 good, S002 close to the Qrr limits, S003 Qrr far over at 125 °C,
    S004 only an out-of-tolerance shot at 25 °C and nothing at 125 °C."""
    shots = []
    for index, (qrr_cold, qrr_hot) in enumerate(
        [(2.0e-6, 4.0e-6), (2.2e-6, 5.0e-6), (2.9e-6, 6.0e-6), (2.1e-6, 7.5e-6)]
    ):
        serial = f"S{index:03d}"
        for repeat in range(2):
            shots.append(shot(serial, COLD, repeat, qrr=qrr_cold * (1 + 0.01 * repeat)))
            shots.append(shot(serial, HOT, repeat, qrr=qrr_hot * (1 + 0.01 * repeat),
                              trr=300e-9))
    shots.append(shot("S004", COLD, 0, conditions={"if_A": 25.0}))
    return shots


@pytest.fixture
def limits(tmp_path):
    return load_limits(write_limits(tmp_path))


def test_device_verdicts_bins_and_disposition(limits):
    lot = grade_lot(_lot(), limits, bench=INPUTS)
    verdicts = {d.serial: d.verdict for d in lot.devices}
    assert verdicts == {"S000": "conforming", "S001": "conforming", "S002": "indeterminate",
                        "S003": "non-conforming", "S004": "invalid"}
    assert lot.device("S000").bin == "Q1"   # Qrr(125 °C) 4.02 µC ≤ 4.5 µC
    assert lot.device("S001").bin == "Q2"   # 5.025 µC
    assert lot.device("S003").bin is None   # only conforming devices are binned
    assert lot.disposition == "reject"
    assert any("S003" in r for r in lot.reasons)
    assert any("acceptance number c = 0" in r for r in lot.reasons)
    assert "ILAC-G8:09/2019" in lot.decision_rule


def test_metric_grade_carries_value_uncertainty_and_limits(limits):
    lot = grade_lot(_lot(), limits, bench=INPUTS)
    grade = lot.device("S003").grade("qrr_C", "125C")
    assert grade.n == 2
    assert grade.value == pytest.approx(7.5e-6 * 1.005)
    assert grade.upper == pytest.approx(6.5e-6)
    # k: the t quantile for the budget's Welch-Satterthwaite dof (JCGM 100:2008 G.4.1)
    assert grade.budget.coverage_factor >= 2.0
    assert grade.expanded_uncertainty == pytest.approx(
        grade.budget.coverage_factor * grade.combined_uncertainty)
    assert grade.acceptance_upper == pytest.approx(6.5e-6 - grade.expanded_uncertainty)
    assert grade.outcome == "non-conforming" and grade.statement == "fail"
    assert grade.budget is not None and len(grade.budget.contributors) >= 3
    # value within the guard band below the limit: conditional pass → indeterminate
    near = lot.device("S002").grade("qrr_C", "25C")
    assert near.lower is None and near.upper == pytest.approx(3.0e-6)
    assert near.acceptance_upper < near.value <= near.upper
    assert near.outcome == "indeterminate" and near.statement == "conditional pass"


def test_simple_acceptance_decides_without_a_guard_band(tmp_path):
    simple = load_limits(write_limits(tmp_path, rule="simple"))
    lot = grade_lot(_lot(), simple, bench=INPUTS)
    assert lot.device("S002").verdict == "conforming"   # inside TL, U ignored
    assert lot.device("S003").verdict == "non-conforming"
    assert lot.device("S002").grade("qrr_C", "25C").guard_band == 0.0


def test_invalid_shots_are_never_graded_and_a_retry_counts(limits):
    shots = [
        shot("S010", COLD, 0, attempt=0, conditions={"temperature_K": 305.0}, qrr=9e-6),
        shot("S010", COLD, 0, attempt=1, qrr=2.0e-6),
        shot("S010", COLD, 1, valid=False, qrr=9e-6),
        shot("S010", HOT, 0, qrr=4.0e-6),
    ]
    device = grade_lot(shots, limits, bench=INPUTS).device("S010")
    grade = device.grade("qrr_C", "25C")
    assert grade.n == 1 and grade.value == pytest.approx(2.0e-6)
    assert device.verdict == "conforming"
    assert device.shots["25C"] == {"valid": 1, "invalid": 2}
    assert device.invalid_shots == (
        "25C repeat 0 attempt 0: T 31.85 °C outside 25.00 °C ± 3 K",
        "25C repeat 1 attempt 0: marked invalid at acquisition (no_event)",
    )


def test_condition_flags_are_judged_again_by_the_limits_tolerances(tmp_path, limits):
    # the runner flagged IF 31.8 A (+6 %) against a 5 % sequence tolerance
    flagged = shot("S030", COLD, 0, valid=False, conditions={"if_A": 31.8})
    flagged = replace(flagged, flags=("condition:IF 31.8 A is +6.0 % from 30 A (tolerance 5 %)",))
    shots = [flagged, shot("S030", HOT, 0)]
    assert grade_lot(shots, limits, bench=INPUTS).device("S030").verdict == "invalid"
    wider = load_limits(write_limits(tmp_path, LIMITS_YAML.replace(
        "forward_current: 5 %", "forward_current: 8 %"), name="wide.yaml"))
    assert grade_lot(shots, wider, bench=INPUTS).device("S030").verdict == "conforming"
    # an analysis failure is never re-admitted
    broken = replace(flagged, flags=("no_event",))
    regrade = grade_lot([broken, shot("S030", HOT, 0)], wider, bench=INPUTS)
    assert regrade.device("S030").verdict == "invalid"
    # a warning beside the condition flag does not stop the re-judging (the runner's
    # build_result makes a shot invalid only for its conditions, missing metrics, a clipped
    # diode channel or a pending analysis) ...
    warned = replace(flagged, flags=(*flagged.flags, "undersampled_recovery: tb spans 2.5 "
                                     "samples (need >= 10); not resolved: tb_s"))
    regrade = grade_lot([warned, shot("S030", HOT, 0)], wider, bench=INPUTS)
    assert regrade.device("S030").verdict == "conforming"
    # ... an invalidating flag does
    for reason in ("clipped_diode_current", "metrics_missing: trr_s", "analysis_pending"):
        bad = replace(flagged, flags=(*flagged.flags, reason))
        regrade = grade_lot([bad, shot("S030", HOT, 0)], wider, bench=INPUTS)
        assert regrade.device("S030").verdict == "invalid", reason


def test_missing_required_condition_makes_the_device_invalid(limits):
    device = grade_lot([shot("S020", COLD, 0)], limits, bench=INPUTS).device("S020")
    assert device.verdict == "invalid"
    assert device.grade("qrr_C", "125C").outcome == "invalid"
    assert any("125C" in r for r in device.reasons)
    out_of_tolerance = grade_lot([shot("S022", COLD, 0, conditions={"if_A": 25.0})], limits,
                                 bench=INPUTS)
    assert "IF 25 A outside 30 A ± 5 %" in out_of_tolerance.device("S022").reasons[0]


def test_non_conformity_outweighs_an_invalid_condition(limits):
    device = grade_lot([shot("S021", COLD, 0, qrr=5e-6)], limits, bench=INPUTS).device("S021")
    assert device.verdict == "non-conforming"


def test_statistics_cpk_ratios_and_outliers(limits):
    shots = []
    values = [2.00, 2.10, 1.90, 2.05, 1.95, 2.02, 2.80]  # µC at 25 °C; the last one stands out
    for index, value in enumerate(values):
        serial = f"S{index:03d}"
        for repeat in range(2):
            shots.append(shot(serial, COLD, repeat, qrr=value * 1e-6))
            shots.append(shot(serial, HOT, repeat, qrr=2.5 * value * 1e-6, trr=300e-9))
    lot = grade_lot(shots, limits, bench=INPUTS)
    stats = lot.statistics
    assert stats.count == 7
    qrr_cold = next(m for m in stats.metrics if m.metric == "qrr_C" and m.condition == "25C")
    assert qrr_cold.n == 7
    assert qrr_cold.mean == pytest.approx(sum(values) / 7 * 1e-6)
    # seven devices: below the stated minimum n, the capability is not stated
    assert qrr_cold.cpk is None and qrr_cold.cpk_lower is None
    assert "n = 7 < 25" in qrr_cold.capability_note
    # statistics only for graded metrics (a limit at the condition): no IF, no time stamps
    assert {(m.metric, m.condition) for m in stats.metrics} == {
        ("qrr_C", "25C"), ("qrr_C", "125C"), ("trr_s", "25C"), ("trr_s", "125C")}
    ratio = next(r for r in stats.ratios if r.metric == "qrr_C")
    assert (ratio.hot, ratio.cold) == ("125C", "25C")
    assert ratio.mean == pytest.approx(2.5)
    assert lot.device("S000").ratios["qrr_C"] == pytest.approx(2.5)
    assert {(o.serial, o.metric, o.condition) for o in stats.outliers} >= {
        ("S006", "qrr_C", "25C"), ("S006", "qrr_C", "125C")}
    assert stats.yield_fraction == pytest.approx(stats.conforming / 7)
    budget = lot.budgets["qrr_C@125C"]
    assert budget.expanded == pytest.approx(2 * budget.combined)
    assert any("pooled" in c.name for c in budget.contributors)


def test_to_dict_is_json_safe_and_independent_of_shot_order(limits):
    shots = _lot()
    first = grade_lot(shots, limits, bench=INPUTS).to_dict()
    random.Random(4).shuffle(shots)
    second = grade_lot(shots, limits, bench=INPUTS).to_dict()
    assert json.dumps(first, sort_keys=True, allow_nan=False) == \
        json.dumps(second, sort_keys=True, allow_nan=False)
    assert first["disposition"] == "reject"
    budget = first["devices"][0]["grades"][0]["budget"]
    assert budget["k"] >= 2.0 and budget["U"] == pytest.approx(budget["k"] * budget["u_c"])


def test_limits_of_another_part_cannot_grade(limits):
    with pytest.raises(GradingError, match="DX-5203"):
        grade_lot([shot("S1", COLD, 0, part="DX-5203")], limits, bench=INPUTS)


def test_a_condition_matching_two_test_points_is_an_error(limits):
    other = TestPoint(index=5, temperature_K=298.15, bus_voltage_V=600.0,
                      forward_current_A=15.0, gate_resistance_ohm=10.0, label="half current")
    with pytest.raises(GradingError, match="several test points"):
        grade_lot([shot("S1", COLD, 0), shot("S1", other, 0)], limits, bench=INPUTS)


def _run_folder(tmp_path, limits_text):
    from benchrun.store.results import ResultsStore
    from benchrun.store.rundata import write_manifest

    run_dir = tmp_path / "R-TEST"
    run_dir.mkdir()
    store = ResultsStore(f"sqlite:///{run_dir / 'results.db'}")
    store.create_run("R-TEST", "DX-4417", "LT-0117", {"run_id": "R-TEST"})
    for item in _lot():
        store.add_shot(item)
    write_manifest(run_dir, {"run_id": "R-TEST", "part": "DX-4417", "lot": "LT-0117"})
    (run_dir / "limits.yaml").write_text(limits_text.replace("RULE", "guarded"))
    shutil.copy(ROOT / "sequences" / "bench-sim.yaml", run_dir / "bench.yaml")
    return run_dir


def test_cli_regrades_a_stored_run_against_changed_limits(tmp_path, capsys):
    run_dir = _run_folder(tmp_path, LIMITS_YAML)
    assert main(["grade", str(run_dir), "--json"]) == 0
    original = json.loads(capsys.readouterr().out)
    verdicts = {d["serial"]: d["verdict"] for d in original["devices"]}
    assert verdicts["S003"] == "non-conforming" and verdicts["S002"] == "indeterminate"

    # relax the 125 °C Qrr limit to 9 µC and the 25 °C one to 4 µC: S002 and S003 now pass
    relaxed = LIMITS_YAML.replace("condition: 125C, max: 6.5 uC", "condition: 125C, max: 9 uC")
    relaxed = relaxed.replace("condition: 25C, max: 3.0 uC", "condition: 25C, max: 4 uC")
    changed = write_limits(tmp_path, relaxed, name="relaxed.yaml")
    assert main(["grade", str(run_dir), "--limits", str(changed), "--json"]) == 0
    regraded = json.loads(capsys.readouterr().out)
    verdicts = {d["serial"]: d["verdict"] for d in regraded["devices"]}
    assert verdicts == {"S000": "conforming", "S001": "conforming", "S002": "conforming",
                        "S003": "conforming", "S004": "invalid"}
    assert regraded["limits_file"].endswith("relaxed.yaml")

    # the same stored run graded through the database URL gives the same grades; a database
    # inside the run folder finds the folder's files (bench.yaml) where they are now
    url = f"sqlite:///{run_dir / 'results.db'}"
    assert main(["grade", url, "--json"]) == 0
    via_url = json.loads(capsys.readouterr().out)
    assert via_url["devices"] == original["devices"]
    # a copy of the database away from any run folder has no bench file: name one
    import sqlite3
    from contextlib import closing

    alone = tmp_path / "elsewhere" / "copy.db"
    alone.parent.mkdir()
    with closing(sqlite3.connect(run_dir / "results.db")) as source, \
            closing(sqlite3.connect(alone)) as copy:
        source.backup(copy)
    url = f"sqlite:///{alone}"
    assert main(["grade", url, "--limits", str(run_dir / "limits.yaml"), "--json"]) == 2
    assert "--bench FILE" in capsys.readouterr().err  # the accuracies live in the bench file
    assert main(["grade", url, "--limits", str(run_dir / "limits.yaml"), "--bench",
                 str(run_dir / "bench.yaml"), "--json"]) == 0
    via_url = json.loads(capsys.readouterr().out)
    assert via_url["devices"] == original["devices"]


def test_cli_table_and_errors(tmp_path, capsys):
    run_dir = _run_folder(tmp_path, LIMITS_YAML)
    assert main(["grade", str(run_dir)]) == 0
    out = capsys.readouterr().out
    assert "LOT DISPOSITION: REJECT" in out
    assert "µC" in out and "S003" in out
    bad = tmp_path / "bad.yaml"
    bad.write_text(LIMITS_YAML.replace("max: 3.0 uC", "max: 30 V"))
    assert main(["grade", str(run_dir), "--limits", str(bad)]) == 2
    assert "bad.yaml:" in capsys.readouterr().err
    (run_dir / "limits.yaml").unlink()
    assert main(["grade", str(run_dir)]) == 2
    assert "--limits" in capsys.readouterr().err
