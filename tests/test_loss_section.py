"""The report's loss section renders and says what it rests on.

Reference: poppler's ``pdftotext`` (an independent PDF reader) extracts the rendered text.
"""

from __future__ import annotations

import shutil
import subprocess

import pytest
from reportlab.lib.pagesizes import A4
from reportlab.lib.styles import getSampleStyleSheet
from reportlab.platypus import SimpleDocTemplate

from benchrun.loss import estimate_losses
from benchrun.records import ShotResult, TestPoint
from benchrun.report.pages_loss import ASSUMPTIONS, loss_flowables


def _shot(serial, temp, err, rec, est=None):
    return ShotResult(
        run_id="R-1", part="DX-4417", lot="LT-0117", serial=serial,
        point=TestPoint(index=0, temperature_K=temp, bus_voltage_V=600.0,
                        forward_current_A=30.0),
        repeat=0, attempt=0, timestamp="2031-01-01T00:00:00Z",
        conditions={"if_A": 30.0, "didt_A_per_s": 5e8, "vr_V": 600.0, "temperature_K": temp},
        metrics={"err_J": err, "eon_recovery_J": rec, "eon_recovery_estimate_J": est},
    )


def _table():
    shots = [_shot("A1", 298.15, 500e-6, 1.0e-3), _shot("A2", 298.15, 520e-6, 1.1e-3),
             _shot("A1", 398.15, 900e-6, None, 2.2e-3)]
    return estimate_losses(shots, [20e3, 50e3])


def _render(tmp_path, styles):
    pdf = tmp_path / "loss.pdf"
    SimpleDocTemplate(str(pdf), pagesize=A4).build(loss_flowables(_table(), styles))
    return pdf


@pytest.mark.skipif(shutil.which("pdftotext") is None, reason="poppler-utils not installed")
def test_section_text_in_pdf(tmp_path):
    from benchrun.report.pages_style import paragraph_styles

    pdf = _render(tmp_path, paragraph_styles())
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True,
                          text=True, timeout=30, check=True).stdout
    flat = " ".join(text.split())
    assert "DX-4417, lot LT-0117" in flat
    assert "20 kHz" in flat and "50 kHz" in flat
    # 25 °C group: E mean = (1.5 mJ + 1.62 mJ)/2 = 1.56 mJ → 31.2 W at 20 kHz, 78 W at 50 kHz
    assert "1.56 mJ" in flat and "31.2 W" in flat and "78 W" in flat
    # 125 °C rests on the VR·Qrr estimate and says so
    assert "estimate" in flat and "VR·Qrr" in flat
    for sentence in ASSUMPTIONS:
        assert " ".join(sentence.split()[:6]) in flat


def test_section_with_plain_reportlab_styles(tmp_path):
    pdf = _render(tmp_path, getSampleStyleSheet())
    assert pdf.stat().st_size > 1000


def test_empty_table_says_so():
    table = estimate_losses([], [20e3])
    texts = [getattr(f, "text", "") for f in loss_flowables(table, getSampleStyleSheet())]
    assert any("No usable shots" in t for t in texts)


def test_left_out_shots_are_named_with_their_reason():
    bad = _shot("A3", 298.15, None, None)
    bad = ShotResult.from_dict({**bad.to_dict(), "valid": False,
                                "flags": ["clipped_diode_current"]})
    table = estimate_losses([_shot("A1", 298.15, 500e-6, 1.0e-3), bad], [20e3])
    assert table.skipped
    line = "A3, test point 0, repeat 0, attempt 0 (shots/x): clipped_diode_current"
    texts = [getattr(f, "text", "") for f in loss_flowables(table, getSampleStyleSheet(),
                                                            [line])]
    assert any(line in t for t in texts)


def test_switch_energy_sentences_match_the_model():
    # the report's description of the measured basis names the gate-charge delay model of
    # benchrun.analysis.switching (ΔT = (i_sw − IL)/(di/dt)), not a linear fall at dv/dt
    from benchrun.analysis import switching
    from benchrun.loss.estimate import BASIS_MEASURED
    from benchrun.report.pages_loss import BASIS_TEXT

    text = BASIS_TEXT[BASIS_MEASURED]
    assert "(i_sw − IF)/(di/dt)" in text and "dv/dt" not in text
    assert "ΔT(t) = (i_sw(t) − IL) / (di/dt)" in switching.__doc__


def test_a_didt_sweep_shows_each_groups_didt():
    # two groups at one (T, VR, IF) differing in the requested di/dt: the table says which
    def swept(serial, target, measured, err):
        s = _shot(serial, 298.15, err, 2 * err)
        return ShotResult.from_dict({
            **s.to_dict(), "point": {**s.point.to_dict(), "didt_A_per_s": target},
            "conditions": {**s.conditions, "didt_A_per_s": measured}})

    table = estimate_losses([swept("A1", 2.5e8, 2.6e8, 300e-6), swept("A1", 1e9, 9.8e8, 600e-6)],
                            [20e3])
    texts = []
    for f in loss_flowables(table, getSampleStyleSheet()):
        for inner in getattr(f, "_content", [f]):
            texts += [str(c) for row in getattr(inner, "_cellvalues", []) for c in row]
    assert "di/dt" in texts and "260 MA/s" in texts and "980 MA/s" in texts
    single = estimate_losses([swept("A1", 1e9, 9.8e8, 600e-6)], [20e3])
    cells = [str(c) for f in loss_flowables(single, getSampleStyleSheet())
             for inner in getattr(f, "_content", [f])
             for row in getattr(inner, "_cellvalues", []) for c in row]
    assert "di/dt" not in cells
