"""The ``undersampled_recovery`` flag: recovery intervals spanning too few samples.

Reference waveforms (simulator-independent, every value known in closed form):

- the linear ("triangular") reverse-recovery model of power-electronics textbooks (N. Mohan,
  T. Undeland, W. Robbins, "Power Electronics", ch. 20; M. H. Rashid, "Power Electronics",
  ch. 2): constant commutation slope di/dt, Irrm = ta·di/dt, trr = ta + tb,
  Qrr ≈ ½·Irrm·trr. The IEC 60747-2 line through the 0.9·Irrm and 0.25·Irrm points of a
  straight tb ramp meets zero exactly at ta + tb.
- an exponential tail after the peak, i = -Irrm·exp(-(t - ta)/τ) (the shape of the
  Lauritzen–Ma tail, IEEE Trans. Power Electronics 6(2), 1991): the 0.9 and 0.25 points lie
  τ·ln(1/0.9) and τ·ln(4) after the peak, so the extrapolated line gives, in closed form,
  tb = τ·[ln 4 + (ln 4 - ln(1/0.9))·0.25/(0.9 - 0.25)].

The snap lasts about 1 ns; the breakpoints are put off the sample grid (a grid phase), as a
real capture's would be. The count of 10 samples per interval comes from the linear-
interpolation timing argument in benchrun/analysis/resolution.py.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from grading_helpers import INPUTS, write_limits
from test_analysis_closed_form import LMRamp, double_pulse_record

from benchrun.analysis import ChannelData, ProbeCalibration, analyze_channels, analyze_recovery
from benchrun.analysis.metrics_meta import METRICS, metrics_needing
from benchrun.analysis.recovery import FLAG_UNDERSAMPLED, MIN_SAMPLES, RecoveryMetrics
from benchrun.analysis.resolution import (
    MIN_SAMPLES_PER_INTERVAL,
    is_undersampled_flag,
    undersampled_flag,
)
from benchrun.config.sequence import load_sequence
from benchrun.grading import grade_lot, load_limits
from benchrun.records import TestPoint
from benchrun.runner.shots import ShotContext, build_result

IF, DIDT, TA, VR = 30.0, 500e6, 40e-9, 600.0
IRRM = DIDT * TA  # Irrm = ta·di/dt (triangular model)
SNAP = 1e-9  # tb of the triangular snap


def sampled(dt: float, phase: float = 0.3, span: float = 1.5e-6) -> np.ndarray:
    """Uniform sample times with the waveform's breakpoints off the grid by ``phase``·dt."""
    return np.arange(-span, span, dt) + phase * dt


def triangular_i(t: np.ndarray, tb: float = SNAP, ta: float = TA) -> np.ndarray:
    return np.interp(t, [-2e-6, -IF / DIDT, ta, ta + tb, 2e-6],
                     [IF, IF, -DIDT * ta, 0.0, 0.0])


def recovery_v(t: np.ndarray, tb: float = SNAP, ta: float = TA) -> np.ndarray:
    """Forward drop of 1 V until the peak, then the reverse voltage builds up during tb."""
    return np.interp(t, [-2e-6, ta, ta + tb, 2e-6], [1.0, 1.0, -VR, -VR])


TAU = 0.5e-9
#: Closed-form tb of the exponential tail under the IEC 60747-2 extrapolation (see above).
TB_EXP = TAU * (math.log(4.0) + (math.log(4.0) - math.log(1 / 0.9)) * 0.25 / 0.65)


def exponential_i(t: np.ndarray) -> np.ndarray:
    fall = np.interp(t, [-2e-6, -IF / DIDT, TA], [IF, IF, -IRRM])
    tail = -IRRM * np.exp(-np.clip(t - TA, 0.0, None) / TAU)
    return np.where(t <= TA, fall, tail)


def undersampled(flags: tuple[str, ...]) -> list[str]:
    return [f for f in flags if is_undersampled_flag(f)]


