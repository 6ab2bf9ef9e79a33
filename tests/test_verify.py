"""Auditor verification: each kind of tampering is a negative result with the right reason.

Outside references: poppler's ``pdfsig`` must agree with our signature verdict on the
untouched and the tampered PDF (its text is parsed: it exits 0 either way, DESIGN §7);
``sqlite3`` (Python standard library) edits a database row behind the store's back.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
import subprocess

import pytest
from report_helpers import PASSPHRASE, signed_run  # noqa: F401 - session fixture

from benchrun.cli import main
from benchrun.report.keys import new_identity
from benchrun.report.verify import (
    CHECK_MANIFEST,
    CHECK_REANALYSIS,
    CHECK_REGISTRATION,
    CHECK_SIGNATURE,
    CHECK_TRUST,
    verify_report,
)


def _pdfsig(path) -> str:
    if not shutil.which("pdfsig"):
        pytest.skip("poppler-utils not installed")
    return subprocess.run(["pdfsig", str(path)], capture_output=True, text=True, timeout=60,
                          check=False).stdout


def test_untouched_report_verifies(signed_run):  # noqa: F811
    result = verify_report(signed_run.pdf, cert=signed_run.identity.cert_path)
    assert result.ok, [c.to_dict() for c in result.checks]
    assert [c.name for c in result.checks] == [CHECK_SIGNATURE, CHECK_TRUST, CHECK_MANIFEST,
                                               CHECK_REANALYSIS, CHECK_REGISTRATION]
    assert "60 shots re-analysed" in result.check(CHECK_REANALYSIS).reason
    assert "Signature is Valid." in _pdfsig(signed_run.pdf)


def test_cli_verify_exit_codes_and_json(signed_run, capsys, tmp_path):  # noqa: F811
    cert = str(signed_run.identity.cert_path)
    assert main(["verify", str(signed_run.pdf), "--cert", cert]) == 0
    assert "VERIFIED" in capsys.readouterr().out
    assert main(["verify", str(signed_run.pdf), "--cert", cert, "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["ok"] is True and all(c["ok"] for c in data["checks"])
    # without a certificate to trust, trust is not established: exit 1
    assert main(["verify", str(signed_run.pdf)]) == 1
    out = capsys.readouterr().out
    assert "NO   signer trusted" in out and "yes  signature intact" in out


def test_another_certificate_is_not_trusted(signed_run, tmp_path):  # noqa: F811
    stranger = new_identity("Q. Ashdown", tmp_path, PASSPHRASE)  # same name, other key
    result = verify_report(signed_run.pdf, cert=stranger.cert_path)
    assert result.check(CHECK_SIGNATURE).ok
    trust = result.check(CHECK_TRUST)
    assert not trust.ok and "not trusted" in trust.reason
    assert not result.ok


@pytest.mark.parametrize("where", [0.3, 0.6])
def test_one_flipped_byte_in_the_pdf(signed_run, tmp_path, where):  # noqa: F811
    pdf = bytearray(signed_run.pdf.read_bytes())
    # a byte inside the first signed range (before the /Contents hex string)
    start = pdf.index(b"/Contents <")
    offset = int(start * where)
    pdf[offset] ^= 0x01
    tampered = tmp_path / "report.pdf"
    tampered.write_bytes(bytes(pdf))
    result = verify_report(tampered, cert=signed_run.identity.cert_path,
                           data=signed_run.run_dir)
    signature = result.check(CHECK_SIGNATURE)
    assert not signature.ok and not result.ok
    assert ("digest mismatch" in signature.reason or "cannot" in signature.reason), \
        signature.reason
    assert not result.check(CHECK_TRUST).ok
    out = _pdfsig(tampered)  # poppler agrees: not a valid signature any more
    assert "Signature is Valid." not in out


def test_content_appended_after_signing_is_detected(signed_run, tmp_path):  # noqa: F811
    import io

    from pyhanko.pdf_utils import generic
    from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter

    writer = IncrementalPdfFileWriter(io.BytesIO(signed_run.pdf.read_bytes()))
    writer.root["/BenchrunNote"] = generic.TextStringObject("lot accepted after all")
    writer.update_root()
    out = io.BytesIO()
    writer.write(out)
    tampered = tmp_path / "report.pdf"
    tampered.write_bytes(out.getvalue())
    result = verify_report(tampered, cert=signed_run.identity.cert_path,
                           data=signed_run.run_dir)
    signature = result.check(CHECK_SIGNATURE)
    assert not signature.ok and "whole file" in signature.reason
    assert "Total document signed" not in _pdfsig(tampered)


def test_one_flipped_byte_in_the_raw_record(signed_run, tmp_path):  # noqa: F811
    run_dir = signed_run.copy(tmp_path)
    raw = run_dir / "raw.h5"
    data = bytearray(raw.read_bytes())
    data[len(data) // 2] ^= 0x10
    raw.write_bytes(bytes(data))
    result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
    assert result.check(CHECK_SIGNATURE).ok and result.check(CHECK_TRUST).ok
    manifest = result.check(CHECK_MANIFEST)
    assert not manifest.ok and manifest.reason.startswith("raw.h5: SHA-256 differs")
    assert "limits.yaml" not in manifest.reason and "database" not in manifest.reason
    assert not result.ok


def test_a_changed_database_row(signed_run, tmp_path):  # noqa: F811
    run_dir = signed_run.copy(tmp_path)
    with sqlite3.connect(run_dir / "results.db") as db:
        (rowid, metrics), = db.execute(
            "SELECT id, metrics FROM shots ORDER BY id LIMIT 1").fetchall()
        values = json.loads(metrics)
        values["irrm_A"] = values["irrm_A"] * 0.5  # a failing device made to look good
        db.execute("UPDATE shots SET metrics = ? WHERE id = ?", (json.dumps(values), rowid))
    result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
    manifest = result.check(CHECK_MANIFEST)
    assert not manifest.ok and "database rows changed" in manifest.reason
    assert "raw.h5" not in manifest.reason
    # the raw waveforms still reproduce the report: the row, not the measurement, changed
    assert result.check(CHECK_REANALYSIS).ok
    assert not result.ok


def test_a_changed_limits_file(signed_run, tmp_path):  # noqa: F811
    run_dir = signed_run.copy(tmp_path)
    limits = run_dir / "limits.yaml"
    text = limits.read_text()
    assert "{metric: irrm_A, condition: 25C, max: 25 A}" in text
    limits.write_text(text.replace("{metric: irrm_A, condition: 25C, max: 25 A}",
                                   "{metric: irrm_A, condition: 25C, max: 40 A}"))
    result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
    manifest = result.check(CHECK_MANIFEST)
    assert not manifest.ok and manifest.reason.startswith("limits.yaml: SHA-256 differs")
    regrade = result.check(CHECK_REANALYSIS)
    assert not regrade.ok  # the looser limit turns the two rejected devices conforming
    assert "disposition reported 'reject', regrading gives 'accept'" in "\n".join(
        regrade.details)
    assert not result.ok


def test_missing_data_is_a_negative_result_not_an_exception(signed_run, tmp_path):  # noqa: F811
    lonely = tmp_path / "report.pdf"
    shutil.copy(signed_run.pdf, lonely)
    result = verify_report(lonely, cert=signed_run.identity.cert_path)
    assert result.check(CHECK_SIGNATURE).ok and result.check(CHECK_TRUST).ok
    assert not result.check(CHECK_MANIFEST).ok
    assert "--data" in result.check(CHECK_REANALYSIS).reason
    not_pdf = tmp_path / "junk.pdf"
    not_pdf.write_bytes(b"%PDF-1.7\nthis is not a report\n")
    junk = verify_report(not_pdf, cert=signed_run.identity.cert_path)
    assert not junk.ok and not junk.check(CHECK_SIGNATURE).ok


def test_a_re_signed_report_with_an_edited_number_fails_re_analysis(signed_run, tmp_path):  # noqa: F811
    """An insider who edits a number and signs again passes the signature and manifest
    checks; only re-analysing the raw waveforms catches the edit."""
    from benchrun.report.facts_gather import build_content
    from benchrun.report.raw_waveforms import raw_waveform_loader
    from benchrun.report.render import render_signed
    from benchrun.report.run_sources import run_sources

    run_dir = signed_run.copy(tmp_path)
    from benchrun.store.rundata import load_run

    run = load_run(run_dir)
    content = build_content(run, signed_run.lot, signed_run.signer, run_sources(run))
    edited = content.shots[0]
    edited["metrics"]["qrr_C"] = edited["metrics"]["qrr_C"] * 0.8
    with raw_waveform_loader(run, content.analysis_options) as loader:
        pdf = render_signed(content, run_dir / "edited.pdf", signed_run.signer,
                            waveform_loader=loader)
    result = verify_report(pdf, cert=signed_run.identity.cert_path, data=run_dir)
    assert result.check(CHECK_SIGNATURE).ok and result.check(CHECK_TRUST).ok
    assert result.check(CHECK_MANIFEST).ok
    reanalysis = result.check(CHECK_REANALYSIS)
    assert not reanalysis.ok and not result.ok
    assert f"{edited['serial']} {edited['raw_ref']}: qrr_C reported" in reanalysis.reason


def test_re_analysis_re_measures_the_di_dt_condition_by_the_runners_definition(signed_run):  # noqa: F811
    # di/dt as a test condition is the current's rate of change through its zero crossing
    # (benchrun.runner.didt.commutation_didt), not the analysis' didt metric: the regrade
    # must take that condition again from the raw record, and a changed one is caught
    from benchrun.report.sign import read_attachment
    from benchrun.report.verify_reanalysis import CONDITION_DIDT, reanalyse_shots

    rows = read_attachment(signed_run.pdf.read_bytes())["shots"]
    problems: list[str] = []
    fresh = reanalyse_shots(rows, signed_run.run, None, problems)
    assert problems == []
    for row in rows:
        stored = row["conditions"]["didt_A_per_s"]
        assert fresh[row["raw_ref"]][CONDITION_DIDT] == pytest.approx(stored, rel=1e-9)
    changed = [dict(r) for r in rows]
    changed[0]["conditions"] = {**rows[0]["conditions"],
                                "didt_A_per_s": rows[0]["conditions"]["didt_A_per_s"] * 1.1}
    reanalyse_shots(changed, signed_run.run, None, problems)
    assert len(problems) == 1 and "measured di/dt" in problems[0]


def test_re_analysis_reproduces_every_analysis_flag(signed_run):  # noqa: F811
    # a flag the report holds and the re-analysis does not set (or the reverse) is a failed
    # check: the flags decide validity and the worst-case step
    from benchrun.report.sign import read_attachment
    from benchrun.report.verify_reanalysis import reanalyse_shots

    rows = read_attachment(signed_run.pdf.read_bytes())["shots"]
    problems: list[str] = []
    reanalyse_shots(rows, signed_run.run, None, problems)
    assert problems == []
    changed = [dict(r) for r in rows]
    changed[0]["flags"] = [*rows[0]["flags"], "snap"]
    reanalyse_shots(changed, signed_run.run, None, problems)
    assert len(problems) == 1 and "flags differ" in problems[0] and "snap" in problems[0]
