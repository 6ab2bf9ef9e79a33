"""`benchrun analyze`, bad input, edge cases of event location, conditioning and pipeline.

Reference waveforms: the closed-form Lauritzen–Ma ramp solution (Lauritzen & Ma, IEEE Trans.
Power Electronics 6(2), 1991; see test_analysis_closed_form.py). Conditioning checks use
numpy/scipy as outside references.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from scipy import signal
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import (
    ChannelData,
    ProbeCalibration,
    RecoveryOptions,
    analyze_channels,
    analyze_recovery,
)
from benchrun.analysis.conditioning import deskew, detect_clipping, lowpass, remove_offset
from benchrun.analysis.metrics_meta import METRICS
from benchrun.analysis.recovery import RecoveryMetrics
from benchrun.cli import main
from benchrun.errors import ConfigError, InputDataError, NoEventError

MODEL = LMRamp()
REF = MODEL.reference()


def write_csv(path, t, v, i, names=("time_s", "v_ak_V", "i_f_A")):
    pd.DataFrame({names[0]: t, names[1]: v, names[2]: i}).to_csv(path, index=False)
    return path


@pytest.fixture
def capture_csv(tmp_path):
    t, v, i = double_pulse_record(MODEL, 0.5e-9)
    return write_csv(tmp_path / "capture.csv", t, v, i)


def test_cli_json(capture_csv, capsys):
    assert main(["analyze", str(capture_csv), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert set(data) == {*RecoveryMetrics.metric_keys(), "flags", "u", "corrections"}
    assert set(data["u"]) == set(RecoveryMetrics.metric_keys())
    assert data["qrr_C"] == pytest.approx(REF["qrr_C"], rel=0.005)
    assert data["irrm_A"] == pytest.approx(REF["irrm_A"], rel=0.01)


def test_cli_table_and_named_columns(tmp_path, capsys):
    t, v, i = double_pulse_record(MODEL, 0.5e-9)
    path = write_csv(tmp_path / "c.csv", t, i, v, names=("t", "current", "voltage"))
    argv = ["analyze", str(path), "--time", "t", "--voltage", "voltage", "--current", "1"]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "Qrr" in out and "µC" in out and "flags     none" in out


def test_cli_subprocess_exit_code(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("t,v,i\n" + "\n".join(f"{k * 1e-9},0,0" for k in range(40)))
    proc = subprocess.run([sys.executable, "-m", "benchrun.cli", "analyze", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode != 0
    assert len(proc.stderr.strip().splitlines()) == 1
    assert "no forward-current plateau" in proc.stderr


def _bad_cases(tmp_path):
    t, v, i = double_pulse_record(MODEL, 0.5e-9)
    missing = write_csv(tmp_path / "m.csv", t, v, i)
    nan_v = v.copy()
    nan_v[100] = np.nan
    nan = write_csv(tmp_path / "n.csv", t, nan_v, i)
    t_back = t.copy()
    t_back[50] = t_back[40]
    backwards = write_csv(tmp_path / "b.csv", t_back, v, i)
    short = write_csv(tmp_path / "s.csv", t[:5], v[:5], i[:5])
    flat = write_csv(tmp_path / "f.csv", t, v, np.zeros_like(i))
    return [
        ([str(missing), "--current", "nope"], "no current column 'nope'"),
        ([str(missing), "--voltage", "7"], "no voltage column '7'"),
        ([str(nan)], "non-numeric value at line 102"),
        ([str(backwards)], "not strictly increasing at line 52"),
        ([str(short)], "too short"),
        ([str(flat)], "no forward-current plateau"),
        ([str(tmp_path / "absent.csv")], "no such file"),
    ]


def test_cli_bad_input_one_line_each(tmp_path, capsys):
    for argv, expected in _bad_cases(tmp_path):
        assert main(["analyze", *argv]) == 2, argv
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1, err
        assert expected in err, err


def test_input_errors_from_the_library():
    t, v, i = double_pulse_record(MODEL, 0.5e-9)
    with pytest.raises(InputDataError, match="not strictly increasing"):
        analyze_recovery(t[::-1], v, i)
    bad = i.copy()
    bad[7] = np.inf
    with pytest.raises(InputDataError, match="sample 7"):
        analyze_recovery(t, v, bad)
    with pytest.raises(InputDataError, match="too short"):
        analyze_recovery(t[:4], v[:4], i[:4])
    with pytest.raises(InputDataError, match="dt"):
        analyze_recovery(None, v, i)
    with pytest.raises(InputDataError):
        analyze_recovery(t, v[:-1], i)
    with pytest.raises(ConfigError):
        RecoveryOptions(fit_high=0.2, fit_low=0.5)


def test_no_event_cases():
    t, v, i = double_pulse_record(MODEL, 0.5e-9)
    with pytest.raises(NoEventError, match="anode"):
        analyze_recovery(t, v, -np.abs(i))  # current probe reversed: no forward plateau
    plateau_to_end = np.where(t < -1.5e-6, 0.0, MODEL.IF)
    with pytest.raises(NoEventError, match="never commutates"):
        analyze_recovery(t, v, plateau_to_end)
    no_reversal = np.clip(i, 0.0, None)  # falls to zero and stays: ideal diode, no recovery
    with pytest.raises(NoEventError, match="never reverses"):
        analyze_recovery(t, v, no_reversal)


def test_event_close_to_record_end_is_flagged():
    t, v, i = double_pulse_record(MODEL, 0.5e-9, t_tail=MODEL.ts + 2 * MODEL.tau_e)
    got = analyze_recovery(t, v, i)
    assert "event_near_record_end" in got.flags
    assert got.irrm_A == pytest.approx(REF["irrm_A"], rel=0.01)


def test_few_samples_across_ta_is_flagged():
    t, v, i = double_pulse_record(MODEL, 10e-9)  # 100 MS/s: ta ≈ 85 ns is 8 samples
    assert "few_samples_in_ta" in analyze_recovery(t, v, i).flags


def test_commutation_index_selects_among_several_events():
    # Two recoveries in one record (the second shifted by 3 µs, at double the current).
    t, v, i = double_pulse_record(MODEL, 0.5e-9, t_lead=2e-6, t_tail=6e-6)
    big = LMRamp(IF=2 * MODEL.IF, a=MODEL.a, tau=MODEL.tau, TM=MODEL.TM)
    i2 = np.where(t < 2.5e-6, i, big.current(t - 3e-6))
    v2 = np.where(t < 2.5e-6, v, big.voltage(t - 3e-6))
    first = analyze_recovery(t, v2, i2, RecoveryOptions(commutation=0))
    last = analyze_recovery(t, v2, i2)
    assert first.if_A == pytest.approx(MODEL.IF)
    assert last.if_A == pytest.approx(2 * MODEL.IF)
    assert last.t0_s == pytest.approx(3e-6 + 2 * MODEL.IF / MODEL.a, abs=1e-12)
    with pytest.raises(NoEventError, match="only 2"):
        analyze_recovery(t, v2, i2, RecoveryOptions(commutation=2))


def test_capacitive_recovery_does_not_crash_and_gives_qc():
    # SiC-Schottky-like: no stored charge, the reverse current is displacement current
    # C·dv/dt of a constant capacitance charged to VR (Qc = C·VR, charge definition of a
    # capacitor) plus ringing, on an 8-bit noisy capture.
    dt = 0.4e-9
    t = np.arange(-2e-6, 2e-6, dt)
    IF, a, C, VR = 20.0, 500e6, 150e-12, 600.0
    t0 = IF / a
    tr = 20e-9  # voltage rise time after t0
    ramp_v = np.clip((t - t0) / tr, 0.0, 1.0)
    v = np.where(t < t0, 1.0, -VR * (ramp_v - np.sin(2 * np.pi * ramp_v) / (2 * np.pi)))
    i_cap = np.gradient(v, t) * C  # i = C·dv/dt (negative while reverse voltage builds)
    i = np.where(t < -1.5e-6, 0.0, np.where(t < t0, IF - a * np.clip(t, 0, None), i_cap))
    ring = (t > t0 + tr) * 0.3 * np.exp(-(t - t0 - tr) / 30e-9) * np.sin(2e8 * (t - t0 - tr))
    i = i + ring
    rng = np.random.default_rng(3)
    lsb = 2 * 24.0 / 256
    i_q = np.round((i + rng.normal(0, lsb, i.size)) / lsb) * lsb
    got = analyze_recovery(t, v, i_q)
    assert got.irrm_A == pytest.approx(2 * C * VR / tr, rel=0.1)  # peak C·dv/dt of the S-ramp
    assert got.qrr_C == pytest.approx(C * VR, rel=0.1)


def test_lowpass_option_keeps_timing():
    t, v, i = double_pulse_record(MODEL, 0.2e-9)
    got = analyze_recovery(t, v, i, RecoveryOptions(lowpass_hz=200e6))
    assert got.t0_s == pytest.approx(REF["t0_s"], abs=0.5e-9)  # zero phase: no delay
    assert got.qrr_C == pytest.approx(REF["qrr_C"], rel=0.02)


def test_conditioning_against_numpy_scipy():
    dt = 1e-9
    t = np.arange(2000) * dt
    x = np.sin(2 * np.pi * 5e6 * t)
    # deskew: y(t) = x(t + d)
    y = deskew(x, dt, 3.5e-9)
    np.testing.assert_allclose(y[10:-10], np.sin(2 * np.pi * 5e6 * (t[10:-10] + 3.5e-9)),
                               atol=2e-3)
    # zero-phase low-pass equals scipy's sosfiltfilt on the same Butterworth design
    sos = signal.butter(4, 50e6, fs=1 / dt, output="sos")
    np.testing.assert_allclose(lowpass(x, dt, 50e6), signal.sosfiltfilt(sos, x))
    with pytest.raises(ConfigError):
        lowpass(x, dt, 600e6)
    assert remove_offset(x + 0.25, 100).mean() == pytest.approx(x.mean() + 0.25
                                                                 - np.median(x[:100] + 0.25))
    codes = np.array([-128, 0, 5, 127, 127], dtype=np.int16)
    assert detect_clipping(codes, -128, 127) == {"low": 1, "high": 2}


def test_pipeline_scales_deskews_and_flags_clipping():
    dt = 0.5e-9
    t, v, i = double_pulse_record(MODEL, dt)
    gain_v, gain_i = 800.0 / 127 / 100.0, 40.0 / 127 / 20.0  # volts per code at the scope
    codes_v = np.clip(np.round(v / 100.0 / gain_v), -128, 127).astype(np.int16)
    codes_i = np.clip(np.round(i / 20.0 / gain_i), -128, 127).astype(np.int16)
    channels = {
        "diode_voltage": ChannelData(codes_v, gain_v, 0.0, -128, 127),
        "diode_current": ChannelData(codes_i, gain_i, 0.0, -128, 127),
    }
    probes = {"diode_voltage": ProbeCalibration(100.0), "diode_current": ProbeCalibration(20.0)}
    shot = analyze_channels(float(t[0]), dt, channels, probes)
    assert shot.recovery.irrm_A == pytest.approx(REF["irrm_A"], rel=0.02)
    assert set(shot.metrics()) >= set(RecoveryMetrics.metric_keys())
    assert not any(f.startswith("clipped") for f in shot.flags)
    # a 5 ns probe delay, compensated by deskew, leaves t0 where it was
    late = np.concatenate((np.full(10, codes_i[0]), codes_i[:-10])).astype(np.int16)
    channels_late = {**channels, "diode_current": ChannelData(late, gain_i, 0.0, -128, 127)}
    probes_late = {**probes, "diode_current": ProbeCalibration(20.0, deskew_s=5e-9)}
    shot_late = analyze_channels(float(t[0]), dt, channels_late, probes_late)
    assert shot_late.recovery.t0_s == pytest.approx(shot.recovery.t0_s, abs=1e-12)
    # current range too small: the reverse peak clips and is flagged
    clipped = np.clip(codes_i, -40, 127).astype(np.int16)
    channels_clip = {**channels, "diode_current": ChannelData(clipped, gain_i, 0.0, -40, 127)}
    shot_clip = analyze_channels(float(t[0]), dt, channels_clip, probes)
    assert "clipped_diode_current" in shot_clip.flags
    assert "clipped_diode_current" in shot_clip.recovery.flags
    with pytest.raises(InputDataError, match="diode_current"):
        analyze_channels(0.0, dt, {"diode_voltage": channels["diode_voltage"]}, probes)


def test_every_metric_key_has_metadata():
    for key in RecoveryMetrics.metric_keys():
        assert METRICS[key].unit is not None and METRICS[key].name