def test_resolved_snap_is_not_flagged_and_matches_the_triangle():
    # 20 samples across tb = 1 ns
    t = sampled(0.05e-9)
    m = analyze_recovery(t, recovery_v(t), triangular_i(t))
    assert undersampled(m.flags) == []
    assert m.flags == ("snap",)  # the triangle's return is steeper than 3x its fall
    # Irrm = ta·di/dt and trr = ta + tb (triangular model, Mohan / Rashid)
    assert m.irrm_A == pytest.approx(IRRM, rel=1e-3)
    assert m.trr_s == pytest.approx(TA + SNAP, rel=1e-3)
    # resolved: tb within 10 % (the bound the 10-sample count is chosen for)
    assert m.tb_s == pytest.approx(SNAP, rel=0.10)
    # Qrr = ½·Irrm·trr, less the triangle tip beyond the 2 % end point (textbook relation)
    assert m.qrr_C == pytest.approx(0.5 * IRRM * TA + 0.5 * IRRM * SNAP * (1 - 0.02**2),
                                    rel=1e-3)


@pytest.mark.parametrize("dt", [0.2e-9, 0.4e-9, 2e-9])  # 5 GS/s, 2.5 GS/s, 500 MS/s
def test_unresolved_snap_is_flagged_and_still_reported(dt):
    t = sampled(dt)
    m = analyze_recovery(t, recovery_v(t), triangular_i(t))
    flags = undersampled(m.flags)
    assert len(flags) == 1
    flag = flags[0]
    assert flag.startswith(FLAG_UNDERSAMPLED + ": tb spans ")
    assert "(need >= 10)" in flag
    # ta = 40 ns spans ≥ 20 samples even at 2 ns: only tb's metrics are named
    assert flag.endswith("not resolved: tb_s, softness, rrsf, err_J, vrm_V")
    # the values are still there for the user to see
    for key in ("irrm_A", "ta_s", "tb_s", "trr_s", "softness", "qrr_C", "err_J", "vrm_V"):
        assert getattr(m, key) is not None, key
    # the span reported is the measured tb in samples (one decimal)
    assert f"tb spans {m.tb_s / dt:.1f} samples" in flag


@pytest.mark.parametrize("phase", [0.0, 0.3, 0.7])
def test_flag_appears_exactly_below_ten_samples_across_tb(phase):
    # True samples across tb = SNAP/dt, away from the threshold by more than the ±1-sample
    # timing error of the measured tb (linear-interpolation argument, resolution.py).
    for per_tb in (50, 20, 13, 8, 5, 2.5, 0.5):
        dt = SNAP / per_tb
        t = sampled(dt, phase)
        m = analyze_recovery(t, recovery_v(t), triangular_i(t))
        assert bool(undersampled(m.flags)) == (per_tb < MIN_SAMPLES_PER_INTERVAL), per_tb


def test_ten_samples_bound_the_tb_error_to_ten_percent():
    # Linear-interpolation timing argument (resolution.py): each end of an interval is known
    # to within about one sample interval, so n samples give a worst-case relative error of
    # about 1/n. Over grid phases, the triangle's tb (closed form SNAP) is within 1/n for
    # n = 10 and 20, while at 5 samples some phase is off by more than 10 %.
    phases = np.linspace(0.0, 1.0, 9, endpoint=False)

    def worst(per_tb: float) -> float:
        errors = []
        for phase in phases:
            t = sampled(SNAP / per_tb, phase)
            m = analyze_recovery(t, recovery_v(t), triangular_i(t))
            errors.append(abs(m.tb_s / SNAP - 1.0))
        return max(errors)

    assert worst(20) <= 1 / 20
    assert worst(10) <= 1 / 10
    assert worst(5) > 0.10


def test_exponential_tail_snap():
    # closed-form tb of the exponential tail: ≈ 0.94 ns for τ = 0.5 ns
    t = sampled(0.05e-9)  # ≈ 19 samples across tb
    m = analyze_recovery(t, recovery_v(t, TB_EXP), exponential_i(t))
    assert undersampled(m.flags) == []
    assert m.tb_s == pytest.approx(TB_EXP, rel=0.10)
    # Qrr = ½·Irrm·ta + Irrm·τ·(1 - 0.02): triangle plus the exponential tail to the 2 % point
    assert m.qrr_C == pytest.approx(0.5 * IRRM * TA + IRRM * TAU * 0.98, rel=1e-2)
    t = sampled(0.4e-9)  # 2.5 GS/s: ≈ 2.3 samples across tb
    m = analyze_recovery(t, recovery_v(t, TB_EXP), exponential_i(t))
    (flag,) = undersampled(m.flags)
    assert flag.startswith(FLAG_UNDERSAMPLED + ": tb spans ")


