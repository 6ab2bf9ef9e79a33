"""The signed acceptance report, checked with tools outside the project.

Outside references: poppler's ``pdfsig`` (signature digest and whole-file coverage),
``pdftotext`` (what a reader sees), ``pdfimages`` (no raster images: figures are vectors),
``pdfinfo``; ``qpdf --check`` (PDF syntax and streams, ISO 32000). Note from DESIGN §7:
``pdfsig`` exits 0 even on a digest mismatch, so its text is parsed.
"""

from __future__ import annotations

import re
import shutil
import subprocess

import pytest
from report_helpers import signed_run  # noqa: F401 - session fixture

from benchrun.cli import main
from benchrun.report.sign import read_attachment

pytestmark = pytest.mark.skipif(
    not all(shutil.which(t) for t in ("pdfsig", "pdftotext", "qpdf", "pdfimages")),
    reason="poppler-utils and qpdf are needed (scripts/install-test-deps.sh installs them)",
)


def _run(*cmd: str) -> subprocess.CompletedProcess:
    return subprocess.run(cmd, capture_output=True, text=True, timeout=60, check=False)


def test_pdfsig_says_valid_and_whole_document_signed(signed_run):  # noqa: F811
    out = _run("pdfsig", str(signed_run.pdf)).stdout
    assert "Signature Validation: Signature is Valid." in out
    assert "Total document signed" in out
    assert "Signer Certificate Common Name: Q. Ashdown" in out
    assert "ETSI.CAdES.detached" in out  # PAdES baseline SubFilter (ETSI EN 319 142-1)
    assert out.count("Signature #") == 1


def test_qpdf_check_passes(signed_run):  # noqa: F811
    result = _run("qpdf", "--check", str(signed_run.pdf))
    assert result.returncode == 0, result.stdout + result.stderr
    assert "No syntax or stream encoding errors found" in result.stdout


def test_text_shows_disposition_every_serial_and_page_numbers(signed_run):  # noqa: F811
    text = _run("pdftotext", "-layout", str(signed_run.pdf), "-").stdout
    lot = signed_run.lot
    assert lot.disposition == "reject"  # two devices are made non-conforming
    assert "Lot disposition: reject" in text
    for device in lot.devices:
        assert device.serial in text
    assert text.count("non-conforming") >= 2
    pages = int(re.search(r"Pages:\s+(\d+)", _run("pdfinfo", str(signed_run.pdf)).stdout)[1])
    for n in range(1, pages + 1):
        assert f"Page {n} of {pages}" in text
    for words in ("Korvane Power Components", "DX-4417", "LT-0117", "Q. Ashdown",
                  "Quality Engineer", "High voltage and stored energy can kill",
                  "What this report certifies", "Manifest (SHA-256)", "Calibration due",
                  "2027-06-30", "Guarded acceptance", "Uncertainty budget"):
        assert words in text, words


def test_device_table_repeats_its_header_on_every_page(signed_run):  # noqa: F811
    pages = _run("pdftotext", "-layout", str(signed_run.pdf), "-").stdout.split("\f")
    table_pages = [p for p in pages if "LT-0117-0" in p and "Verdict" in p and "Bin" in p]
    assert len(table_pages) >= 2  # 60 rows do not fit one landscape page
    for page in table_pages:
        assert re.search(r"Serial\s+Condition\s+trr \(ns\)\s+Qrr \(µC\)", page)


def test_figures_are_vector_graphics(signed_run):  # noqa: F811
    listing = _run("pdfimages", "-list", str(signed_run.pdf)).stdout.strip().splitlines()
    assert len(listing) == 2, listing  # header lines only: no raster image anywhere
    text = _run("pdftotext", str(signed_run.pdf), "-").stdout
    # axis labels drawn by matplotlib are real PDF text in the report font
    assert "time from t0 (ns)" in text and "temperature (°C)" in text


def test_embedded_numbers_match_the_grades(signed_run):  # noqa: F811
    data = read_attachment(signed_run.pdf.read_bytes())
    assert data is not None
    assert data["disposition"] == signed_run.lot.disposition
    assert len(data["shots"]) == len(signed_run.run.shots) == 60
    by_ref = {s.raw_ref: s for s in signed_run.run.shots}
    for row in data["shots"]:
        assert row["metrics"] == by_ref[row["raw_ref"]].metrics
    assert data["lot_grade"] == signed_run.lot.to_dict()
    names = {m["name"] for m in data["manifest"]}
    assert {"raw.h5", "sequence.yaml", "bench.yaml", "limits.yaml"} <= names


def test_private_key_never_appears_in_the_report(signed_run):  # noqa: F811
    from cryptography.hazmat.primitives import serialization
    from report_helpers import PASSPHRASE

    key = serialization.load_pem_private_key(signed_run.identity.key_path.read_bytes(),
                                             PASSPHRASE.encode())
    secret = key.private_numbers().private_value.to_bytes(32, "big")
    pdf = signed_run.pdf.read_bytes()
    assert secret not in pdf and secret.hex().encode() not in pdf
    assert PASSPHRASE.encode() not in pdf


def test_reports_list_and_show_over_the_store(signed_run, capsys):  # noqa: F811
    data = read_attachment(signed_run.pdf.read_bytes())
    assert main(["reports", "list", str(signed_run.run_dir)]) == 0
    out = capsys.readouterr().out
    assert data["report_id"] in out and "reject" in out
    assert main(["reports", "show", str(signed_run.run_dir), data["report_id"]]) == 0
    out = capsys.readouterr().out
    assert "raw.h5" in out and "Q. Ashdown" in out
    assert main(["reports", "show", str(signed_run.run_dir), "RPT-NONE"]) == 2
