"""Regression tests of the measurement defects: offsets, RRSF slopes, timing uncertainty,
bandwidth and skew, the VRM window, capacitive recoveries, long records, scope CSV files and
misuse.

The recovery is the closed-form Lauritzen–Ma solution under an ideal current ramp
(tests/test_analysis_closed_form.py: Lauritzen & Ma, IEEE Trans. Power Electronics 6(2),
1991), so every reference value is independent of the analysis.
"""

from __future__ import annotations

import math
import time
import tracemalloc

import numpy as np
import pytest
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import RecoveryOptions, analyze_recovery
from benchrun.analysis.baseline import RULE_PRE_EVENT, RULE_QUIET
from benchrun.cli import main
from benchrun.errors import NoEventError

MODEL = LMRamp()
DT = 0.4e-9


def names(flags) -> set[str]:
    return {f.split(":")[0] for f in flags}


def quantise(x, full_scale, rng, noise_lsb=1.0, bits=8):
    lsb = 2.0 * full_scale / 2**bits
    codes = np.round((x + rng.normal(0.0, noise_lsb * lsb, x.size)) / lsb)
    return np.clip(codes, -(2 ** (bits - 1)), 2 ** (bits - 1) - 1) * lsb


# --- 1. offsets -------------------------------------------------------------------------

def test_current_offset_of_one_percent_of_if_changes_metrics_by_under_half_a_percent():
    t, v, i = double_pulse_record(MODEL, DT)
    ref = analyze_recovery(t, v, i)
    shifted = analyze_recovery(t, v, i + 0.01 * MODEL.IF)
    for key in ("qrr_C", "err_J", "irrm_A"):
        assert getattr(shifted, key) == pytest.approx(getattr(ref, key), rel=0.005), key
    assert shifted.corrections["current_offset_A"] == pytest.approx(0.01 * MODEL.IF, rel=1e-6)
    assert shifted.corrections["current_offset_rule"] == RULE_PRE_EVENT


def test_offset_on_a_capacitive_part_is_removed_and_a_large_one_flagged():
    # +0.3 A on a small reverse peak (the case where Qc moved by 16 %)
    small = LMRamp(IF=10.0, a=400e6, tau=10e-9, TM=10e-9)
    t, v, i = double_pulse_record(small, 0.2e-9)
    ref = analyze_recovery(t, v, i)
    got = analyze_recovery(t, v, i + 0.3)
    assert got.qrr_C == pytest.approx(ref.qrr_C, rel=0.005)
    assert got.t0_s == pytest.approx(ref.t0_s, abs=0.05e-9)
    assert "offset_large" in names(got.flags)  # 0.3 A is 3 % of IF
    assert "offset_large" not in names(ref.flags)


def test_offset_from_the_quiet_window_when_the_record_starts_on_the_plateau():
    t, v, i = double_pulse_record(MODEL, DT, t_lead=0.3e-6)  # starts on the freewheel plateau
    ref = analyze_recovery(t, v, i)
    got = analyze_recovery(t, v, i - 0.2)
    assert got.corrections["current_offset_rule"] == RULE_QUIET
    assert got.qrr_C == pytest.approx(ref.qrr_C, rel=0.005)


def test_voltage_zeroed_before_the_first_pulse():
    t, v, i = double_pulse_record(MODEL, DT, t_lead=3e-6)
    v = np.where(t < -2.5e-6, 0.0, v)  # before the first pulse the diode holds no voltage
    ref = analyze_recovery(t, v, i)
    got = analyze_recovery(t, v + 6.0, i)  # 1 % of VR
    assert got.corrections["voltage_offset_V"] == pytest.approx(6.0, rel=1e-6)
    assert got.err_J == pytest.approx(ref.err_J, rel=0.005)
    assert got.vr_V == pytest.approx(ref.vr_V, rel=1e-4)


# --- 2. RRSF from least-squares slopes ---------------------------------------------------

def test_rrsf_is_repeatable_on_8bit_noise_and_carries_its_uncertainty():
    t, v, i = double_pulse_record(MODEL, DT)
    clean = analyze_recovery(t, v, i).rrsf
    values, us = [], []
    for seed in range(12):
        rng = np.random.default_rng(seed)
        m = analyze_recovery(t, quantise(v, 720.0, rng), quantise(i, 36.0, rng))
        values.append(m.rrsf)
        us.append(m.u["rrsf"])
    # two adjacent 8-bit samples gave RRSF values spread over a factor of two
    assert np.std(values) < 0.1 * clean
    assert all(u is not None and u > 0 for u in us)


