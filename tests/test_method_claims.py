"""The method the report and the README describe is the method the code runs.

The report's method table is built from benchrun.analysis.method, whose wording is made of
the constants the analysis uses; these tests check the wording against those constants, and
the claims against the analysis' behaviour on records with known offsets (closed-form
Lauritzen–Ma recovery, tests/test_analysis_closed_form.py).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import analyze_recovery
from benchrun.analysis import baseline as bl
from benchrun.analysis import flags as fl
from benchrun.analysis import quality as qa
from benchrun.analysis.method import FLAG_RULES, OFFSET_TEXT, method_rows
from benchrun.report.facts_method import method_table as _definitions

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
MODEL = LMRamp()


def _pct(x: float) -> str:
    return f"{100 * x:g} %"


def test_report_method_table_reads_the_analysis_wording():
    rows = _definitions({})
    for item, text in method_rows({}):
        assert [item, text] in rows
    assert not any("pre-event baseline" in cell for row in rows for cell in row)


def test_offset_claim_matches_the_code():
    # claim: both channels zeroed before the first pulse when the record holds it
    t, v, i = double_pulse_record(MODEL, 0.4e-9, t_lead=3e-6)
    v = np.where(t < -2.5e-6, 0.0, v)
    m = analyze_recovery(t, v + 4.0, i + 0.25)
    assert m.corrections["current_offset_A"] == pytest.approx(0.25)
    assert m.corrections["voltage_offset_V"] == pytest.approx(4.0)
    assert m.corrections["current_offset_rule"] == bl.RULE_PRE_PULSE
    # claim: else the current is zeroed during the first pulse, the voltage not corrected
    t, v, i = double_pulse_record(MODEL, 0.4e-9)
    m = analyze_recovery(t, v + 4.0, i + 0.25)
    assert m.corrections["current_offset_A"] == pytest.approx(0.25)
    assert m.corrections["voltage_offset_V"] == 0.0
    assert m.corrections["voltage_offset_rule"] == bl.RULE_V_NONE
    assert "the voltage is not corrected" in OFFSET_TEXT
    assert f"{bl.BASELINE_MAX} samples" in OFFSET_TEXT
    assert _pct(qa.OFFSET_LARGE_FRACTION) in OFFSET_TEXT


def test_flag_rules_name_real_flags_and_their_thresholds():
    emitted = {getattr(fl, name) for name in dir(fl) if name.startswith("FLAG_")}
    assert set(FLAG_RULES) <= emitted
    for flag, text in (("offset_large", _pct(qa.OFFSET_LARGE_FRACTION)),
                       ("rise_time_limited", _pct(qa.RISE_TIME_FRACTION)),
                       ("rrsf_unresolved", _pct(qa.RRSF_U_FRACTION)),
                       ("ringing", _pct(qa.RINGING_FRACTION)),
                       ("snap", f"{qa.SNAP_MULTIPLE:g} ×"),
                       ("ta_unresolved", _pct(qa.TA_U_FRACTION))):
        assert text in FLAG_RULES[flag], flag
        row = next(line for line in README.splitlines() if line.startswith(f"| `{flag}`"))
        assert text in row, flag


def test_refusal_threshold_in_readme():
    from benchrun.analysis.measure import MIN_PLATEAU_SNR
    assert f"a forward plateau under {MIN_PLATEAU_SNR:g} noise sigmas" in README


def test_readme_lists_every_flag():
    for name in dir(fl):
        if name.startswith("FLAG_"):
            assert f"`{getattr(fl, name)}`" in README, name
    assert "`undersampled_recovery`" in README
