"""What a reader of the report sees, checked page by page with poppler (outside the project):
every table cell and reason is there word for word (nothing clipped, cut or dropped), no text
overlaps other text or leaves the page, every font is embedded (``pdffonts``), numbers carry no
exponent, and each state is written with the one word the data file and the command line use.
"""

from __future__ import annotations

import re
import shutil
import subprocess

import pytest
from pdf_checks import (
    BENCH_SIM_TRACEABILITY,
    expected_strings,
    fonts_not_embedded,
    missing_words,
    overlapping_words,
)
from report_helpers import signed_run  # noqa: F401 - session fixture

from benchrun.cli import main
from benchrun.report.sign import read_attachment

pytestmark = pytest.mark.skipif(
    not all(shutil.which(t) for t in ("pdftotext", "pdffonts")),
    reason="poppler-utils are needed (scripts/install-test-deps.sh installs them)",
)


def _content(signed):
    from benchrun.report.facts_gather import build_content
    from benchrun.report.run_sources import run_sources
    from benchrun.store.rundata import load_run

    run = load_run(signed.run_dir)
    return build_content(run, signed.lot, signed.signer, run_sources(run))


def _text(pdf) -> str:
    return subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True,
                          timeout=60, check=False).stdout


def test_every_cell_and_reason_is_printed_whole(signed_run):  # noqa: F811
    content = _content(signed_run)
    expected = expected_strings(content, signed_run.lot)
    assert len(expected) > 500
    assert missing_words(signed_run.pdf, expected) == []


def test_a_dropped_cell_would_be_noticed(signed_run):  # noqa: F811
    # the check itself: a string that is not in the report is reported missing
    assert missing_words(signed_run.pdf, ["LT-0117-005 quarantined-by-hand"]) == [
        "quarantined-by-hand"]


def test_the_thermal_handling_is_stated(signed_run):  # noqa: F811
    # issue 15 item 3: the report states which sensor the temperature was read from, the dwell
    # after a device swap and the minimum shot interval with its rule and the fixture's
    # constants, as run.json recorded them (the words are read back with pdftotext)
    import json

    from benchrun.units import format_si

    thermal = json.loads((signed_run.run_dir / "run.json").read_text())["thermal"]
    assert thermal["temperature_sensor"] == "plate" and thermal["swap_dwell_s"] > 0
    # compared without white space: pdftotext may split or join words at a narrow space
    text = re.sub(r"\s+", "", _text(signed_run.pdf))

    def said(statement: str) -> bool:
        return re.sub(r"\s+", "", statement) in text

    assert said("temperature read from temperature plate")
    assert said(f"dwell after a device swap {format_si(thermal['swap_dwell_s'], 's')}")
    assert said(f"fixture thermal time constant {format_si(thermal['time_constant_s'], 's')}")
    assert said(f"fixture thermal resistance {thermal['thermal_resistance_K_per_W']:g} K/W")
    intervals = [h["min_interval_s"] for h in thermal["points"].values()]
    assert intervals and all(i is not None for i in intervals)
    assert text.count("minimumshotinterval,") == len(intervals)
    for interval in intervals:
        assert said(f"{format_si(interval, 's')}; heat per shot")
    assert said("shot interval rule first-order thermal model of the fixture")


def test_no_text_overlaps_other_text_or_leaves_the_page(signed_run):  # noqa: F811
    assert overlapping_words(signed_run.pdf) == []


def test_operator_ambient_probe_serials_and_switch_are_printed(signed_run):  # noqa: F811
    # typed from sequences/bench-sim.yaml and the run's manifest, not from the report content
    assert missing_words(signed_run.pdf, [*BENCH_SIM_TRACEABILITY, "Q. Ashdown"]) == []
    text = " ".join(_text(signed_run.pdf).split())
    assert "bench file (site), as stated by the lab" in text
    assert "switch not named" not in text


def test_every_font_is_embedded(signed_run):  # noqa: F811
    assert fonts_not_embedded(signed_run.pdf) == []


def test_numbers_have_no_exponent_and_no_cut_fingerprint(signed_run):  # noqa: F811
    text = _text(signed_run.pdf)
    plain = re.sub(r"\b[0-9a-f]{16,}\b", "", text)  # digests are hex, not numbers
    # identifiers end in random hex ("...-6e98"): the run id, and the report id, whatever
    # random suffix it drew (RPT-<run id>-<time>Z-<hex>)
    plain = plain.replace(signed_run.run.run_id, "")
    plain = re.sub(r"\bRPT-\S*?Z-[0-9a-f]{4,}\b", "", plain)
    assert not re.search(r"\d[eE][+-]?\d", plain)
    assert not re.search(r"[0-9a-f]{8,}…", text)  # no digest cut short
    assert text.count(signed_run.identity.fingerprint_sha256) >= 3  # cover, record, signature


def test_device_table_shows_gum_rounded_values(signed_run):  # noqa: F811
    """GUM 7.2.6: U with at most two significant digits, the value rounded to the same
    decimal place (e.g. ``100.99 ± 0.82``)."""
    text = _text(signed_run.pdf)
    pairs = re.findall(r"(-?\d+(?:\.(\d+))?) ± (\d+(?:\.(\d+))?)", text)
    assert len(pairs) > 100
    for value, value_decimals, u, u_decimals in pairs:
        assert len(value_decimals) == len(u_decimals), (value, u)
        assert len(u.replace(".", "").lstrip("0")) <= 2, u


def test_one_word_for_each_state_everywhere(signed_run, capsys, tmp_path):  # noqa: F811
    lot = signed_run.lot
    text = _text(signed_run.pdf)
    data = read_attachment(signed_run.pdf.read_bytes())
    assert data["disposition"] == lot.disposition == "reject"
    assert f"Lot disposition: {lot.disposition}" in text
    assert f"disposition {lot.disposition}" in text  # page footer
    for word in ("REJECT", "REJECTED", "NON-CONFORMING", "NC", "IND", "INV", "ok"):
        assert not re.search(rf"(?<![\w-]){word}(?![\w-])", text), word
    for device in lot.devices:
        assert device.verdict in text
    # the command line: `benchrun reports list` and the report command's own summary
    main(["reports", "list", str(signed_run.run_dir)])
    listing = capsys.readouterr().out
    assert re.search(rf"\s{lot.disposition}\s", listing)
    from benchrun.commands.report import print_lot

    print_lot(lot)
    summary = capsys.readouterr().out
    assert f"disposition {lot.disposition}" in summary
    for device in lot.devices:
        assert re.search(rf"{device.serial}\s+{device.verdict}$", summary, re.MULTILINE)


def test_the_overlap_check_sees_text_spilling_into_the_next_cell(tmp_path):
    """The check itself, on a table whose plain-text cells are too narrow for their text."""
    from reportlab.lib.pagesizes import A4
    from reportlab.platypus import SimpleDocTemplate, Table, TableStyle

    from benchrun.report.pages_style import FONT_REGULAR, register_fonts

    register_fonts()
    pdf = tmp_path / "spill.pdf"
    table = Table([["a-very-long-note-that-does-not-fit", "next-cell"]], colWidths=[40, 60])
    table.setStyle(TableStyle([("FONT", (0, 0), (-1, -1), FONT_REGULAR, 8)]))
    SimpleDocTemplate(str(pdf), pagesize=A4, initialFontName=FONT_REGULAR).build([table])
    assert any("overlaps" in p for p in overlapping_words(pdf))