def test_rrsf_unresolved_when_its_slopes_are_not_resolved():
    t, v, i = double_pulse_record(MODEL, 4e-9)  # 250 MS/s: tb spans a few samples
    rng = np.random.default_rng(3)
    m = analyze_recovery(t, quantise(v, 720.0, rng, 3.0), quantise(i, 36.0, rng, 3.0))
    assert "rrsf_unresolved" in names(m.flags)


# --- 3. timing uncertainty ---------------------------------------------------------------

def test_timing_uncertainty_follows_noise_over_slope():
    t, v, i = double_pulse_record(MODEL, DT)
    rng = np.random.default_rng(1)
    noisy = analyze_recovery(t, quantise(v, 720.0, rng, 2.0), quantise(i, 36.0, rng, 2.0))
    # the slow tail at t2: noise / slope is far above the sample interval / sqrt(12)
    assert noisy.u["t2_s"] > 3 * DT / math.sqrt(12)
    for key in ("ta_s", "tb_s", "trr_s", "softness", "qrr_C", "err_J", "irrm_A"):
        assert noisy.u[key] is not None and noisy.u[key] > 0, key


# --- 4. bandwidth and skew ---------------------------------------------------------------

def test_rise_time_recorded_and_flagged():
    t, v, i = double_pulse_record(MODEL, DT)
    fast = analyze_recovery(t, v, i, RecoveryOptions(current_rise_time_s=1e-9,
                                                     voltage_rise_time_s=1e-9))
    slow = analyze_recovery(t, v, i, RecoveryOptions(current_rise_time_s=20e-9))
    assert fast.corrections["current_rise_time_s"] == 1e-9
    assert "rise_time_limited" not in names(fast.flags)
    assert "rise_time_limited" in names(slow.flags)  # 20 ns against ta ≈ 85 ns, tb ≈ 60 ns


def test_uncorrected_skew_is_flagged():
    t, v, i = double_pulse_record(MODEL, DT)
    assert "deskew_suspect" not in names(analyze_recovery(t, v, i).flags)
    late = np.interp(t - 5e-9, t, i)  # the current arrives 5 ns late
    assert "deskew_suspect" in names(analyze_recovery(t, v, late).flags)


# --- 5. VRM until the reverse voltage settles --------------------------------------------

def test_vrm_searched_until_the_voltage_settles():
    t, v, i = double_pulse_record(MODEL, DT, t_tail=4e-6)
    ts = MODEL.ts
    # the reverse voltage keeps rising slowly (an RC-like approach) long after t2 + trr
    slow = np.where(t > ts, -MODEL.VR * (1.0 - 0.2 * np.exp(-(t - ts) / 300e-9)), v)
    m = analyze_recovery(t, slow, i)
    assert m.vrm_V >= m.vr_V  # was the voltage at t2 + trr, 0.9·VR
    assert "vrm_below_vr" not in names(m.flags)


# --- 6. capacitive recoveries ------------------------------------------------------------

def test_capacitive_recovery_flagged():
    # displacement current: a quarter-sine back to zero after the peak (LC ring of C(V)
    # with the loop inductance), no stored charge
    dt = 0.1e-9
    t = np.arange(-2e-6, 2e-6, dt)
    IF, a, w = 20.0, 1e9, 2 * math.pi * 25e6
    t_pk = 3e-9
    i = np.where(t < -1.5e-6, 0.0, IF)
    i = np.where(t >= 0, IF - a * t, i)
    tail = t >= IF / a + t_pk
    i_pk = -a * t_pk
    i = np.where(tail, i_pk * np.cos(np.clip(w * (t - IF / a - t_pk), 0, math.pi / 2)), i)
    v = np.where(t < IF / a, 1.5, -600.0)
    v = np.where(t < -1.5e-6, -600.0, v)
    m = analyze_recovery(t, v, i)
    assert "trr_beyond_integration" in names(m.flags)
    assert "capacitive charge Qc" in next(f for f in m.flags if f.startswith("trr_beyond"))


# --- 7. long records ---------------------------------------------------------------------

def test_record_ending_long_after_the_second_pulse():
    t, v, i = double_pulse_record(MODEL, 1e-9, t_tail=20e-6)
    off = t >= 3e-6  # the second pulse ends: the current freewheels again to the record end
    i = np.where(off, MODEL.IF, i)
    v = np.where(off, MODEL.VF, v)
    m = analyze_recovery(t, v, i)  # failed with "never commutates"
    ref = analyze_recovery(*double_pulse_record(MODEL, 1e-9))
    assert m.qrr_C == pytest.approx(ref.qrr_C, rel=1e-3)


