"""A lot across runs: two benches each test part of a lot into one store, a device is tested
again, and ``benchrun grade RESULTS --lot LOT`` grades every device once, by the retest rule,
with the sampling plan over the whole lot."""

from __future__ import annotations

import json

import pytest
from test_multibench_ids import bench_file
from test_runner_support import write_sequence

from benchrun import cli
from benchrun.config import load_bench, load_sequence
from benchrun.config.limits import load_limits
from benchrun.grading.across import lot_instrument_inputs
from benchrun.grading.grade import grade_lot
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.store.lotdata import load_lot
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import load_run


def _run(tmp_path, devices: str, bench_id: str, db: str, name: str):
    seq = write_sequence(tmp_path, devices=devices, temperatures="[25 degC]", name=name)
    bench = bench_file(tmp_path, bench_id)
    with simulated_bench(load_bench(bench), load_sequence(seq)) as sim:
        options = RunOptions(out_dir=tmp_path / bench_id, db_url=db,
                             sim_resources=sim.resources, clock=sim.clock,
                             ratings_lookup=sim.ratings, show_progress=False)
        outcome = run_sequence(seq, bench, options)
    assert outcome.status == "complete"
    return outcome


@pytest.fixture(scope="module")
def split_lot(tmp_path_factory):
    """Bench A tests 001 and 002; bench B then tests 003 and tests 001 again."""
    tmp = tmp_path_factory.mktemp("lot")
    db = f"sqlite:///{tmp / 'shared.db'}"
    first = _run(tmp, "[SN0117-001, SN0117-002]", "bench-a", db, "a.yaml")
    second = _run(tmp, "[SN0117-003, SN0117-001]", "bench-b", db, "b.yaml")
    return tmp, db, first, second


def test_the_lot_holds_both_runs_and_the_retest_counts(split_lot):
    _tmp, db, first, second = split_lot
    lot = load_lot(db, "LT-0117")
    assert lot.run_ids == [first.run_id, second.run_id]
    assert lot.device_runs == {"SN0117-001": second.run_id, "SN0117-002": first.run_id,
                               "SN0117-003": second.run_id}
    assert [(s.serial, s.run_id, s.bench_id, s.replaced_by) for s in lot.superseded] == [
        ("SN0117-001", first.run_id, "bench-a", second.run_id)]
    assert lot.bench_ids == ["bench-a", "bench-b"]
    # exactly the counted run's shots of each device, none of the superseded test
    for shot in lot.shots:
        assert shot.run_id == lot.device_runs[shot.serial]
    with ResultsStore(db, create=False) as store:
        all_first = store.shots(first.run_id)
    assert any(s.serial == "SN0117-001" for s in all_first)
    assert len(lot.shots) == len(load_run(db, second.run_id).shots) + sum(
        1 for s in all_first if s.serial == "SN0117-002")


def test_grade_lot_grades_every_device_once_with_the_plan_over_the_whole_lot(split_lot,
                                                                            capsys):
    tmp, db, first, second = split_lot
    assert cli.main(["grade", db, "--lot", "LT-0117", "--json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert sorted(d["serial"] for d in payload["devices"]) == ["SN0117-001", "SN0117-002",
                                                                "SN0117-003"]
    assert payload["statistics"]["count"] == 3
    assert sorted(payload["run_ids"]) == sorted([first.run_id, second.run_id])
    assert payload["lot_runs"]["superseded"][0]["run_id"] == first.run_id
    # each device's grade equals grading that device's counted shots alone (same inputs)
    limits = load_limits(load_run(db, second.run_id).limits_path)  # the run's, as grade uses
    inputs = lot_instrument_inputs([("bench-a", load_bench(tmp / "bench-bench-a.yaml")),
                                    ("bench-b", load_bench(tmp / "bench-bench-b.yaml"))])
    options = load_run(db, second.run_id).manifest["analysis_options"]
    second_shots = [s for s in load_run(db, second.run_id).shots if s.serial == "SN0117-001"]
    alone = grade_lot(second_shots, limits, bench=inputs,
                      analysis_options=options).device("SN0117-001")
    graded = next(d for d in payload["devices"] if d["serial"] == "SN0117-001")
    assert graded["values"]["25C"] == json.loads(json.dumps(alone.to_dict()["values"]["25C"]))
    # and the whole lot's verdicts are those of grading exactly the counted shots
    counted = grade_lot(load_lot(db, "LT-0117").shots, limits, bench=inputs,
                        analysis_options=options)
    assert {d["serial"]: d["verdict"] for d in payload["devices"]} == {
        d.serial: d.verdict for d in counted.devices}
    first_shots = [s for s in load_run(db, first.run_id).shots if s.serial == "SN0117-001"]
    earlier = grade_lot(first_shots, limits, bench=inputs,
                        analysis_options=options).device("SN0117-001")
    assert earlier.values["25C"] != alone.values["25C"]  # the retest: another measurement


def test_grade_lot_text_names_runs_benches_and_the_superseded_test(split_lot, capsys):
    _tmp, db, first, second = split_lot
    assert cli.main(["grade", db, "--lot", "LT-0117"]) == 0
    out = capsys.readouterr().out
    assert f"run {first.run_id}  bench bench-a" in out
    assert f"run {second.run_id}  bench bench-b" in out
    assert f"superseded: SN0117-001 in run {first.run_id}" in out
    assert "Retest rule:" in out


def test_unknown_lot_is_one_clear_line(split_lot, capsys):
    _tmp, db, _first, _second = split_lot
    assert cli.main(["grade", db, "--lot", "LT-9999"]) != 0
    err = capsys.readouterr().err
    assert "no run of lot 'LT-9999'" in err and "Traceback" not in err
