"""``benchrun report``: grade a stored run and sign its report from the command line.

The outcome is checked with the auditor's own tool (``benchrun verify``), and poppler's
``pdftotext`` (an outside PDF reader) must find the disposition in the written PDF.
"""

from __future__ import annotations

import shutil
import subprocess

import pytest
from report_helpers import PASSPHRASE, build_run

from benchrun.cli import main
from benchrun.report.keys import PASSPHRASE_ENV, new_identity
from benchrun.report.verify import verify_report


@pytest.fixture()
def identity(tmp_path):
    return new_identity("T. Okonkwo", tmp_path / "keys", PASSPHRASE, role="Test Engineer")


def test_report_command_signs_a_report_that_verifies(tmp_path, identity, monkeypatch, capsys):
    run_dir = build_run(tmp_path, n_devices=3, failing=(1,))
    monkeypatch.setenv(PASSPHRASE_ENV, PASSPHRASE)
    code = main(["report", str(run_dir), "--key", str(identity.key_path),
                 "--cert", str(identity.cert_path), "--role", "Test Engineer"])
    out = capsys.readouterr().out
    assert code == 0
    # device 2 is above its Irrm limit at 25 °C (report_helpers) → the lot is rejected
    assert "disposition reject" in out
    assert "LT-0117-002" in out
    pdf = run_dir / "report.pdf"
    result = verify_report(pdf, cert=identity.cert_path)
    assert result.ok, [c.to_dict() for c in result.checks]
    if shutil.which("pdftotext"):
        text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True,
                              timeout=60, check=True).stdout
        assert "Lot disposition: reject" in text


def test_report_command_needs_a_complete_identity(tmp_path, identity, monkeypatch, capsys):
    run_dir = build_run(tmp_path, n_devices=2, failing=())
    monkeypatch.setenv(PASSPHRASE_ENV, PASSPHRASE)
    code = main(["report", str(run_dir), "--key", str(identity.key_path)])
    assert code == 2
    assert "--cert" in capsys.readouterr().err
    assert not (run_dir / "report.pdf").exists()


def test_report_command_refuses_a_wrong_passphrase(tmp_path, identity, monkeypatch, capsys):
    run_dir = build_run(tmp_path, n_devices=2, failing=())
    monkeypatch.setenv(PASSPHRASE_ENV, "not the passphrase")
    code = main(["report", str(run_dir), "--key", str(identity.key_path),
                 "--cert", str(identity.cert_path)])
    err = capsys.readouterr().err
    assert code == 2
    assert "wrong passphrase" in err
    assert "not the passphrase" not in err
    assert not (run_dir / "report.pdf").exists()


def test_run_loads_the_signer_before_anything_fires(tmp_path, identity, monkeypatch, capsys):
    # a wrong passphrase must surface before the bench is touched: no run folder is made
    from report_helpers import ROOT

    monkeypatch.setenv(PASSPHRASE_ENV, "not the passphrase")
    out = tmp_path / "runs"
    code = main(["run", str(ROOT / "sequences" / "dx5203-demo.yaml"),
                 "--bench", str(ROOT / "sequences" / "bench-sim.yaml"), "--out", str(out),
                 "--no-progress", "--sign-key", str(identity.key_path),
                 "--sign-cert", str(identity.cert_path)])
    assert code == 2
    assert "wrong passphrase" in capsys.readouterr().err
    assert not out.exists() or not any(out.iterdir())


def test_shots_not_yet_analysed_are_left_out_with_a_warning(tmp_path, identity, monkeypatch,
                                                           capsys):
    # a run stopped between a shot and its analysis holds a pending results row (its raw
    # entry may not exist): grading and the report leave it out and say so, and the report
    # still verifies (re-analysis never meets the pending row)
    import dataclasses

    from benchrun.records import FLAG_ANALYSIS_PENDING
    from benchrun.store.results import ResultsStore
    from benchrun.store.rundata import default_store_url, load_run

    run_dir = build_run(tmp_path, n_devices=2, failing=())
    stored = load_run(run_dir).shots
    pending = dataclasses.replace(stored[0], repeat=1, metrics={}, valid=False,
                                  flags=(FLAG_ANALYSIS_PENDING,), acquisition={},
                                  raw_ref="shots/999999")
    with ResultsStore(default_store_url(run_dir)) as store:
        store.record_pending(pending)
    run = load_run(run_dir)
    assert run.pending == [pending] and len(run.shots) == len(stored)

    assert main(["grade", str(run_dir)]) == 0
    assert "1 shot(s) of run R-DEMO-0001 were recorded but not analysed" in (
        capsys.readouterr().err)
    monkeypatch.setenv(PASSPHRASE_ENV, PASSPHRASE)
    code = main(["report", str(run_dir), "--key", str(identity.key_path),
                 "--cert", str(identity.cert_path), "--role", "Test Engineer"])
    captured = capsys.readouterr()
    assert code == 0 and "--resume" in captured.err
    result = verify_report(run_dir / "report.pdf", cert=identity.cert_path)
    assert result.ok, [c.to_dict() for c in result.checks]
