"""Crash-and-signal suite: real ``benchrun run`` processes on the simulated bench stopped at
random moments (fixed seeds) by kill -9, SIGINT, SIGTERM twice and a full disk (a file-size
limit, and a real small tmpfs where the test may mount one), then ``--resume``d. Every time:
0 shots lost or duplicated (raw record and results database agree shot for shot, every
planned test has its shot, nothing stored before the stop changed), and the safe state
reached and recorded wherever the process survived the stop."""

from __future__ import annotations

import json
import os
import random
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from test_runner_resume import stored_count
from test_runner_support import BENCH, write_sequence

from benchrun.store.raw import RawRecord
from benchrun.store.rundata import load_run

DEVICES = "[SN0117-001, SN0117-002]"
REPEATS = 6
PLANNED = 2 * REPEATS
#: touch-safe limit, IEC 61140 / IEC 62368-1 ES1
TOUCH_SAFE_V = 60.0


def run_cmd(seq: Path, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "benchrun.cli", "run", str(seq), "--bench", str(BENCH),
            "--out", str(out), "--no-progress", *extra]


def sequence(tmp_path: Path) -> Path:
    return write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]",
                          repeats=REPEATS)


def wait_stored(proc: subprocess.Popen, out: Path, shots: int, seconds: float = 120) -> bool:
    """Wait until ``shots`` results rows exist; False when the run ended first."""
    deadline = time.monotonic() + seconds
    while stored_count(out) < shots:
        if proc.poll() is not None:
            return False
        assert time.monotonic() < deadline, "the run did not store shots in time"
        time.sleep(0.005)
    return True


def snapshot(run_dir: Path) -> dict:
    run = load_run(run_dir)
    return {(s.serial, s.point.index, s.repeat, s.attempt): s.to_dict() for s in run.shots}


def resume_and_check(seq: Path, out: Path, before: dict) -> None:
    """``--resume`` to the end; then 0 shots lost or duplicated."""
    done = subprocess.run(run_cmd(seq, out, "--resume"), capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "Traceback" not in done.stderr
    [run_dir] = list(out.iterdir())
    run = load_run(run_dir)
    identities = [(s.serial, s.point.index, s.repeat, s.attempt) for s in run.shots]
    assert len(identities) == len(set(identities)), "a shot is duplicated"
    assert not run.pending
    tests = {(s.serial, s.point.index, s.repeat) for s in run.shots if s.valid}
    assert len(tests) == PLANNED, "a planned test has no shot"
    with RawRecord(run_dir / "raw.h5", "r") as raw:
        raw_keys = sorted(raw.keys())
    assert raw_keys == sorted(s.raw_ref.split("/", 1)[1] for s in run.shots), \
        "raw record and results database disagree"
    after = {(s.serial, s.point.index, s.repeat, s.attempt): s.to_dict() for s in run.shots}
    for key, row in before.items():
        assert after[key] == row, f"shot {key} stored before the stop changed"
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == "complete"
    assert manifest["safe_state"]["reached"] is True


def assert_survived_safely(proc_out: str, run_dir: Path, status: str) -> None:
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == status, manifest.get("error")
    assert manifest["safe_state"]["reached"] is True
    assert manifest["safe_state"]["bus_voltage_V"] < TOUCH_SAFE_V
    assert "safe state: pulse output off, supply off" in proc_out


def check_stopped(run_dir: Path, before: dict) -> dict:
    """After a stop: nothing stored before it changed or vanished, no shot twice, raw record
    and database agree but for shots still to complete; returns the new snapshot."""
    now = snapshot(run_dir)
    for key, row in before.items():
        assert now.get(key) == row, f"shot {key} changed or vanished"
    run = load_run(run_dir)
    identities = [(s.serial, s.point.index, s.repeat, s.attempt)
                  for s in run.shots + run.pending]
    assert len(identities) == len(set(identities)), "a shot is duplicated"
    return now


#: The stops of one run, in order: each resumed session is the next one's victim.
STOPS = (
    ("kill -9", (signal.SIGKILL,)),
    ("SIGINT", (signal.SIGINT,)),
    ("SIGTERM twice", (signal.SIGTERM, signal.SIGTERM)),
    ("kill -9", (signal.SIGKILL,)),
    ("SIGTERM then SIGINT", (signal.SIGTERM, signal.SIGINT)),
)


@pytest.mark.slow
@pytest.mark.parametrize("seed", [11])
def test_kill_9_and_signals_at_random_moments_then_resume(tmp_path, seed):
    rng = random.Random(seed)
    seq, out = sequence(tmp_path), tmp_path / "runs"
    before: dict = {}
    for number, (name, signals) in enumerate(STOPS):
        extra = ("--resume",) if number else ()
        proc = subprocess.Popen(run_cmd(seq, out, *extra), stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        target = stored_count(out) + rng.randint(1, 2)
        assert wait_stored(proc, out, target), f"{name}: the run ended before the stop"
        for signum in signals:
            time.sleep(rng.uniform(0.0, 0.03))  # anywhere inside the following shot
            proc.send_signal(signum)
        stdout, stderr = proc.communicate(timeout=120)
        [run_dir] = list(out.iterdir())
        if signals == (signal.SIGKILL,):
            assert proc.returncode == -signal.SIGKILL
        else:  # the process survived the signals: safe state reached and recorded
            assert proc.returncode == 130, f"{name}: {stderr}"
            assert "Traceback" not in stderr
            assert_survived_safely(stdout, run_dir, "interrupted")
        before = check_stopped(run_dir, before)
    assert len({(k[0], k[1], k[2]) for k in before}) < PLANNED
    resume_and_check(seq, out, before)


def _limit_file_size(limit: int):
    def limit_it() -> None:
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return limit_it


@pytest.mark.slow
def test_disk_full_by_a_file_size_limit(tmp_path):
    # RLIMIT_FSIZE: a write past the limit fails (EFBIG) as on a full disk; Python ignores
    # SIGXFSZ, so the process lives on and must reach the safe state
    seq, out = sequence(tmp_path), tmp_path / "runs"
    proc = subprocess.run(run_cmd(seq, out), capture_output=True, text=True, timeout=300,
                          preexec_fn=_limit_file_size(1_200_000))
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert "Traceback" not in proc.stderr and "Logging error" not in proc.stderr
    [run_dir] = list(out.iterdir())
    assert_survived_safely(proc.stdout, run_dir, "aborted")
    before = snapshot(run_dir)
    assert 0 < len(before) < PLANNED
    resume_and_check(seq, out, before)


@pytest.mark.slow
def test_disk_full_on_a_small_tmpfs(tmp_path):
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("mounting a tmpfs needs root")
    mnt = tmp_path / "small"
    mnt.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1500k", "tmpfs", str(mnt)],
                             capture_output=True, text=True)
    if mounted.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {mounted.stderr.strip()}")
    try:
        seq, out = sequence(tmp_path), mnt / "runs"
        proc = subprocess.run(run_cmd(seq, out), capture_output=True, text=True, timeout=300)
        assert proc.returncode == 2, proc.stdout + proc.stderr
        assert "Traceback" not in proc.stderr and "Logging error" not in proc.stderr
        [run_dir] = list(out.iterdir())
        assert_survived_safely(proc.stdout, run_dir, "aborted")
        before = snapshot(run_dir)
        subprocess.run(["mount", "-o", "remount,size=64m", str(mnt)], check=True)
        resume_and_check(seq, out, before)
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)
