"""A resumed run keeps the di/dt control record of every session (``run.json``
``didt_control``, runner/didt_record.py): the points controlled before a crash keep their
entry, a point controlled again keeps the earlier session's entry beside the latest, and the
record is on disk as soon as a point is trimmed (a ``kill -9`` does not lose it).

Runs on the simulated bench; the di/dt reference is the runner's stated definition
(:func:`benchrun.runner.didt.commutation_didt`), as in test_runner_didt_control.py. The
tolerance (20 %) is common practice for di/dt.
"""

from __future__ import annotations

import json

import pytest
from test_runner_support import BENCH, Crash, crashing_on_call, write_didt_sweep

from benchrun.config import load_bench, load_sequence
from benchrun.runner.didt_record import merge_didt_records, merge_points_invalid
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.plan import expand_points
from benchrun.runner.simbench import simulated_bench
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import load_run


def _on_disk(run_dir):
    return json.loads((run_dir / "run.json").read_text())


@pytest.mark.slow
def test_resume_keeps_every_sessions_didt_record(tmp_path, monkeypatch):
    seq = write_didt_sweep(tmp_path)
    out = tmp_path / "runs"
    points = [p.index for p in expand_points(load_sequence(seq))]
    assert len(points) == 4
    seen_on_disk: list[tuple[int, float, dict]] = []

    def look(result):  # while the run goes on: is the record already in run.json?
        run_dir = next(out.iterdir())
        seen_on_disk.append((result.point.index, result.acquisition["gate_resistance_ohm"],
                             _on_disk(run_dir).get("didt_control") or {}))

    with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
        options = dict(out_dir=out, sim_resources=sim.resources, clock=sim.clock,
                       ratings_lookup=sim.ratings, show_progress=False)
        original = ResultsStore.record_pending
        # the 3rd shot (point 1's first) dies being stored: it is in the raw record only (the
        # resume analyses it from there); point 1's second shot is left to the resume
        monkeypatch.setattr(ResultsStore, "record_pending",
                            crashing_on_call(original, 3, Crash))
        with pytest.raises(Crash):
            run_sequence(seq, BENCH, RunOptions(on_stored=look, **options))
        monkeypatch.setattr(ResultsStore, "record_pending", original)
        run_dir = next(out.iterdir())
        crashed = load_run(run_dir)
        first = _on_disk(run_dir)["didt_control"]["points"]
        done_before = {s.point.index for s in crashed.shots}
        outcome = run_sequence(seq, BENCH, RunOptions(resume=True, **options))
    assert outcome.status == "complete"

    # each stored shot found its point's trimmed setting already written to run.json
    assert seen_on_disk
    for index, rg, record in seen_on_disk:
        assert record["points"][str(index)]["gate_resistance_ohm"] == rg

    manifest = _on_disk(run_dir)
    assert len(manifest["resumes"]) == 1
    record = manifest["didt_control"]["points"]
    assert sorted(record, key=int) == [str(i) for i in points]  # every point's record
    for index in points:
        entry = record[str(index)]
        assert entry["valid"] and entry["trim_shots"] >= 1, index
        assert entry["session"] in (0, 1)
    # a point all of whose shots were stored before the crash keeps session 0's entry as is
    finished_before = {i for i in done_before
                       if sum(1 for s in crashed.shots if s.point.index == i and s.valid) == 2}
    assert finished_before  # the crash came after point 0's two shots
    for index in finished_before:
        assert record[str(index)] == {**first[str(index)], "session": 0}
    # the points the resume fired were controlled (trimmed) by it
    run = load_run(run_dir)
    resumed_points = {s.point.index for s in run.shots
                      if s.timestamp > manifest["resumes"][0]["at"]}
    assert resumed_points and not resumed_points & finished_before
    for index in resumed_points:
        entry = record[str(index)]
        assert entry["session"] == 1
        if str(index) in first:  # controlled in both sessions: the earlier entry is kept
            assert entry["earlier"] == [{**first[str(index)], "session": 0}]
    assert any("earlier" in record[str(i)] for i in resumed_points), \
        "the crash was meant to fall in the middle of a point's shots"
    # the trim shots of both sessions are in the record
    trims = sum(e["trim_shots"] + sum(x["trim_shots"] for x in e.get("earlier", []))
                for e in record.values())
    assert trims >= len(points) + 1