def test_short_ta_and_trr_name_their_metrics():
    # A short triangular recovery: ta = 3 ns, tb = 2 ns, sampled at 1 ns → every interval
    # under 10 samples (ta 3, tb 2, trr 5): every metric that needs them is named.
    ta, tb, dt = 3e-9, 2e-9, 1e-9
    t = sampled(dt)
    m = analyze_recovery(t, recovery_v(t, tb, ta), triangular_i(t, tb, ta))
    (flag,) = undersampled(m.flags)
    assert "ta spans" in flag and "tb spans" in flag and "trr spans" in flag
    assert flag.endswith("not resolved: irrm_A, ta_s, tb_s, trr_s, softness, rrsf, qrr_C, "
                         "err_J, vrm_V")
    assert "few_samples_in_ta" in m.flags  # the older ta-only flag stays


def test_nonuniform_record_is_measured_on_a_fine_enough_grid():
    # A variable-step record (a simulator's output) is the piecewise-linear waveform its
    # points define; it is measured on a uniform grid. Dense points across the snap but a
    # small share of the record: the first grid (1 ns) is refined for the snap, so tb comes
    # out as the triangle's (closed form, 1 ns) and nothing is flagged.
    t = np.unique(np.concatenate([
        np.arange(-1.5e-6, 1.5e-6, 1e-9) + 0.3e-9,
        np.arange(TA - 3e-9, TA + SNAP + 3e-9, 0.05e-9) + 0.01e-9,
    ]))
    i = triangular_i(t)
    m = analyze_recovery(t, recovery_v(t), i)
    assert undersampled(m.flags) == []
    # tb of the given points' piecewise-linear waveform, by numpy (the IEC 60747-2 line
    # through the 0.9·Irrm and 0.25·Irrm crossings after the lowest point)
    k = int(np.argmin(i))
    rise = slice(k, k + int(np.argmax(i[k:] >= 0.0)) + 1)
    t_hi, t_lo = np.interp([0.9 * i[k], 0.25 * i[k]], i[rise], t[rise])
    tb_points = t_lo + (t_lo - t_hi) * 0.25 / 0.65 - t[k]
    # within one step of the grid it is measured on (the finest given spacing, 0.05 ns):
    # the bound of the linear-interpolation timing argument (resolution.py)
    assert m.tb_s == pytest.approx(tb_points, abs=0.05e-9 * 1.001)
    # resolved: within 10 % of the closed form (1 ns)
    assert m.tb_s == pytest.approx(SNAP, rel=0.10)
    assert m.trr_s == pytest.approx(TA + SNAP, rel=1e-3)  # trr = ta + tb (triangle)


def test_nonuniform_record_whose_grid_is_capped_is_flagged():
    # A 10 ms record of 18 000 points: the grid is capped at 2**20 points (9.5 ns steps),
    # too coarse for ta = 40 ns and a 1 ns snap, whatever the given points' density there.
    t = np.concatenate([np.arange(-5e-3, -1e-6, 1e-6), np.arange(-1e-6, 5e-3, 1e-6)])
    t = np.unique(np.concatenate([t, np.arange(-200e-9, 200e-9, 0.05e-9) + 0.01e-9]))
    m = analyze_recovery(t, recovery_v(t), triangular_i(t))
    (flag,) = undersampled(m.flags)
    assert flag.startswith(FLAG_UNDERSAMPLED + ": ta spans ")
    assert "tb spans" in flag and "trr spans" in flag


