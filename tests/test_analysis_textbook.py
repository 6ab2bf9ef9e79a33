"""Recovery analysis against textbook relations for a triangular recovery.

Source: the linear ("triangular") reverse-recovery model of power-electronics textbooks,
e.g. N. Mohan, T. Undeland, W. Robbins, "Power Electronics: Converters, Applications and
Design", ch. 20 (power diodes), and M. H. Rashid, "Power Electronics: Circuits, Devices and
Applications", ch. 2 (diode reverse recovery): with a constant commutation slope di/dt,

    Irrm = ta·di/dt,    trr = ta + tb,    Qrr = ½·Irrm·trr.

The waveforms here are exact piecewise-linear functions with breakpoints on the sample grid,
so every value is known exactly.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from benchrun.analysis import RecoveryOptions, analyze_recovery


def triangular(IF, didt, ta, tb, VR, dt, *, lead=1e-6, tail=None, vrm_extra=0.0):
    """Plateau IF, fall at -didt through zero to -Irrm (ta after t0 = 0), linear return to
    zero in tb, then zero. The voltage is +1 V until the peak, falls linearly within 2 ns to
    -(VR + vrm_extra), then returns linearly to -VR by ta + tb."""
    irrm = didt * ta
    t_start = -round((IF / didt + lead) / dt) * dt  # on the grid: knots at ta, ta+tb are too
    t_end = ta + tb + (tail if tail is not None else 10 * (ta + tb))
    n = round((t_end - t_start) / dt)
    t = t_start + dt * np.arange(n)
    knots_t = [t_start, -IF / didt, ta, ta + tb, t_end]
    knots_i = [IF, IF, -irrm, 0.0, 0.0]
    i = np.interp(t, knots_t, knots_i)

    def v_of(x):
        return np.interp(x, [t_start, ta, ta + 2e-9, ta + tb, t_end],
                         [1.0, 1.0, -(VR + vrm_extra), -VR, -VR])

    return t, v_of(t), i, irrm, (lambda x: np.interp(x, knots_t, knots_i)), v_of


def test_triangular_recovery_relations():
    IF, didt, ta, tb, VR = 40.0, 400e6, 50e-9, 20e-9, 600.0
    dt = 0.1e-9
    t, v, i, irrm, i_of, v_of = triangular(IF, didt, ta, tb, VR, dt, vrm_extra=80.0)
    got = analyze_recovery(t, v, i)
    assert got.irrm_A == pytest.approx(ta * didt, rel=1e-9)  # Irrm = ta·di/dt
    assert got.ta_s == pytest.approx(ta, rel=1e-9)
    # the extrapolated line of a straight tb ramp meets zero exactly at ta + tb
    assert got.trr_s == pytest.approx(ta + tb, rel=1e-9)
    assert got.tb_s == pytest.approx(tb, rel=1e-9)
    assert got.softness == pytest.approx(tb / ta, rel=1e-9)
    # Qrr = ½·Irrm·trr, less the tip of the triangle beyond the 2 % end point:
    # the tb part integrates from Irrm down to 0.02·Irrm, i.e. ½·Irrm·tb·(1 − 0.02²)
    q_expected = 0.5 * irrm * ta + 0.5 * irrm * tb * (1 - 0.02**2)
    assert got.qrr_C == pytest.approx(q_expected, rel=1e-9)
    assert got.qrr_C == pytest.approx(0.5 * irrm * (ta + tb), rel=1e-3)
    assert got.didt_A_per_s == pytest.approx(didt, rel=1e-9)
    # RRSF: |di/dt at t0| / |steepest slope after the peak| = didt / (Irrm/tb)
    assert got.rrsf == pytest.approx(didt / (irrm / tb), rel=1e-6)
    # Err = ∫ v·i dt from t0 to t2, by scipy quadrature (outside reference)
    t2 = ta + 0.98 * tb
    err = quad(lambda x: float(v_of(x) * i_of(x)), 0.0, t2, points=[ta, ta + 2e-9],
               limit=200)[0]
    # trapezoidal rule on products of linear pieces: error O(dt²) over 2 ns segments
    assert got.err_J == pytest.approx(err, rel=1e-4)
    assert got.vrm_V == pytest.approx(VR + 80.0, rel=1e-9)
    assert got.vr_V == pytest.approx(VR, rel=1e-9)


def test_worked_example_abrupt_recovery():
    # Worked example (from memory: M. H. Rashid, "Power Electronics: Circuits, Devices and
    # Applications", ch. 2, example on reverse recovery): trr = 3 µs, di/dt = 30 A/µs,
    # tb negligible → Qrr = ½·di/dt·trr² = 135 µC and IRR = √(2·Qrr·di/dt) = 90 A.
    didt, ta = 30e6, 3e-6
    tb = 3e-9  # "negligible": 0.1 % of ta, resolved by 30 samples
    t, v, i, _irrm, *_ = triangular(50.0, didt, ta, tb, 400.0, 0.1e-9, tail=0.5e-6)
    got = analyze_recovery(t, v, i)
    assert got.irrm_A == pytest.approx(90.0, rel=1e-6)
    assert got.qrr_C == pytest.approx(135e-6, rel=2e-3)
    assert got.trr_s == pytest.approx(3e-6, rel=2e-3)
    assert np.sqrt(2 * got.qrr_C * got.didt_A_per_s) == pytest.approx(90.0, rel=2e-3)


def test_threshold_end_criterion_on_triangle():
    # "current reaches a set value" criterion: on a straight tb ramp the current is back at
    # -x·Irrm after (1 - x)·tb (geometry of the triangle).
    IF, didt, ta, tb = 20.0, 200e6, 40e-9, 30e-9
    t, v, i, *_ = triangular(IF, didt, ta, tb, 300.0, 0.1e-9)
    opts = RecoveryOptions(trr_method="threshold", trr_threshold_fraction=0.1)
    got = analyze_recovery(t, v, i, opts)
    assert got.trr_s == pytest.approx(ta + 0.9 * tb, rel=1e-9)


def test_other_fit_fractions_still_extrapolate_a_straight_line():
    t, v, i, *_ = triangular(20.0, 200e6, 40e-9, 30e-9, 300.0, 0.1e-9)
    got = analyze_recovery(t, v, i, RecoveryOptions(fit_high=0.75, fit_low=0.5))
    assert got.trr_s == pytest.approx(70e-9, rel=1e-9)


def test_sample_interval_forms_agree_with_time_array():
    # the same triangle given as a time array, as a scalar sample interval, and as dt=
    IF, didt, ta, tb, VR = 40.0, 400e6, 50e-9, 20e-9, 600.0
    dt = 0.1e-9
    t, v, i, _, _, _ = triangular(IF, didt, ta, tb, VR, dt)
    with_array = analyze_recovery(t, v, i)
    with_scalar = analyze_recovery(dt, v, i, t_start=float(t[0]))
    with_keyword = analyze_recovery(None, v, i, dt=dt, t_start=float(t[0]))
    for got in (with_scalar, with_keyword):
        assert got.irrm_A == pytest.approx(ta * didt, rel=1e-9)  # Irrm = ta·di/dt
        assert got.trr_s == pytest.approx(with_array.trr_s, rel=1e-9)
        assert got.t0_s == pytest.approx(with_array.t0_s, abs=1e-15)
        assert got.qrr_C == pytest.approx(with_array.qrr_C, rel=1e-9)