# --- 8. CSV files as scopes write them ----------------------------------------------------

def _rows(t, v, i):
    return [f"{a:.9g},{b:.6g},,{a:.9g},{c:.6g}" for a, b, c in zip(t, v, i, strict=True)]


def test_csv_with_an_empty_column_between_channel_groups(tmp_path, capsys):
    t, v, i = double_pulse_record(MODEL, DT)
    path = tmp_path / "groups.csv"
    path.write_text("x-axis,1,,x-axis,2\nsecond,Volt,,second,Volt\n" + "\n".join(_rows(t, v, i)))
    assert main(["analyze", str(path), "--current", "3", "--json"]) == 0
    out = capsys.readouterr().out
    assert '"irrm_A"' in out
    import json
    got = json.loads(out)
    assert got["irrm_A"] == pytest.approx(analyze_recovery(t, v, i).irrm_A, rel=1e-3)


def test_time_unit_from_header_refused_or_given(tmp_path, capsys):
    t, v, i = double_pulse_record(MODEL, DT)
    rows = "\n".join(f"{a * 1e6:.9g},{b:.6g},{c:.6g}" for a, b, c in zip(t, v, i, strict=True))
    plain = tmp_path / "plain.csv"
    plain.write_text("time,v,i\n" + rows)
    assert main(["analyze", str(plain)]) == 2
    assert "--time-unit" in capsys.readouterr().err
    assert main(["analyze", str(plain), "--time-unit", "us", "--json"]) == 0
    import json
    got = json.loads(capsys.readouterr().out)
    assert got["t0_s"] == pytest.approx(analyze_recovery(t, v, i).t0_s, abs=1e-12)
    suffixed = tmp_path / "suffixed.csv"
    suffixed.write_text("time_us,v,i\n" + rows)
    assert main(["analyze", str(suffixed), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["t0_s"] == pytest.approx(got["t0_s"])


def test_file_without_line_breaks_is_refused_without_reading_it_whole(tmp_path, capsys):
    path = tmp_path / "oneline.csv"
    path.write_text(",".join(["1.0"] * 2_000_000))  # 8 MB, one line
    tracemalloc.start()
    start = time.perf_counter()
    assert main(["analyze", str(path)]) == 2
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak < 4_000_000
    assert time.perf_counter() - start < 10
    assert "line breaks" in capsys.readouterr().err


# --- 9. misuse ---------------------------------------------------------------------------

def test_switch_current_record_is_refused():
    # the switch's current with the diode's voltage: IF while the switch conducts (the diode
    # blocks the bus), a fall at turn-off that rings a little below zero, the diode then
    # conducting (forward voltage): a plateau that falls and dips negative, but no diode
    # commutation
    dt = 1e-9
    t = np.arange(-2e-6, 10e-6, dt)
    i = np.where(t < 0, 30.0, 30.0 - 200e6 * t)
    ring = t > 0.15e-6
    i = np.where(ring, -2.0 * np.sin(2 * np.pi * 5e6 * (t - 0.15e-6))
                 * np.exp(-(t - 0.15e-6) / 1e-6), i)
    i = np.where(t < -1.5e-6, 0.0, i)
    v = np.where(t < 0.15e-6, -600.0, 1.2)
    with pytest.raises(NoEventError, match="no diode commutation"):
        analyze_recovery(t, v, i)


def test_reversed_voltage_probe_is_refused():
    t, v, i = double_pulse_record(MODEL, DT)
    with pytest.raises(NoEventError, match="voltage probe looks reversed"):
        analyze_recovery(t, -v, i)


def test_clipped_reverse_current_is_flagged():
    t, v, i = double_pulse_record(MODEL, DT)
    rng = np.random.default_rng(5)
    lsb = 2 * 36.0 / 256
    codes = np.round((i + rng.normal(0, lsb, i.size)) / lsb)
    clipped = np.clip(codes, -50, 127) * lsb  # the screen's lower edge at -14 A
    m = analyze_recovery(t, quantise(v, 720.0, rng), clipped)
    assert "clipped_diode_current" in m.flags
    assert "clipped_diode_current" not in analyze_recovery(
        t, quantise(v, 720.0, rng), np.clip(codes, -128, 127) * lsb).flags


@pytest.mark.parametrize("seed", range(4))
def test_pure_noise_is_refused(seed):
    rng = np.random.default_rng(seed)
    with pytest.raises(NoEventError):
        analyze_recovery(None, rng.normal(0, 5, 100_000), rng.normal(0, 1, 100_000), dt=1e-9)
