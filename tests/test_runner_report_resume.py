"""A run started with a signing identity and killed (kill -9) while its report was signed:
``--resume`` writes the report instead of saying there is nothing to resume. Real
subprocesses on the simulated bench."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys

import pytest
from report_helpers import PASSPHRASE
from test_runner_support import BENCH, write_sequence

from benchrun.report.keys import PASSPHRASE_ENV, new_identity
from benchrun.report.verify import verify_report
from benchrun.store.rundata import load_run

#: ``benchrun`` whose process dies (SIGKILL to itself) in the middle of signing the report.
DIES_WHILE_SIGNING = """
import os
import signal
import sys

from benchrun import cli
from benchrun.report import render


def sign_pdf_bytes(*args, **kwargs):
    os.kill(os.getpid(), signal.SIGKILL)


render.sign_pdf_bytes = sign_pdf_bytes
sys.exit(cli.main(sys.argv[1:]))
"""


@pytest.mark.slow
def test_resume_writes_the_report_a_kill_during_signing_prevented(tmp_path):
    identity = new_identity("R. Signer", tmp_path / "keys", PASSPHRASE, role="Test Engineer")
    seq = write_sequence(tmp_path, devices="[SN0117-001, SN0117-002]",
                         temperatures="[25 degC]")
    out = tmp_path / "runs"
    env = {**os.environ, PASSPHRASE_ENV: PASSPHRASE}
    args = ["run", str(seq), "--bench", str(BENCH), "--out", str(out), "--no-progress",
            "--sign-key", str(identity.key_path), "--sign-cert", str(identity.cert_path)]
    killed = subprocess.run([sys.executable, "-c", DIES_WHILE_SIGNING, *args], env=env,
                            capture_output=True, text=True, timeout=300)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    run_dir = next(out.iterdir())
    assert json.loads((run_dir / "run.json").read_text())["status"] == "complete"
    assert not (run_dir / "report.pdf").exists()
    shots_before = [s.to_dict() for s in load_run(run_dir).shots]

    done = subprocess.run([sys.executable, "-m", "benchrun.cli", *args, "--resume"], env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "report" in done.stdout and "(signed)" in done.stdout
    assert [p.name for p in out.iterdir()] == [run_dir.name]
    assert [s.to_dict() for s in load_run(run_dir).shots] == shots_before  # nothing fired
    result = verify_report(run_dir / "report.pdf", cert=identity.cert_path)
    assert result.ok, [c for c in result.checks if not c.ok]

    again = subprocess.run([sys.executable, "-m", "benchrun.cli", *args, "--resume"],
                           env=env, capture_output=True, text=True, timeout=300)
    assert again.returncode == 2
    assert "nothing to resume" in again.stderr


@pytest.mark.slow
def test_resume_of_a_complete_run_without_its_report_needs_the_identity(tmp_path):
    identity = new_identity("R. Signer", tmp_path / "keys", PASSPHRASE, role="Test Engineer")
    seq = write_sequence(tmp_path, devices="[SN0117-001]", temperatures="[25 degC]")
    out = tmp_path / "runs"
    env = {**os.environ, PASSPHRASE_ENV: PASSPHRASE}
    args = ["run", str(seq), "--bench", str(BENCH), "--out", str(out), "--no-progress"]
    signing = ["--sign-key", str(identity.key_path), "--sign-cert", str(identity.cert_path)]
    killed = subprocess.run([sys.executable, "-c", DIES_WHILE_SIGNING, *args, *signing],
                            env=env, capture_output=True, text=True, timeout=300)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    plain = subprocess.run([sys.executable, "-m", "benchrun.cli", *args, "--resume"],
                           env=env, capture_output=True, text=True, timeout=300)
    assert plain.returncode == 2
    assert "signed report was never written" in plain.stderr
    assert "Traceback" not in plain.stderr
