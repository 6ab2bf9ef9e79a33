"""Signals and write failures while a run ends: a second SIGTERM (or SIGINT) during the
safe-state procedure is deferred until the safe state is reached, recorded and printed; the
procedure has a hard time bound; a run log that cannot be written costs no safe state.
Real subprocesses on the simulated bench where signals are concerned."""

from __future__ import annotations

import errno
import json
import logging
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from test_runner_resume import stored_count
from test_runner_support import BENCH, write_sequence

from benchrun.runner.interrupts import bounded
from benchrun.runner.safety import SafeStateReport

DEVICES = "[SN0117-001, SN0117-002, SN0117-003, SN0117-004]"

#: ``benchrun`` with the safe-state procedure announcing itself (a marker file) and taking a
#: second before it starts, so the test's further signals land inside it.
SLOW_SAFE_STATE = """
import sys
import time
from pathlib import Path

from benchrun import cli
from benchrun.runner.station import Station

marker = Path(sys.argv[1])
original = Station.make_safe


def make_safe(self):
    marker.write_text("making safe")
    time.sleep(1.0)
    return original(self)


Station.make_safe = make_safe
sys.exit(cli.main(sys.argv[2:]))
"""


def start_run(tmp_path: Path, script: str, *args: str) -> tuple[subprocess.Popen, Path, Path]:
    seq = write_sequence(tmp_path, devices=DEVICES, temperatures="[25 degC]", repeats=20)
    out = tmp_path / "runs"
    marker = tmp_path / "marker"
    proc = subprocess.Popen([sys.executable, "-c", script, str(marker), "run", str(seq),
                             "--bench", str(BENCH), "--out", str(out), "--no-progress", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while stored_count(out) < 2:
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the run did not store shots in time"
        time.sleep(0.01)
    return proc, out, marker


def wait_for(path: Path, proc: subprocess.Popen, seconds: float = 60) -> None:
    deadline = time.monotonic() + seconds
    while not path.exists():
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline
        time.sleep(0.005)


@pytest.mark.slow
@pytest.mark.parametrize("second", [signal.SIGTERM, signal.SIGINT])
def test_second_signal_during_the_safe_state_is_deferred(tmp_path, second):
    proc, out, marker = start_run(tmp_path, SLOW_SAFE_STATE)
    proc.send_signal(signal.SIGTERM)
    wait_for(marker, proc)
    proc.send_signal(second)  # process managers send more than one
    proc.send_signal(signal.SIGTERM)
    stdout, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 130, stderr
    assert "Traceback" not in stderr
    run_dir = next(out.iterdir())
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["status"] == "interrupted"  # never "running" left behind
    assert manifest["safe_state"]["reached"] is True
    assert manifest["safe_state"]["bus_voltage_V"] < 60.0  # IEC 61140 / IEC 62368-1 ES1
    assert "safe state: pulse output off, supply off" in stdout
    assert "deferred until the safe state was reached" in (run_dir / "run.log").read_text()


def test_safe_state_procedure_has_a_hard_bound():
    def hangs() -> SafeStateReport:
        time.sleep(5)
        return SafeStateReport(reached=True)

    start = time.monotonic()
    report = bounded(hangs, 0.2)
    assert time.monotonic() - start < 2.0
    assert not report.reached
    assert "did not finish within" in report.describe()
    assert "SAFE STATE NOT CONFIRMED" in report.describe()


class _FullDisk:
    """A file object whose writes fail as on a full disk once ``room`` bytes are used."""

    def __init__(self, real, room: int) -> None:
        self.real, self.room = real, room

    def write(self, text: str) -> int:
        if len(text) > self.room:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        self.room -= len(text)
        return self.real.write(text)

    def flush(self) -> None:
        self.real.flush()

    def close(self) -> None:
        self.real.close()


@pytest.mark.slow
def test_run_log_on_a_full_disk_still_reaches_and_reports_the_safe_state(tmp_path, capsys,
                                                                           monkeypatch):
    from test_runner_run import run_sim

    from benchrun.runner import progress

    original = progress.RunLogHandler._open

    def full_after_a_few_lines(self):
        return _FullDisk(original(self), room=600)

    monkeypatch.setattr(progress.RunLogHandler, "_open", full_after_a_few_lines)
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]")
    seen: list = []
    outcome, (pulse_on, supply_on, bus) = run_sim(seq, tmp_path / "out",
                                                  on_finish=seen.append)
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err and "Logging error" not in captured.err
    assert captured.err.count("cannot be written") == 1
    assert outcome.status == "complete"
    assert outcome.safe_state is not None and outcome.safe_state.reached
    assert not pulse_on and not supply_on and bus < 60.0
    assert seen == [outcome]  # the outcome (with its safe state) was handed on for printing
    assert any("run log could not be written" in w for w in outcome.warnings)
    manifest = json.loads((outcome.run_dir / "run.json").read_text())
    assert manifest["status"] == "complete" and manifest["safe_state"]["reached"]
    logging.getLogger("benchrun").info("after the run: no handler left that fails")
