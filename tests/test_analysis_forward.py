"""VF at IF and forward recovery (benchrun.analysis.forward) on waveforms with known answers.

Forward recovery waveform: a diode turned on by a current ramp i = a·t shows
v = VF_on + ΔV·exp(−t/τ) after the peak (first-order decay of the conductivity-modulation
overshoot; a textbook shape, e.g. Baliga, *Fundamentals of Power Semiconductor Devices*, ch. 5,
from memory); then tfr from the 10 % current crossing to v = 1.1·VF_on is
t_peak + τ·ln(ΔV/(0.1·VF_on)) − t10 in closed form (derivation ours).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchrun.analysis.forward import FLAG_VF_COARSE, analyze_forward


def turn_on(dt=0.1e-9):
    t = np.arange(0.0, 2e-6, dt)
    ramp = 20.0 / 50e-9  # 20 A in 50 ns
    t_on = 100e-9
    i = np.clip((t - t_on) * ramp, 0.0, 20.0)
    v = np.full_like(t, -600.0)
    tau, dv, vf_on = 40e-9, 18.0, 1.6
    rising = (t >= t_on) & (t < t_on + 10e-9)
    v[rising] = -600.0 + (t[rising] - t_on) / 10e-9 * (600.0 + vf_on + dv)
    after = t >= t_on + 10e-9
    v[after] = vf_on + dv * np.exp(-(t[after] - t_on - 10e-9) / tau)
    t10 = t_on + 0.1 * 20.0 / ramp
    tfr = t_on + 10e-9 + tau * math.log(dv / (0.1 * vf_on)) - t10
    return t, v, i, vf_on + dv, tfr


def test_forward_recovery_closed_form():
    t, v, i, vfp, tfr = turn_on()
    m = analyze_forward(t, v, i, if_A=None, t0_s=None)
    assert m.vfp_V == pytest.approx(vfp, rel=1e-3)
    assert m.tfr_s == pytest.approx(tfr, abs=0.2e-9)
    assert m.vf_V is None


def test_no_turn_on_in_a_recovery_window():
    t = np.arange(0.0, 1e-6, 1e-9)
    i = np.where(t < 0.5e-6, 20.0, -5.0 * np.exp(-(t - 0.5e-6) / 30e-9))
    v = np.where(t < 0.5e-6, 1.7, -600.0)
    m = analyze_forward(t, v, i, if_A=20.0, t0_s=0.5e-6)
    assert m.vfp_V is None and m.tfr_s is None
    assert m.vf_V == pytest.approx(1.7)


def test_vf_is_the_plateau_median_and_coarse_resolution_is_flagged():
    rng = np.random.default_rng(1)
    t = np.arange(0.0, 1e-6, 1e-9)
    i = np.where(t < 0.6e-6, 30.0 + 0.2 * rng.standard_normal(t.size), -10.0)
    v = np.where(t < 0.6e-6, 1.9 + 0.01 * rng.standard_normal(t.size), -600.0)
    fine = analyze_forward(t, v, i, if_A=30.0, t0_s=0.6e-6, voltage_lsb_V=0.02)
    assert fine.vf_V == pytest.approx(1.9, abs=0.005) and fine.flags == ()
    # an 8-bit 1 kV range: 1000/255 ≈ 3.9 V per step, far above 10 % of VF
    coarse = analyze_forward(t, v, i, if_A=30.0, t0_s=0.6e-6, voltage_lsb_V=1000.0 / 255)
    assert FLAG_VF_COARSE in coarse.flags
