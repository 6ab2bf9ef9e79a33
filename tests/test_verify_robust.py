"""Verification answers every damage with a negative check and a reason, never an exception;
it names the signer certificate in full and protects run.json, the runs-table row and the
reports-table row by the report's hashes.

Outside reference for the fingerprint: the SHA-256 over the certificate's DER encoding as the
``cryptography`` library computes it (``Certificate.fingerprint``), the usual X.509 fingerprint.
"""

from __future__ import annotations

import json
import sqlite3

from report_helpers import signed_run  # noqa: F401 - session fixture

from benchrun.cli import main
from benchrun.report.verify import (
    ALL_CHECKS,
    CHECK_MANIFEST,
    CHECK_REANALYSIS,
    CHECK_REGISTRATION,
    CHECK_SIGNATURE,
    verify_report,
)
from benchrun.store.raw import RawRecord


def _flipped(raw_bytes: bytes, offset: int) -> bytes:
    data = bytearray(raw_bytes)
    data[offset] ^= 0x10
    return bytes(data)


def _shots_read_back(path) -> bool | None:
    """True when every shot reads back with its stored content hash, False when one fails
    with our error, None when the HDF5 library itself fails (damaged metadata)."""
    from benchrun.errors import BenchrunError

    try:
        with RawRecord(path, "r") as raw:
            for key in raw:
                raw.read_shot(key, verify=True)
    except BenchrunError:
        return False
    except Exception:  # the HDF5 library's own errors: what verify must survive
        return None
    return True


def _find_offsets(signed, tmp_path, want, limit: int = 2, stop: int = 6000) -> list[int]:
    probe = tmp_path / "probe.h5"
    original = (signed.run_dir / "raw.h5").read_bytes()
    found = []
    for offset in range(0, min(stop, len(original)), 7):
        probe.write_bytes(_flipped(original, offset))
        if _shots_read_back(probe) is want:
            found.append(offset)
            if len(found) >= limit:
                break
    return found


def test_flipped_hdf5_metadata_byte_is_a_negative_check(signed_run, tmp_path):  # noqa: F811
    offsets = _find_offsets(signed_run, tmp_path, None)
    assert offsets, "no metadata byte found whose flip makes the HDF5 library fail"
    original = (signed_run.run_dir / "raw.h5").read_bytes()
    for offset in offsets:
        run_dir = signed_run.copy(tmp_path / f"at{offset}")
        (run_dir / "raw.h5").write_bytes(_flipped(original, offset))
        result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
        assert not result.ok
        assert result.check(CHECK_SIGNATURE).ok
        manifest = result.check(CHECK_MANIFEST)
        assert not manifest.ok and "raw.h5" in manifest.reason
        reanalysis = result.check(CHECK_REANALYSIS)
        assert not reanalysis.ok and reanalysis.reason


def test_change_outside_the_shot_data_says_they_are_intact(signed_run, tmp_path):  # noqa: F811
    offsets = _find_offsets(signed_run, tmp_path, True, limit=1, stop=400000)
    assert offsets, "no byte found whose flip leaves every shot intact"
    run_dir = signed_run.copy(tmp_path)
    raw = run_dir / "raw.h5"
    raw.write_bytes(_flipped(raw.read_bytes(), offsets[0]))
    result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
    manifest = result.check(CHECK_MANIFEST)
    assert not manifest.ok and not result.ok  # the file changed: still not verified
    assert "shot data are intact" in manifest.reason
    assert result.check(CHECK_REANALYSIS).ok


def test_a_changed_shot_is_not_called_intact(signed_run, tmp_path):  # noqa: F811
    offsets = _find_offsets(signed_run, tmp_path, False, limit=1, stop=400000)
    assert offsets
    run_dir = signed_run.copy(tmp_path)
    raw = run_dir / "raw.h5"
    raw.write_bytes(_flipped(raw.read_bytes(), offsets[0]))
    result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
    assert "intact" not in result.check(CHECK_MANIFEST).reason
    assert not result.check(CHECK_REANALYSIS).ok


def test_unreadable_report_file_is_a_negative_result(tmp_path):
    result = verify_report(tmp_path / "missing.pdf")
    assert not result.ok
    assert [c.name for c in result.checks] == list(ALL_CHECKS)
    assert all("cannot read" in c.reason for c in result.checks)
    assert main(["verify", str(tmp_path / "missing.pdf")]) == 1


def test_signer_certificate_fingerprint_is_shown_in_full(signed_run, capsys):  # noqa: F811
    expected = signed_run.identity.fingerprint_sha256
    assert len(expected) == 64
    result = verify_report(signed_run.pdf, cert=signed_run.identity.cert_path)
    assert result.facts["signer_certificate_sha256"] == [expected]
    assert expected in result.check(CHECK_SIGNATURE).reason
    main(["verify", str(signed_run.pdf), "--cert", str(signed_run.identity.cert_path)])
    assert f"signer certificate SHA-256: {expected}" in capsys.readouterr().out


def test_an_edited_run_json_fails_the_manifest(signed_run, tmp_path):  # noqa: F811
    run_dir = signed_run.copy(tmp_path)
    manifest = json.loads((run_dir / "run.json").read_text())
    manifest["status"] = "complete, checked by hand"
    (run_dir / "run.json").write_text(json.dumps(manifest))
    check = verify_report(run_dir / "report.pdf",
                          cert=signed_run.identity.cert_path).check(CHECK_MANIFEST)
    assert not check.ok and check.reason.startswith("run.json: SHA-256 differs")


def test_an_edited_runs_table_row_fails_the_manifest(signed_run, tmp_path):  # noqa: F811
    run_dir = signed_run.copy(tmp_path)
    with sqlite3.connect(run_dir / "results.db") as db:
        db.execute("UPDATE runs SET status = 'complete'")
    check = verify_report(run_dir / "report.pdf",
                          cert=signed_run.identity.cert_path).check(CHECK_MANIFEST)
    assert not check.ok and "runs-table row" in check.reason and "changed" in check.reason


def test_an_edited_reports_row_is_caught_by_verify_and_reports_list(signed_run, tmp_path,  # noqa: F811
                                                                   capsys):
    assert signed_run.lot.disposition == "reject"
    run_dir = signed_run.copy(tmp_path)
    assert main(["reports", "list", str(run_dir)]) == 0
    assert "matches" in capsys.readouterr().out
    with sqlite3.connect(run_dir / "results.db") as db:
        db.execute("UPDATE reports SET disposition = 'accept'")
    result = verify_report(run_dir / "report.pdf", cert=signed_run.identity.cert_path)
    registration = result.check(CHECK_REGISTRATION)
    assert not registration.ok and not result.ok
    assert "disposition: row 'accept', signed report 'reject'" in registration.reason
    assert main(["reports", "list", str(run_dir)]) == 1
    out = capsys.readouterr().out
    assert "ALTERED" in out and "signed report 'reject'" in out