def test_closed_form_lauritzen_ma_captures():
    # The closed-form Lauritzen–Ma ramp captures of the existing tests: resolved at 0.5 ns
    # (no flag); at 10 ns (the few_samples_in_ta case) ta ≈ 85 ns spans 8.5 samples.
    model = LMRamp()
    t, v, i = double_pulse_record(model, 0.5e-9)
    m = analyze_recovery(t, v, i)
    assert undersampled(m.flags) == []
    t, v, i = double_pulse_record(model, 10e-9)
    m = analyze_recovery(t, v, i)
    (flag,) = undersampled(m.flags)
    assert flag.startswith(FLAG_UNDERSAMPLED + ": ta spans ")


def test_metric_metadata_names_the_intervals():
    # every metric named by an interval is a recovery metric with metadata
    keys = set(RecoveryMetrics.metric_keys())
    for interval in ("ta", "tb", "trr"):
        named = metrics_needing([interval])
        assert named and set(named) <= keys
        assert all(interval in METRICS[k].intervals for k in named)
    assert metrics_needing([]) == ()
    assert METRICS["t0_s"].intervals == ()
    assert undersampled_flag({"ta": 40.0, "tb": 12.0, "trr": 52.0}) is None
    assert undersampled_flag({"ta": 40.0, "tb": None, "trr": None}) is None
    assert undersampled_flag({"ta": 40.0, "tb": 9.5, "trr": 49.5}) == (
        "undersampled_recovery: tb spans 9.5 samples (need >= 10); "
        "not resolved: tb_s, softness, rrsf, err_J, vrm_V"
    )
    assert MIN_SAMPLES == 16  # still importable from recovery after the split


def _codes(x: np.ndarray, full_scale: float) -> ChannelData:
    """16-bit capture of ``x`` over ±full_scale (volts = codes·gain, probe scale 1)."""
    gain = full_scale / 32767
    codes = np.round(x / gain).astype(np.int16)
    return ChannelData(codes, gain, 0.0, -32768, 32767)


def _capture(dt: float) -> tuple[float, dict[str, ChannelData], dict[str, ProbeCalibration]]:
    t = sampled(dt, span=3e-6)
    channels = {"diode_current": _codes(triangular_i(t), 100.0),
                "diode_voltage": _codes(recovery_v(t), 1000.0)}
    probes = {name: ProbeCalibration(scale=1.0) for name in channels}
    return float(t[0]), channels, probes


def test_pipeline_flag_and_shot_stays_valid_for_grading(tmp_path):
    # 2.5 GS/s, 1 ns snap: flagged through the one analysis path (analyze_channels) ...
    dt = 0.4e-9
    t_start, channels, probes = _capture(dt)
    shot = analyze_channels(t_start, dt, channels, probes)
    assert len(undersampled(shot.flags)) == 1
    assert undersampled(shot.recovery.flags) == undersampled(shot.flags)
    assert shot.metrics()["err_J"] is not None
    # ... and the runner's result stays valid: the flag only warns
    sequence = load_sequence(Path(__file__).parents[1] / "sequences" / "dx4417-demo.yaml")
    results = []
    for index, temperature in ((0, 298.15), (1, 398.15)):
        point = TestPoint(index=index, temperature_K=temperature, bus_voltage_V=VR,
                          forward_current_A=IF, gate_resistance_ohm=10.0, label="nominal")
        context = ShotContext(run_id="R-US", part="DX-4417", lot="LT-0117", serial="D01",
                              point=point, repeat=0, attempt=0,
                              timestamp="2026-01-01T00:00:00Z", temperature_K=temperature,
                              bus_voltage_V=VR)
        result = build_result(context, t_start, dt, channels, probes, sequence,
                              f"shots/p{index}")
        assert result.valid, result.flags
        assert len(undersampled(result.flags)) == 1
        results.append(result)
    # Grading (ILAC-G8 simple acceptance, limits from the test helpers): the flagged shots
    # grade exactly as the same shots without the flag; nothing becomes invalid.
    limits = load_limits(write_limits(tmp_path, rule="simple"))
    flagged = grade_lot(results, limits, bench=INPUTS)
    clean = grade_lot([replace(r, flags=()) for r in results], limits, bench=INPUTS)
    assert flagged.device("D01").verdict == clean.device("D01").verdict == "conforming"
    assert flagged.device("D01").invalid_shots == clean.device("D01").invalid_shots
