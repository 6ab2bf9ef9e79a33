"""Crash safety: kill -9 mid-run then --resume, a crash between the raw record and the DB,
and SIGTERM handled like Ctrl-C (safe state first). Real subprocesses on the simulated bench."""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from test_runner_support import BENCH, run_until_crash, write_sequence

from benchrun.config import load_bench, load_sequence
from benchrun.runner.execute import run_sequence
from benchrun.runner.simbench import simulated_bench
from benchrun.store.raw import RawRecord
from benchrun.store.results import ResultsStore
from benchrun.store.rundata import load_run

DEVICES = "[SN0117-001, SN0117-002, SN0117-003, SN0117-004]"


#: The stored shot after which a run that is to be killed holds still (see held_cli).
HOLD_AFTER = 5

#: ``benchrun`` (its ``main``) with one change: after its HOLD_AFTER-th analysed results row
#: the run waits until it is killed or terminated, so a slow test process can never find the
#: run already finished; the kill still lands wherever the run is between the shot the test
#: waited for and that one.
HELD_RUN = """
import sys
import time

from benchrun import cli
from benchrun.store.results import ResultsStore

hold_after = int(sys.argv[1])
original = ResultsStore.complete_shot
stored = {"n": 0}


def complete_shot(self, shot):
    result = original(self, shot)
    stored["n"] += 1
    while stored["n"] >= hold_after:
        time.sleep(0.5)
    return result


ResultsStore.complete_shot = complete_shot
sys.exit(cli.main(sys.argv[2:]))
"""


def cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "benchrun.cli", *args]


def held_cli(*args: str) -> list[str]:
    return [sys.executable, "-c", HELD_RUN, str(HOLD_AFTER), *args]


def stored_count(out: Path) -> int:
    dbs = list(out.glob("*/results.db"))
    if not dbs:
        return 0
    try:
        with sqlite3.connect(f"file:{dbs[0]}?mode=ro", uri=True, timeout=1) as conn:
            return int(conn.execute("select count(*) from shots").fetchone()[0])
    except sqlite3.Error:
        return 0


def start_and_wait(seq: Path, out: Path, shots: int) -> subprocess.Popen:
    assert shots < HOLD_AFTER
    proc = subprocess.Popen(held_cli("run", str(seq), "--bench", str(BENCH), "--out", str(out),
                                     "--no-progress"),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while stored_count(out) < shots:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the run did not store shots in time"
        time.sleep(0.01)
    return proc


def kill_9_after(seq, out, shots: int) -> Path:
    """Start ``benchrun run`` in its own process, kill -9 it once ``shots`` shots are
    stored, and return its run folder."""
    proc = start_and_wait(seq, out, shots=shots)
    assert proc.poll() is None, "the run ended before it could be killed"
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    return next(out.iterdir())


@pytest.mark.slow
def test_kill_9_then_resume_loses_nothing_and_duplicates_nothing(tmp_path):
    seq = write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]", repeats=2)
    out = tmp_path / "runs"
    run_dir = kill_9_after(seq, out, shots=3)
    killed = load_run(run_dir)
    before = {(s.serial, s.point.index, s.repeat, s.attempt): s
              for s in killed.shots + killed.pending}
    with RawRecord(run_dir / "raw.h5", "r") as raw:
        raw_before = set(raw.keys())
    # at most: HOLD_AFTER analysed rows plus the pending row of the shot fired after them
    assert 3 <= len(before) <= HOLD_AFTER + 1 < 8

    done = subprocess.run(cli("run", str(seq), "--bench", str(BENCH), "--out", str(out),
                              "--resume", "--no-progress"),
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "complete" in done.stdout
    assert [p.name for p in out.iterdir()] == [run_dir.name]  # resumed, not a new run

    after = load_run(run_dir)
    identities = [(s.serial, s.point.index, s.repeat, s.attempt) for s in after.shots]
    assert len(identities) == len(set(identities))  # no duplicate
    valid_tests = {(s.serial, s.point.index, s.repeat) for s in after.shots if s.valid}
    assert len(valid_tests) == 4 * 2  # every planned test has its valid shot
    for key, shot in before.items():  # nothing stored before the kill changed or vanished
        kept = next(s for s in after.shots
                    if (s.serial, s.point.index, s.repeat, s.attempt) == key)
        if shot.pending:
            # recorded before its analysis finished (runner/writer.py): the resume analysed
            # it from the raw record, or fired it again when its raw entry had not landed
            assert not kept.pending and kept.metrics and kept.raw_ref == shot.raw_ref
            if shot.raw_ref.split("/", 1)[1] in raw_before:
                assert kept.timestamp == shot.timestamp
        else:
            assert kept.to_dict() == shot.to_dict()
    assert not after.pending and not any(s.pending for s in after.shots)
    with RawRecord(run_dir / "raw.h5", "r") as raw:  # every raw shot is in the DB and back
        assert sorted(raw.keys()) == sorted(s.raw_ref.split("/", 1)[1] for s in after.shots)
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == "complete"
    assert len(manifest["resumes"]) == 1


class Crash(BaseException):
    """Stands for the process dying between the raw-record write and the DB commit."""


@pytest.mark.slow
def test_shot_in_raw_record_only_is_recovered_not_refired(tmp_path, monkeypatch):
    seq = write_sequence(tmp_path, devices="[SN0117-001, SN0117-002]",
                         temperatures="[25 degC]", repeats=2)
    out = tmp_path / "runs"
    with simulated_bench(load_bench(BENCH), load_sequence(seq)) as sim:
        # the shot's results row is recorded (as pending) by ResultsStore.record_pending
        resumed = run_until_crash(seq, out, sim, monkeypatch, ResultsStore, "record_pending",
                                  3, Crash)
        fired_before = len(sim.bench.shots)
        outcome = run_sequence(seq, BENCH, resumed)
        fired_after = len(sim.bench.shots)
    assert outcome.status == "complete"
    assert outcome.shots_recovered == 1
    run = load_run(outcome.run_dir)
    assert len({(s.serial, s.repeat) for s in run.shots if s.valid}) == 4
    # the recovered shot was not fired again: the resumed session fired one trim shot (t1 is
    # not kept across sessions) plus the one remaining test (4 tests, 3 already stored)
    stored_now = outcome.shots_stored
    assert stored_now == 1
    assert fired_after - fired_before == stored_now + outcome.trim_shots


@pytest.mark.slow
def test_sigterm_reaches_the_safe_state_and_is_recorded(tmp_path):
    seq = write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]", repeats=2)
    out = tmp_path / "runs"
    proc = start_and_wait(seq, out, shots=2)
    proc.send_signal(signal.SIGTERM)
    stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr
    run_dir = next(out.iterdir())
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == "interrupted"
    assert manifest["safe_state"]["reached"] is True
    assert manifest["safe_state"]["bus_voltage_V"] < 60.0  # IEC 61140 / IEC 62368-1 ES1
    assert "safe state" in stdout
