"""Window conventions of Qrr / Err / trr: chosen in the analysis options, recorded with every
result, declared by the limits, and a mismatch refused by grading."""

from __future__ import annotations

import numpy as np
import pytest
from grading_helpers import COLD, INPUTS, LIMITS_YAML, shot, write_limits
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import RecoveryOptions, analyze_recovery
from benchrun.analysis.conventions import Convention, mismatch
from benchrun.config.limits import load_limits
from benchrun.config.sequence import AnalysisSettings
from benchrun.errors import GradingError
from benchrun.grading import grade_lot

MODEL = LMRamp()


def test_conventions_differ_and_are_recorded():
    t, v, i = double_pulse_record(MODEL, 0.2e-9)
    frac = analyze_recovery(t, v, i)
    to_trr = analyze_recovery(t, v, i, RecoveryOptions(integration_window="trr_end"))
    tri = analyze_recovery(t, v, i, RecoveryOptions(integration_window="triangle"))
    # triangle: ½·Irrm·trr (Mohan, Undeland & Robbins, Power Electronics, ch. 20, from memory)
    assert tri.qrr_C == pytest.approx(0.5 * tri.irrm_A * tri.trr_s, rel=1e-12)
    # to the trr end: -∫i dt from t0 to t0 + trr, integrated here with numpy
    sel = (t >= to_trr.t0_s) & (t <= to_trr.t_trr_s)
    assert to_trr.qrr_C == pytest.approx(-np.trapezoid(i[sel], t[sel]), rel=0.01)
    assert to_trr.t2_s == pytest.approx(to_trr.t_trr_s)
    assert abs(to_trr.qrr_C - frac.qrr_C) / frac.qrr_C > 0.03
    assert frac.corrections["convention"]["integration_window"] == "fraction"
    assert tri.corrections["convention"]["integration_window"] == "triangle"
    alt = analyze_recovery(t, v, i, RecoveryOptions(fit_high=0.75, fit_low=0.5))
    assert alt.corrections["convention"]["fit_high"] == 0.75
    assert alt.trr_s != pytest.approx(frac.trr_s, rel=0.01)


def test_sequence_setting_reaches_the_options():
    settings = AnalysisSettings(integration_window="triangle")
    assert RecoveryOptions(**settings.option_values()).integration_window == "triangle"


def test_mismatch_rules():
    assert mismatch(Convention(), Convention()) is None
    # the unused parameters of a method do not matter
    assert mismatch(Convention(trr_threshold_fraction=0.1), Convention()) is None
    assert mismatch(Convention(integration_window="trr_end"), Convention()) is not None
    assert mismatch(Convention(fit_high=0.75, fit_low=0.5), Convention()) is not None
    assert mismatch(Convention(integration_end_fraction=0.1), Convention()) is not None


def test_grading_refuses_limits_of_another_convention(tmp_path):
    shots = [shot("S000", COLD, r) for r in range(2)]
    defaults = load_limits(write_limits(tmp_path))
    assert grade_lot(shots, defaults, bench=INPUTS).devices  # defaults on both sides
    with pytest.raises(GradingError, match="the limits assume"):
        grade_lot(shots, defaults, bench=INPUTS,
                  analysis_options={"integration_window": "triangle"})
    other = load_limits(write_limits(
        tmp_path, LIMITS_YAML + "convention:\n  integration_window: trr_end\n", name="o.yaml"))
    with pytest.raises(GradingError, match="trr end"):
        grade_lot(shots, other, bench=INPUTS)
    assert grade_lot(shots, other, bench=INPUTS,
                     analysis_options={"integration_window": "trr_end"}).devices