def test_merge_latest_session_wins_earlier_kept_and_stale_invalid_dropped():
    s0 = {"means": "resistors", "tolerance": 0.2, "model_k": 1.0,
          "points": {"0": {"valid": True, "trim_shots": 2, "session": 0},
                     "1": {"valid": False, "reason": "between resistors", "trim_shots": 4,
                           "session": 0}}}
    s1 = {"means": "resistors", "tolerance": 0.2, "model_k": 2.0,
          "points": {"1": {"valid": True, "trim_shots": 1}, "2": {"valid": True,
                                                               "trim_shots": 1}}}
    merged = merge_didt_records(s0, s1, 1)
    assert merged["model_k"] == 2.0
    assert merged["points"]["0"] == s0["points"]["0"]
    assert merged["points"]["1"] == {"valid": True, "trim_shots": 1, "session": 1,
                                     "earlier": [s0["points"]["1"]]}
    assert merged["points"]["2"]["session"] == 1
    s2 = {"points": {"1": {"valid": True, "trim_shots": 3}}}
    again = merge_didt_records(merged, s2, 2)
    assert [e["session"] for e in again["points"]["1"]["earlier"]] == [0, 1]
    assert "earlier" not in again["points"]["1"]["earlier"][1]
    assert merge_didt_records(s0, None, 1) == s0
    assert s0["points"]["1"]["session"] == 0 and "earlier" not in s0["points"]["1"]
    # point 1 was invalid in session 0 and fired in session 1: no longer "not fired"
    assert merge_points_invalid({"1": "between resistors", "3": "beyond"}, {5: "x"},
                                {"1", "2"}) == {"3": "beyond", "5": "x"}


def test_record_is_written_at_each_trim_and_a_point_controlled_again_leaves_points_invalid(
        tmp_path):
    """DidtRecord on its own: run.json holds the merged record right after a trim, and the
    point left invalid by the earlier session drops out of points_invalid once this session
    controlled it again (set valid)."""
    from benchrun.config.gate_drive import GateDriveSpec
    from benchrun.records import TestPoint
    from benchrun.runner.didt_record import DidtRecord
    from benchrun.runner.didt_trim import DidtControl
    from benchrun.store.rundata import write_manifest

    gate = GateDriveSpec.model_validate(
        {"resistors": ["4.7 ohm", "10 ohm", "22 ohm", "47 ohm"], "drive_voltage": "15 V",
         "threshold_voltage": "4 V", "transconductance": "12 S",
         "input_capacitance": "10 nF"})
    earlier = {"means": "resistors", "tolerance": 0.2,
               "points": {"0": {"valid": True, "trim_shots": 1, "session": 0},
                          "1": {"valid": False, "reason": "missed", "trim_shots": 4,
                                "session": 0}}}
    manifest = {"run_id": "R", "resumes": [{"at": "t"}], "didt_control": earlier,
                "points_invalid": {"1": "missed"}}
    write_manifest(tmp_path, manifest)
    record = DidtRecord(tmp_path, manifest)
    control = record.watch(DidtControl(gate, 0.2))
    point = TestPoint(index=1, temperature_K=298.15, bus_voltage_V=600.0,
                      forward_current_A=20.0, didt_A_per_s=6e8, label="p1")
    state = control.trim(point, lambda setting: 6e8)  # lands on the target
    assert state.valid
    on_disk = _on_disk(tmp_path)["didt_control"]["points"]
    assert on_disk["0"] == earlier["points"]["0"]
    assert on_disk["1"]["session"] == 1 and on_disk["1"]["valid"]
    assert on_disk["1"]["earlier"] == [earlier["points"]["1"]]
    assert record.points_invalid({}) == {}
    assert record.points_invalid({3: "beyond"}) == {"3": "beyond"}
