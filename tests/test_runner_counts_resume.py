"""A resumed run's ``run.json`` ``counts`` are the run's totals over every session
(runner/run_counts.py): stored and valid shots equal what the results store holds for the
run (the rows the acceptance report is made from), trim shots are the sum over the sessions,
and each session keeps its own figures under ``sessions``; the counts are on disk as each
shot is stored (a ``kill -9`` leaves them).

Runs on the simulated bench. The reference is the results store itself (independent of the
runner's tallies): the counts must equal its rows; no physics value is checked here.
"""

from __future__ import annotations

import json

import pytest
from test_runner_support import BENCH, Crash, crashing_on_call, write_didt_sweep

from benchrun.config import load_bench, load_sequence
from benchrun.report.manifest import build_manifest
from benchrun.runner import run_counts
from benchrun.runner.execute import RunOptions, run_sequence
from benchrun.runner.run_counts import merge_counts
from benchrun.runner.simbench import simulated_bench
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import load_run


def _counts(run_dir):
    return json.loads((run_dir / "run.json").read_text())["counts"]


@pytest.mark.slow
def test_resumed_run_counts_are_the_stores_rows_and_every_sessions_trim_shots(
        tmp_path, monkeypatch):
    seq = write_didt_sweep(tmp_path)
    out = tmp_path / "runs"
    outcomes = []
    on_disk: list[tuple[int, dict]] = []
    # every stored shot writes the counts (by default at most one write a second)
    monkeypatch.setattr(run_counts, "STORED_WRITE_INTERVAL_S", 0.0)

    def look(result):  # while the run goes on: are the counts already in run.json?
        on_disk.append((len(on_disk), _counts(next(out.iterdir()))))

    with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
        options = dict(out_dir=out, sim_resources=sim.resources, clock=sim.clock,
                       ratings_lookup=sim.ratings, show_progress=False,
                       on_finish=outcomes.append)
        original = ResultsStore.record_pending
        # the 4th shot dies being stored: it is in the raw record only (the resume analyses
        # it from there); the shots after it are left to the resume
        monkeypatch.setattr(ResultsStore, "record_pending",
                            crashing_on_call(original, 4, Crash))
        with pytest.raises(Crash):
            run_sequence(seq, BENCH, RunOptions(on_stored=look, **options))
        monkeypatch.setattr(ResultsStore, "record_pending", original)
        run_dir = next(out.iterdir())
        first = _counts(run_dir)
        crashed = load_run(run_dir)
        outcome = run_sequence(seq, BENCH, RunOptions(resume=True, **options))
    assert outcome.status == "complete"
    start, resume = outcomes
    assert start.status == "aborted"

    # after the crash: the store's rows, session 0's figures
    assert first["stored"] == len(crashed.shots) >= 3
    assert first["valid"] == sum(s.valid for s in crashed.shots)
    assert [e["session"] for e in first["sessions"]] == [0]
    assert first["sessions"][0]["status"] == "aborted"
    assert first["trim"] == start.trim_shots >= 1

    # each stored shot found the session's count (and its trim shots) already in run.json
    assert [c["sessions"][-1]["stored"] for _, c in on_disk] == \
        list(range(1, len(on_disk) + 1))
    assert all(c["trim"] >= 1 for _, c in on_disk)

    counts = _counts(run_dir)
    run = load_run(run_dir)  # what the acceptance report is made from
    assert counts["recounted"] is True and counts["pending"] == len(run.pending) == 0
    assert counts["stored"] == len(run.shots)
    assert counts["valid"] == sum(1 for s in run.shots if s.valid and not s.pending)
    # the resume stored fewer than the run holds: a last-session figure would under-report
    assert resume.shots_stored < counts["stored"]
    assert resume.shots_recovered >= 1  # the shot that died being stored
    assert counts["trim"] == start.trim_shots + resume.trim_shots
    assert counts["recovered"] == start.shots_recovered + resume.shots_recovered
    assert [e["session"] for e in counts["sessions"]] == [0, 1]
    assert [e["status"] for e in counts["sessions"]] == ["aborted", "complete"]
    assert [e["trim"] for e in counts["sessions"]] == [start.trim_shots, resume.trim_shots]
    assert counts["sessions"][1]["stored"] == resume.shots_stored
    assert counts["sessions"][1]["skipped"] == resume.shots_skipped > 0
    assert resume.counts == counts
    # every shot of the run is in the store and stored once (4 points, 2 repeats)
    assert len({(s.point.index, s.repeat, s.attempt) for s in run.shots}) == len(run.shots)
    assert counts["stored"] >= 8
    # the signed report's manifest of result rows counts the same rows
    rows = [e for e in build_manifest(run) if e.kind == "rows"]
    assert [e.size for e in rows] == [counts["stored"]]


