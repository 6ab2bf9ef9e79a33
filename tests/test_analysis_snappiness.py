"""After-recovery oscillation metrics and the worst-case snappiness assessment (pure).

References: the current after a snap-off rings in the series L-C loop of the stray inductance
and the diode capacitance; with series loss R the response is the damped sinusoid
A·e^(−t/τ)·sin(2πft), τ = 2L/R (second-order circuit theory, any circuit text).  The expected
peak reverse voltage of a soft recovery is VR + Ls·|di/dt| (KVL around the commutation loop).
Worked numbers below are hand calculations from those formulas.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchrun.analysis.snappiness import (
    SnappinessLimits,
    analyze_oscillation,
    assess_snappiness,
)

DT = 0.2e-9
LIMITS = SnappinessLimits(rated_voltage_V=1200.0, max_overshoot_excess=0.10,
                          max_ring_fraction=0.20, max_ring_decay_s=100e-9,
                          avalanche_fraction=0.9, clamp_time_s=5e-9)


def ringing_record(amplitude=4.0, tau=60e-9, f=80e6, noise=0.0, seed=1):
    t = np.arange(0.0, 2e-6, DT)
    t2 = 1.0e-6
    i = np.where(t < t2, 0.0, amplitude * np.exp(-(t - t2) / tau)
                 * np.sin(2 * math.pi * f * (t - t2) + math.pi / 2))
    i = i + np.random.default_rng(seed).normal(0.0, noise, t.size) if noise else i
    v = np.full_like(t, -800.0)
    return t, v, i, t2


def test_damped_ring_amplitude_frequency_and_decay():
    t, v, i, t2 = ringing_record(noise=0.02)
    m = analyze_oscillation(t, v, i, t0_s=t2 - 40e-9, t2_s=t2, vr_V=800.0, vrm_V=800.0)
    assert m.ring_amplitude_A == pytest.approx(4.0, rel=0.03)
    assert m.ring_frequency_Hz == pytest.approx(80e6, rel=0.02)
    assert m.ring_decay_s == pytest.approx(60e-9, rel=0.05)
    assert m.overshoot_V == 0.0


def test_noise_alone_gives_no_oscillation():
    t, v, i, t2 = ringing_record(amplitude=0.0, noise=0.05)
    m = analyze_oscillation(t, v, i, t0_s=t2 - 40e-9, t2_s=t2, vr_V=800.0, vrm_V=800.0)
    assert m.ring_decay_s is None and m.ring_frequency_Hz is None
    assert m.ring_amplitude_A < 0.05 * 6  # the largest noise excursion only


def test_flat_top_dwell_against_a_sinusoidal_peak():
    t = np.arange(0.0, 400e-9, DT)
    # a clamp: the voltage holds at -1100 V for 10 ns
    v = np.where((t > 100e-9) & (t < 110e-9), -1100.0, -800.0)
    m = analyze_oscillation(t, v, np.zeros_like(t), t0_s=None, t2_s=None, vr_V=800.0,
                            vrm_V=1100.0)
    assert m.vrm_dwell_s == pytest.approx(10e-9, abs=2 * DT)
    # a ringing peak -800 - 300·cos(ωt): within 2 % of 1100 V while cos ≥ 1 − 0.02·1100/300
    w = 2 * math.pi * 50e6
    v = -800.0 - 300.0 * np.cos(w * (t - 210e-9))  # peaks at 10, 30 ... ns
    m = analyze_oscillation(t, v, np.zeros_like(t), t0_s=None, t2_s=None, vr_V=800.0,
                            vrm_V=1100.0)
    expected = 2 * math.acos(1 - 0.02 * 1100 / 300) / w
    assert m.vrm_dwell_s == pytest.approx(expected, abs=2 * DT)


def metrics(**over):
    base = {"vrm_V": 900.0, "vr_V": 800.0, "didt_A_per_s": 2e9, "irrm_A": 20.0,
            "ring_amplitude_A": 1.0, "ring_decay_s": 30e-9, "vrm_dwell_s": 0.5e-9,
            "rrsf": 0.6}
    base.update(over)
    return base


def test_soft_shot_passes():
    a = assess_snappiness(metrics(), (), stray_inductance_H=40e-9, limits=LIMITS)
    # VR + Ls·di/dt = 800 + 40e-9·2e9 = 880 V; 900 V is 2.27 % above
    assert a.passed and a.vrm_expected_V == pytest.approx(880.0)
    assert a.overshoot_excess == pytest.approx(20.0 / 880.0)


def test_each_finding_fails_with_its_reason():
    over = assess_snappiness(metrics(vrm_V=990.0), (), stray_inductance_H=40e-9, limits=LIMITS)
    assert not over.passed and "by 12.5 %" in over.reasons[0]
    ring = assess_snappiness(metrics(ring_amplitude_A=5.0, ring_decay_s=150e-9), (),
                             stray_inductance_H=40e-9, limits=LIMITS)
    assert [r.split(" ")[0] for r in ring.reasons] == ["oscillation", "oscillation"]
    snap = assess_snappiness(metrics(rrsf=0.2), ("snap", "ringing"), stray_inductance_H=40e-9,
                             limits=LIMITS)
    assert not snap.passed and snap.snap and "RRSF 0.2 < 1/3" in snap.reasons[0]
    allowed = assess_snappiness(metrics(rrsf=0.2), ("snap",), stray_inductance_H=40e-9,
                                limits=SnappinessLimits(**{**LIMITS.__dict__,
                                                           "allow_snap": True}))
    assert allowed.passed


def test_dynamic_avalanche_needs_the_rating_and_a_clamp():
    # 90 % of 1200 V = 1080 V
    clamp = assess_snappiness(metrics(vrm_V=1100.0, vrm_dwell_s=8e-9), (),
                              stray_inductance_H=40e-9, limits=LIMITS)
    assert clamp.avalanche_suspected
    assert any(r.startswith("dynamic avalanche suspected") for r in clamp.reasons)
    peak = assess_snappiness(metrics(vrm_V=1100.0, vrm_dwell_s=1e-9), (),
                             stray_inductance_H=40e-9, limits=LIMITS)
    assert not peak.avalanche_suspected
    low = assess_snappiness(metrics(vrm_V=1000.0, vrm_dwell_s=20e-9), (),
                            stray_inductance_H=40e-9, limits=LIMITS)
    assert not low.avalanche_suspected


def test_missing_evidence_fails_and_severity_orders_shots():
    missing = assess_snappiness(metrics(vrm_V=None), (), stray_inductance_H=40e-9,
                                limits=LIMITS)
    assert not missing.passed and missing.severity == math.inf
    mild = assess_snappiness(metrics(vrm_V=930.0), (), stray_inductance_H=40e-9, limits=LIMITS)
    bad = assess_snappiness(metrics(vrm_V=990.0), (), stray_inductance_H=40e-9, limits=LIMITS)
    assert bad.severity > 1.0 > mild.severity


def test_a_ring_that_does_not_decay_within_reach_has_no_decay_time():
    # constant-amplitude oscillation: the envelope does not fall, no time constant is resolved
    t, v, i, t2 = ringing_record(tau=1.0)
    m = analyze_oscillation(t, v, i, t0_s=t2 - 40e-9, t2_s=t2, vr_V=800.0, vrm_V=800.0)
    assert m.ring_decay_s is None
    assert m.ring_frequency_Hz == pytest.approx(80e6, rel=0.02)
