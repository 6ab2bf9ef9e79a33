"""Switch turn-on energy on exact piecewise-linear waveforms.

Reference: the closed-form integral of a product of two linear functions on a segment,
    ∫0^h (v0 + a·s)(i0 + b·s) ds = v0·i0·h + (v0·b + i0·a)·h²/2 + a·b·h³/3
(elementary calculus, worked by hand below), cross-checked with scipy.integrate.quad
(an independent general-purpose reference library).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from benchrun.analysis.recovery import RecoveryMetrics
from benchrun.analysis.switching import (
    FLAG_ESTIMATE_ONLY,
    FLAG_NEGATIVE,
    FLAG_NO_EVENT,
    SwitchingMetrics,
    SwitchingOptions,
    analyze_switch_turn_on,
    integrate_product,
    switch_current_from_diode,
    switching_estimate,
)
from benchrun.errors import ConfigError, InputDataError

# An invented but physically shaped turn-on (demo numbers, not a measured part):
VOFF = 400.0  # switch off-state voltage [V]
VDROP = 30.0  # stray-inductance drop while the current rises [V]
IF = 20.0  # load current [A]
T_RISE = 100e-9  # current rise 0 → IF [s]  (di/dt = 0.2 A/ns)
TA = 40e-9  # current keeps rising at the same di/dt after t0 → Irrm = 8 A
TB = 60e-9  # recovery current falls back to zero
DVDT = 4.625e9  # switch voltage fall rate [V/s] from the end of ta
IRRM = IF / T_RISE * TA


def _breakpoints():
    v_plateau = VOFF - VDROP
    t_fall_end = T_RISE + TA + v_plateau / DVDT
    t_v = [-300e-9, -5e-9, 0.0, T_RISE + TA, t_fall_end, 600e-9]
    v_v = [VOFF, VOFF, v_plateau, v_plateau, 0.0, 0.0]
    t_i = [-300e-9, 0.0, T_RISE + TA, T_RISE + TA + TB, 600e-9]
    i_v = [0.0, 0.0, IF + IRRM, IF, IF]
    return (t_v, v_v), (t_i, i_v)


def _waveforms(step=0.5e-9):
    (t_v, v_v), (t_i, i_v) = _breakpoints()
    t = np.arange(-300e-9, 600e-9 + step / 2, step)
    return t, np.interp(t, t_v, v_v), np.interp(t, t_i, i_v)


def _recovery(**changes) -> RecoveryMetrics:
    values = dict(
        if_A=IF, t0_s=T_RISE, irrm_A=IRRM, ta_s=TA, tb_s=TB, trr_s=TA + TB, softness=TB / TA,
        rrsf=None, qrr_C=0.5 * IRRM * (TA + TB), err_J=None, didt_A_per_s=IF / T_RISE,
        vrm_V=None, vr_V=VOFF, t_irrm_s=T_RISE + TA, t_trr_s=None, t2_s=None,
    )
    values.update(changes)
    return RecoveryMetrics(**values)


def _segment(v0, a, i0, b, h):
    """∫0^h (v0 + a·s)(i0 + b·s) ds, by hand."""
    return v0 * i0 * h + (v0 * b + i0 * a) * h**2 / 2 + a * b * h**3 / 3


def _hand_eon():
    """Eon over [10 % IF, 2 % VOFF] worked segment by segment."""
    didt = IF / T_RISE
    vp = VOFF - VDROP
    t_start = 0.1 * IF / didt  # 10 ns
    t_knee = T_RISE + TA  # current peak, voltage starts falling
    t_end = t_knee + (vp - 0.02 * VOFF) / DVDT  # voltage reaches 8 V
    e = _segment(vp, 0.0, 0.1 * IF, didt, t_knee - t_start)  # plateau voltage, rising current
    slope_b = -IRRM / TB
    e += _segment(vp, -DVDT, IF + IRRM, slope_b, TB)  # voltage falls, recovery current decays
    vb = vp - DVDT * TB
    e += _segment(vb, -DVDT, IF, 0.0, t_end - (t_knee + TB))  # voltage falls at IF
    return e, t_start, t_end


def _hand_ideal():
    """Ideal-diode model worked by hand on these waveforms (module docstring of switching.py).

    Rise: as measured, 10 % IF → t0. Fall: the real switch passes depth s·DVDT below the
    plateau at TA + s (s: time since the fall began); the gate-charge shift there is
    ΔT = (i − IF)/(di/dt) = IRRM·(1 − s/TB)/(di/dt) = TA·(1 − s/TB) while the recovery current
    decays (s < TB), 0 afterwards. So the ideal switch passes the same level at
    s·(1 + TA/TB) for s < TB and at TA + s beyond, carrying IF:
        IF·[(1 + TA/TB)·A(0, TB) + A(TB, S_end)],  A(s1, s2) = ∫ (vp − DVDT·s) ds.
    """
    didt = IF / T_RISE
    vp = VOFF - VDROP
    rise = _segment(vp, 0.0, 0.1 * IF, didt, T_RISE - 0.1 * IF / didt)
    s_end = (vp - 0.02 * VOFF) / DVDT

    def area(s1, s2):
        return vp * (s2 - s1) - DVDT * (s2**2 - s1**2) / 2

    fall = IF * ((1 + TA / TB) * area(0.0, TB) + area(TB, s_end))
    return rise + fall


def test_eon_matches_hand_closed_form():
    # reference: hand-worked closed-form integrals of products of linear segments (docstring)
    t, v, i = _waveforms()
    m = analyze_switch_turn_on(t, v, i, _recovery())
    e_hand, t_start, t_end = _hand_eon()
    assert m.t_eon_start_s == pytest.approx(t_start, rel=1e-9, abs=1e-15)
    assert m.t_eon_end_s == pytest.approx(t_end, rel=1e-9)
    assert m.eon_J == pytest.approx(e_hand, rel=1e-9)
    assert m.voff_V == pytest.approx(VOFF)
    assert m.flags == ()


def test_eon_matches_scipy_quad():
    # reference: scipy.integrate.quad on the continuous piecewise-linear functions
    (t_v, v_v), (t_i, i_v) = _breakpoints()
    e_hand, t_start, t_end = _hand_eon()
    e_quad, _ = quad(lambda x: np.interp(x, t_v, v_v) * np.interp(x, t_i, i_v),
                     t_start, t_end, points=sorted(set(t_v + t_i)), limit=200, epsabs=0)
    t, v, i = _waveforms()
    assert e_quad == pytest.approx(e_hand, rel=1e-7)  # the two references agree
    m = analyze_switch_turn_on(t, v, i, _recovery())
    assert m.eon_J == pytest.approx(e_quad, rel=1e-7)


def test_ideal_model_and_recovery_part():
    # reference: the gate-charge-shift model worked by hand (_hand_ideal); every sample-to-
    # sample segment is linear in both v and the shifted time, so the trapezoids are exact
    t, v, i = _waveforms()
    m = analyze_switch_turn_on(t, v, i, _recovery())
    assert m.dvdt_V_per_s == pytest.approx(DVDT, rel=1e-6)
    assert m.didt_A_per_s == pytest.approx(IF / T_RISE)
    assert not m.fall_forced
    assert m.eon_ideal_J == pytest.approx(_hand_ideal(), rel=1e-9)
    assert m.eon_recovery_J == pytest.approx(_hand_eon()[0] - _hand_ideal(), rel=1e-9)
    # the recovery part = ∫ v·(i − IF) dt over the fall + IF·∫ ΔT dv (hand, same waveforms):
    # recovery current during ta at vp, during tb at the falling voltage, plus the shift
    vp = VOFF - VDROP
    extra = _segment(vp, 0.0, 0.0, IF / T_RISE, TA) + _segment(vp, -DVDT, IRRM, -IRRM / TB, TB)
    shift = IF * TA * (DVDT * TB) / 2  # ∫ TA·(1 − s/TB)·DVDT ds over tb
    assert m.eon_recovery_J == pytest.approx(extra + shift, rel=1e-9)
    assert m.eon_recovery_J > 0


def test_zero_recovery_gives_zero_recovery_part():
    # a turn-on whose voltage falls from t0 at IF with no recovery current: the ideal-diode
    # model describes it exactly, so the recovery part must vanish (model consistency)
    vp = VOFF - VDROP
    t_fall_end = T_RISE + vp / DVDT
    t = np.arange(-300e-9, 600e-9, 0.5e-9)
    v = np.interp(t, [-300e-9, -5e-9, 0.0, T_RISE, t_fall_end, 600e-9],
                  [VOFF, VOFF, vp, vp, 0.0, 0.0])
    i = np.interp(t, [-300e-9, 0.0, T_RISE, 600e-9], [0.0, 0.0, IF, IF])
    m = analyze_switch_turn_on(t, v, i, _recovery(qrr_C=0.0))
    assert m.eon_recovery_J == pytest.approx(0.0, abs=1e-9 * m.eon_J)
    assert m.eon_recovery_estimate_J == 0.0


def test_estimate_is_vr_times_qrr():
    # reference: Vbus·Qrr estimate (common practice), labelled as an estimate
    t, v, i = _waveforms()
    rec = _recovery()
    m = analyze_switch_turn_on(t, v, i, rec)
    assert m.eon_recovery_estimate_J == pytest.approx(VOFF * rec.qrr_C)
    only = switching_estimate(rec)
    assert only.eon_J is None and only.eon_recovery_J is None
    assert only.eon_recovery_estimate_J == pytest.approx(VOFF * rec.qrr_C)
    assert FLAG_ESTIMATE_ONLY in only.flags and only.is_estimate
    assert not m.is_estimate


def test_dt_form_equals_time_array_and_shift_invariance():
    t, v, i = _waveforms()
    a = analyze_switch_turn_on(t, v, i, _recovery())
    b = analyze_switch_turn_on(None, v, i, _recovery(), dt=0.5e-9, t_start=float(t[0]))
    assert b.eon_J == pytest.approx(a.eon_J, rel=1e-9)
    assert b.eon_recovery_J == pytest.approx(a.eon_recovery_J, rel=1e-9)
    shift = 3.7e-6
    c = analyze_switch_turn_on(t + shift, v, i, _recovery(t0_s=T_RISE + shift))
    assert c.eon_J == pytest.approx(a.eon_J, rel=1e-7)
    assert c.t_eon_start_s == pytest.approx(a.t_eon_start_s + shift, abs=1e-15)


def test_amplitude_scaling():
    # energies are bilinear in voltage and current: scaling V by kv and I by ki scales by kv·ki
    t, v, i = _waveforms()
    a = analyze_switch_turn_on(t, v, i, _recovery())
    kv, ki = 1.5, 0.8
    rec = _recovery(if_A=IF * ki, irrm_A=IRRM * ki, vr_V=VOFF * kv, qrr_C=_recovery().qrr_C * ki,
                    didt_A_per_s=IF * ki / T_RISE)
    b = analyze_switch_turn_on(t, v * kv, i * ki, rec)
    assert b.eon_J == pytest.approx(a.eon_J * kv * ki, rel=1e-9)
    assert b.eon_recovery_J == pytest.approx(a.eon_recovery_J * kv * ki, rel=1e-9)


def test_noisy_quantised_capture_stays_close():
    # 8-bit quantisation over ±500 V / ±50 A plus 1 LSB rms noise, 2 GS/s: within 2 % of exact
    # (tolerance common practice for 8-bit captures)
    rng = np.random.default_rng(7)
    t, v, i = _waveforms()

    def degrade(x, full):
        lsb = 2 * full / 256
        return np.round((x + rng.normal(0, lsb, x.size)) / lsb) * lsb

    m = analyze_switch_turn_on(t, degrade(v, 500.0), degrade(i, 50.0), _recovery())
    assert m.eon_J == pytest.approx(_hand_eon()[0], rel=0.02)
    assert m.eon_recovery_J == pytest.approx(_hand_eon()[0] - _hand_ideal(), rel=0.05)


def test_switch_current_from_diode_is_kirchhoff():
    i_d = np.array([20.0, 10.0, 0.0, -8.0, 0.0])
    lazy = switch_current_from_diode(i_d, 20.0)
    assert np.allclose(lazy, [0.0, 10.0, 20.0, 28.0, 20.0])
    assert np.allclose(lazy[1:4], [10.0, 20.0, 28.0]) and lazy[3] == 28.0
    # the analysis gives the same numbers on the lazy form and on the materialised array
    t, v, i = _waveforms()
    i_diode = IF - i
    a = analyze_switch_turn_on(t, v, switch_current_from_diode(i_diode, IF), _recovery())
    b = analyze_switch_turn_on(t, v, np.asarray(switch_current_from_diode(i_diode, IF)),
                               _recovery())
    assert a == b


def test_integrate_product_exact_on_one_segment():
    # ∫0^1 (1 + 2s)(3 − s) ds = 3 + (−1 + 6)/2 − 2/3 = 29/6 (hand)
    t = np.array([0.0, 1.0])
    assert integrate_product(t, np.array([1.0, 3.0]), np.array([3.0, 2.0]), 0.0, 1.0) == (
        pytest.approx(29 / 6))


def test_missing_event_and_missing_end():
    t, v, i = _waveforms()
    m = analyze_switch_turn_on(t, v, i, _recovery(if_A=None, t0_s=None))
    assert m.eon_J is None and FLAG_NO_EVENT in m.flags
    stays_high = np.full_like(v, VOFF)
    m = analyze_switch_turn_on(t, stays_high, i, _recovery())
    assert m.eon_J is None and m.t_eon_start_s is not None
    assert any("end_not_found" in f for f in m.flags)


def test_negative_recovery_part_is_flagged():
    # the switch current dips 2 A below IF while the voltage falls (no recovery at all):
    # less energy than the ideal turn-on carrying IF → negative, flagged, kept
    vp = VOFF - VDROP
    t_fall_end = T_RISE + vp / DVDT
    t = np.arange(-300e-9, 600e-9, 0.5e-9)
    v = np.interp(t, [-300e-9, -5e-9, 0.0, T_RISE, t_fall_end, 600e-9],
                  [VOFF, VOFF, vp, vp, 0.0, 0.0])
    i = np.interp(t, [-300e-9, 0.0, T_RISE, T_RISE + 5e-9, t_fall_end, t_fall_end + 5e-9,
                      600e-9], [0.0, 0.0, IF, IF - 2.0, IF - 2.0, IF, IF])
    m = analyze_switch_turn_on(t, v, i, _recovery(qrr_C=0.0))
    assert m.eon_recovery_J < 0 and FLAG_NEGATIVE in m.flags


def test_snap_driven_fall_uses_miller_bound():
    # A snappy recovery: the current drops from IF + IRRM to IF in 2 ns and the switch
    # voltage collapses 300 V with it (loop inductance), then the gate-driven fall goes on at
    # DVDT. The gate-charge shift is ~0 once the current is back at IF, so without the bound
    # the collapse would count as ideal. The Miller-fall bound (T_ideal(y)/y non-decreasing)
    # gives an ideal fall at one rate from t0 to the level where the gate-driven fall resumes
    # (hand-worked below; model in switching.py's docstring).
    vp = VOFF - VDROP
    t_knee = T_RISE + TA
    snap, drop = 2e-9, 300.0
    t_resume = t_knee + snap
    t_fall_end = t_resume + (vp - drop) / DVDT
    t = np.arange(-300e-9, 600e-9, 0.25e-9)
    v = np.interp(t, [-300e-9, -5e-9, 0.0, t_knee, t_resume, t_fall_end, 600e-9],
                  [VOFF, VOFF, vp, vp, vp - drop, 0.0, 0.0])
    i = np.interp(t, [-300e-9, 0.0, t_knee, t_resume, 600e-9], [0.0, 0.0, IF + IRRM, IF, IF])
    m = analyze_switch_turn_on(t, v, i, _recovery())
    assert m.fall_forced
    # hand: ideal level-crossing time linear in depth y from 0 at t0 to (t_resume − t0) at
    # depth `drop` (the bound: below that level (t − t0)/y only grows, so the measured fall is
    # kept there), then the measured gate-driven fall at DVDT; rise as measured
    didt = IF / T_RISE
    y_end = vp - 0.02 * VOFF
    slope = (t_resume - T_RISE) / drop  # s per volt of depth
    assert slope * drop - drop / DVDT < 0  # the condition for (t − t0)/y to grow below `drop`

    def level_area(y1, y2):  # ∫ (vp − y) dy
        return vp * (y2 - y1) - (y2**2 - y1**2) / 2

    e_fall = IF * (slope * level_area(0.0, drop) + level_area(drop, y_end) / DVDT)
    rise = _segment(vp, 0.0, 0.1 * IF, didt, T_RISE - 0.1 * IF / didt)
    assert m.eon_ideal_J == pytest.approx(rise + e_fall, rel=1e-6)


def test_bad_inputs():
    t, v, i = _waveforms()
    with pytest.raises(InputDataError):
        analyze_switch_turn_on(t, v[:-1], i, _recovery())
    with pytest.raises(InputDataError):
        analyze_switch_turn_on(t[::-1], v, i, _recovery())
    with pytest.raises(InputDataError):
        analyze_switch_turn_on(None, v, i, _recovery())
    with pytest.raises(ConfigError):
        SwitchingOptions(forced_rate_factor=0.5)
    with pytest.raises(ConfigError):
        SwitchingOptions(voltage_end_fraction=1.5)


def test_to_dict_keys_and_options():
    t, v, i = _waveforms()
    m = analyze_switch_turn_on(t, v, i, _recovery(), SwitchingOptions(voltage_end_fraction=0.1))
    d = m.to_dict()
    assert set(d) == {*SwitchingMetrics.KEYS, "flags"}
    assert all(isinstance(d[k], float) for k in SwitchingMetrics.KEYS)
    # a later end (10 % instead of 2 %) gives a shorter window and less energy
    m2 = analyze_switch_turn_on(t, v, i, _recovery())
    assert m.t_eon_end_s < m2.t_eon_end_s and m.eon_J < m2.eon_J
    assert math.isclose(m.t_eon_end_s, T_RISE + TA + (VOFF - VDROP - 40.0) / DVDT, rel_tol=1e-9)