def test_merge_counts_sums_trims_keeps_sessions_and_takes_the_store_recount():
    s0 = {"session": 0, "status": "aborted", "stored": 3, "valid": 3, "recovered": 0,
          "trim": 5, "skipped": 0}
    after0 = merge_counts(None, s0, (3, 3, 0))
    assert after0 == {"stored": 3, "valid": 3, "pending": 0, "recovered": 0, "trim": 5,
                      "recounted": True, "sessions": [s0]}
    s1 = {"session": 1, "status": "complete", "stored": 6, "valid": 5, "recovered": 1,
          "trim": 4, "skipped": 3}
    after1 = merge_counts(after0, s1, (10, 9, 0))
    assert (after1["stored"], after1["valid"], after1["trim"], after1["recovered"]) == \
        (10, 9, 9, 1)
    assert after1["sessions"] == [s0, s1]
    # written again in the same session (a later save): its entry is replaced, not added
    s1_later = {**s1, "stored": 7, "trim": 6}
    again = merge_counts(after1, s1_later, None, base=(4, 4, 0))
    assert again["sessions"] == [s0, s1_later] and again["trim"] == 11
    assert (again["stored"], again["valid"], again["recounted"]) == (11, 9, False)
    assert "pending" not in again
    # no recount at all (the store could not be read): earlier totals + this session's
    blind = merge_counts(after0, s1, None)
    assert (blind["stored"], blind["valid"]) == (3 + 1 + 6, 3 + 1 + 5)
    # counts written before sessions were kept become one incomplete earlier entry
    legacy = merge_counts({"stored": 3, "valid": 2, "recovered": 0, "trim": 5}, s1,
                          (10, 8, 1))
    assert legacy["sessions"][0] == {"session": 0, "stored": 3, "valid": 2, "recovered": 0,
                                     "trim": 5, "incomplete": True}
    assert legacy["trim"] == 9
    assert after0["sessions"][0] is not s0  # arguments are not shared or changed


class _Shot:
    def __init__(self, valid, pending=False):
        self.valid, self.pending = valid, pending


class _Store:
    def __init__(self, shots):
        self.rows = shots

    def shots(self, run_id):
        if self.rows is None:
            from benchrun.errors import StoreError

            raise StoreError("the results database cannot be reached")
        return self.rows


def test_run_counts_recount_pending_rows_and_fall_back_when_the_store_cannot_be_read(
        tmp_path):
    """RunCounts on its own: a pending row is stored, not valid; a store that cannot be
    read at the end leaves the start's recount plus the session's figures, marked not
    recounted; every save is in run.json."""
    from benchrun.runner.execute import RunOutcome
    from benchrun.runner.run_counts import RunCounts, store_totals

    rows = [_Shot(True), _Shot(False), _Shot(False, pending=True)]
    assert store_totals(_Store(rows), "R") == (3, 1, 1)
    earlier = merge_counts(None, {"session": 0, "status": "aborted", "stored": 3, "valid": 1,
                                  "recovered": 0, "trim": 2, "skipped": 0}, (3, 1, 1))
    manifest = {"run_id": "R", "resumes": [{"at": "t"}], "counts": earlier}
    outcome = RunOutcome("R", tmp_path, "sqlite://")
    outcome.shots_recovered = 1  # the pending row analysed from the raw record: now valid
    now = [0.0]
    counts = RunCounts(tmp_path, manifest, outcome, stored_interval_s=1.0,
                       clock=lambda: now[0])
    counts.start(_Store([_Shot(True), _Shot(False), _Shot(True)]))
    assert _counts(tmp_path)["stored"] == 3 and _counts(tmp_path)["valid"] == 2
    assert _counts(tmp_path)["pending"] == 0
    counts.watch()
    outcome.tally("trim_shots")  # a trim shot is written at once
    assert _counts(tmp_path)["trim"] == 3
    outcome.tally("shots_stored")
    outcome.tally("shots_valid")  # within a second of the last write: not written yet
    assert (_counts(tmp_path)["stored"], _counts(tmp_path)["valid"]) == (3, 2)
    now[0] = 1.0
    outcome.tally("shots_stored")
    outcome.tally("shots_valid", 0)  # an invalid shot, a second after the last write: written
    on_disk = _counts(tmp_path)
    assert (on_disk["stored"], on_disk["valid"]) == (5, 3)
    now[0] = 1.5
    outcome.tally("trim_shots")  # a trim shot is written at once, whatever the interval
    assert _counts(tmp_path)["trim"] == 4
    assert on_disk["sessions"][1]["status"] == "running"  # a kill -9 now leaves this
    outcome.status = "aborted"
    blind = counts.merged(_Store(None))
    assert (blind["stored"], blind["valid"], blind["recounted"]) == (5, 3, False)
    assert blind["trim"] == 4 and blind["recovered"] == 1


def test_the_run_command_prints_the_run_totals_after_a_resume(tmp_path, capsys):
    from benchrun.commands.run import print_outcome
    from benchrun.runner.execute import RunOutcome

    sessions = [{"session": 0, "stored": 3, "valid": 3, "trim": 2},
                {"session": 1, "stored": 5, "valid": 4, "trim": 1}]
    outcome = RunOutcome("R", tmp_path, "sqlite://", status="complete", shots_stored=5,
                         shots_valid=4, trim_shots=1,
                         counts={"stored": 9, "valid": 8, "trim": 3, "sessions": sessions})
    print_outcome(outcome)
    text = capsys.readouterr().out
    assert "5 stored this session" in text
    assert "run totals:  9 shots stored (8 valid) over 2 sessions, 3 trim shots" in text
    outcome.counts = {"stored": 5, "valid": 4, "trim": 1, "sessions": sessions[1:]}
    print_outcome(outcome)
    assert "run totals" not in capsys.readouterr().out


@pytest.mark.slow
def test_kill_9_leaves_the_sessions_counts_and_the_resume_adds_to_them(tmp_path):
    """A real ``kill -9`` (a subprocess held after its 5th analysed row, as in
    test_runner_resume.py): run.json keeps the killed session's counts (status ``running``,
    its trim shots); the resume's counts equal the store's rows and add its trim shots."""
    import subprocess

    from test_runner_resume import DEVICES, cli, kill_9_after
    from test_runner_support import write_sequence

    seq = write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]", repeats=2)
    out = tmp_path / "runs"
    run_dir = kill_9_after(seq, out, shots=3)
    left = _counts(run_dir)
    killed = left["sessions"]
    assert [(e["session"], e["status"]) for e in killed] == [(0, "running")]
    # the first device was trimmed (first pulse) before its first shot: written at once
    assert killed[0]["trim"] >= 1
    assert left["trim"] == killed[0]["trim"]
    # stored shots are written at most once a second (run_counts.STORED_WRITE_INTERVAL_S):
    # the killed session's own figure may lag the store, never exceed it
    stored_then = load_run(run_dir)
    assert killed[0]["stored"] <= left["stored"] <= \
        len(stored_then.shots) + len(stored_then.pending)

    done = subprocess.run(cli("run", str(seq), "--bench", str(BENCH), "--out", str(out),
                              "--resume", "--no-progress"),
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    counts = _counts(run_dir)
    run = load_run(run_dir)
    assert counts["stored"] == len(run.shots) >= 8
    assert counts["valid"] == sum(s.valid for s in run.shots) >= 8
    assert counts["sessions"][0] == killed[0]  # the killed session's figures are kept
    assert counts["sessions"][1]["status"] == "complete"
    assert counts["trim"] == killed[0]["trim"] + counts["sessions"][1]["trim"]
    assert counts["sessions"][1]["stored"] < counts["stored"]
    assert (f"run totals:  {counts['stored']} shots stored ({counts['valid']} valid) over 2 "
            f"sessions, {counts['trim']} trim shots") in done.stdout
