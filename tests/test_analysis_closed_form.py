"""Recovery analysis against the closed-form Lauritzen–Ma solution under an ideal current ramp.

Source: C. L. Lauritzen and C. Ma, "A simple diode model with reverse recovery", IEEE Trans.
Power Electronics 6(2), 1991. The model::

    qE = Is·τ·(exp(v/(n·VT)) − 1),   i = (qE − qM)/TM,   dqM/dt = i − qM/τ

Derivation (ours). With an imposed current i(t) = IF − a·t from t = 0 and the steady state
qM(0) = τ·IF, the linear ODE dqM/dt + qM/τ = IF − a·t has the particular solution
τ·(IF − a·t) + a·τ² and the homogeneous term C·exp(−t/τ); the initial condition gives
C = −a·τ², so

    qM(t) = τ·(IF − a·t) + a·τ²·(1 − exp(−t/τ)).

The junction blocks when qE = i·TM + qM reaches zero, at ts solving
(IF − a·ts)·(TM + τ) + a·τ²·(1 − exp(−ts/τ)) = 0; the current there is the peak reverse
current, Irrm = a·ts − IF. After blocking (qE ≈ 0, junction capacitance neglected)
i = −qM/TM and dqM/dt = −qM·(1/TM + 1/τ): the current decays as
−Irrm·exp(−(t − ts)/τe), τe = τ·TM/(τ + TM) (the tail constant quoted in the paper).

Hence, in closed form: t0 = IF/a, ta = ts − t0, the 0.9/0.25 crossings at ts + τe·ln(1/0.9)
and ts + τe·ln 4, t2 = ts + τe·ln 50, Qrr = ½·a·ta² + 0.98·Irrm·τe, di/dt = a, and the steepest
slope after the peak is Irrm/τe (just after ts).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp
from scipy.optimize import brentq

from benchrun.analysis import analyze_recovery


@dataclass(frozen=True)
class LMRamp:
    """Closed-form Lauritzen–Ma recovery under an ideal ramp (see module docstring)."""

    IF: float = 30.0
    a: float = 200e6  # A/s
    tau: float = 150e-9
    TM: float = 60e-9
    VR: float = 600.0
    Ls: float = 50e-9  # overshoot Ls·di/dt during the tail
    VF: float = 1.2

    @property
    def ts(self) -> float:
        def f(t: float) -> float:
            return (self.IF - self.a * t) * (self.TM + self.tau) + self.a * self.tau**2 * (
                1.0 - math.exp(-t / self.tau)
            )

        t0 = self.IF / self.a
        return brentq(f, t0, t0 + 50.0 * (self.TM + self.tau), xtol=1e-18)

    @property
    def tau_e(self) -> float:
        return self.tau * self.TM / (self.tau + self.TM)

    @property
    def irrm(self) -> float:
        return self.a * self.ts - self.IF

    def q_m(self, t: np.ndarray) -> np.ndarray:
        return self.tau * (self.IF - self.a * t) + self.a * self.tau**2 * (
            1.0 - np.exp(-t / self.tau)
        )

    def current(self, t: np.ndarray) -> np.ndarray:
        ts, irrm, te = self.ts, self.irrm, self.tau_e
        t = np.asarray(t, dtype=float)
        tail = -irrm * np.exp(-np.clip(t - ts, 0.0, None) / te)
        return np.where(t < 0.0, self.IF, np.where(t <= ts, self.IF - self.a * t, tail))

    def voltage(self, t: np.ndarray) -> np.ndarray:
        ts, irrm, te = self.ts, self.irrm, self.tau_e
        t = np.asarray(t, dtype=float)
        overshoot = self.Ls * irrm / te * np.exp(-np.clip(t - ts, 0.0, None) / te)
        return np.where(t <= ts, self.VF, -(self.VR + overshoot))

    def reference(self) -> dict[str, float]:
        ts, irrm, te = self.ts, self.irrm, self.tau_e
        t0 = self.IF / self.a
        t90 = ts + te * math.log(1 / 0.9)
        t25 = ts + te * math.log(4.0)
        t_trr = t25 + (t25 - t90) * 0.25 / 0.65
        t2 = ts + te * math.log(50.0)
        err = quad(lambda t: float(self.voltage(t) * self.current(t)), t0, ts, limit=200)[0]
        err += quad(lambda t: float(self.voltage(t) * self.current(t)), ts, t2, limit=200)[0]
        return {
            "if_A": self.IF,
            "t0_s": t0,
            "irrm_A": irrm,
            "ta_s": ts - t0,
            "trr_s": t_trr - t0,
            "tb_s": t_trr - ts,
            "qrr_C": 0.5 * self.a * (ts - t0) ** 2 + 0.98 * irrm * te,
            "err_J": err,
            "didt_A_per_s": self.a,
            "rrsf": self.a / (irrm / te),
            "vrm_V": self.VR + self.Ls * irrm / te,
            "vr_V": self.VR,
            "t2_s": t2,
        }


def double_pulse_record(model: LMRamp, dt: float, *, t_lead: float = 2e-6,
                        t_tail: float = 3e-6) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Whole double-pulse record around the closed-form recovery (second turn-on at t = 0).

    First pulse (diode blocking, i = 0, v = -VR) until -1.5 µs, a 20 ns rise to IF at the
    switch turn-off, freewheel until the commutation ramp at t = 0, recovery, second pulse.
    """
    t = np.arange(-t_lead, t_tail, dt)
    i = model.current(t)
    v = model.voltage(t)
    first_pulse = t < -1.5e-6
    rising = (t >= -1.5e-6) & (t < -1.48e-6)
    i = np.where(first_pulse, 0.0, i)
    i = np.where(rising, model.IF * (t + 1.5e-6) / 20e-9, i)
    v = np.where(first_pulse, -model.VR, v)
    return t, v, i


def test_closed_form_solves_the_lauritzen_ma_equation():
    # The derivation above, checked by scipy's general ODE solver (an outside reference).
    m = LMRamp()
    sol = solve_ivp(lambda t, q: [(m.IF - m.a * t) - q[0] / m.tau], (0.0, m.ts),
                    [m.tau * m.IF], rtol=1e-10, atol=1e-18, dense_output=True)
    t = np.linspace(0.0, m.ts, 50)
    np.testing.assert_allclose(sol.sol(t)[0], m.q_m(t), rtol=1e-7, atol=1e-15)
    # blocking condition qE = i·TM + qM = 0 at ts
    assert (m.IF - m.a * m.ts) * m.TM + m.q_m(np.array(m.ts)) == pytest.approx(0.0, abs=1e-15)


@pytest.mark.parametrize(
    "model",
    [
        LMRamp(),
        LMRamp(IF=10.0, a=50e6, tau=300e-9, TM=100e-9, VR=400.0, Ls=100e-9),
        LMRamp(IF=80.0, a=1000e6, tau=60e-9, TM=20e-9, VR=800.0, Ls=30e-9),
    ],
)
def test_analysis_matches_closed_form(model):
    ref = model.reference()
    dt = 0.05e-9
    t, v, i = double_pulse_record(model, dt)
    got = analyze_recovery(t, v, i).to_dict()
    # Irrm sits on a cusp between samples: the sampled minimum differs by at most one
    # sample's worth of slope (max(a, Irrm/τe)·dt).
    cusp = max(model.a, model.irrm / model.tau_e) * dt
    assert got["irrm_A"] == pytest.approx(ref["irrm_A"], abs=cusp)
    assert got["if_A"] == pytest.approx(ref["if_A"], rel=1e-9)
    assert got["t0_s"] == pytest.approx(ref["t0_s"], abs=1e-13)
    assert got["ta_s"] == pytest.approx(ref["ta_s"], abs=dt)
    assert got["didt_A_per_s"] == pytest.approx(ref["didt_A_per_s"], rel=1e-6)
    for key in ("trr_s", "qrr_C", "err_J", "vrm_V", "t2_s"):
        assert got[key] == pytest.approx(ref[key], rel=0.005), key
    assert got["vr_V"] == pytest.approx(ref["vr_V"], rel=1e-9)
    assert got["rrsf"] == pytest.approx(ref["rrsf"], rel=0.03)
    assert got["softness"] == pytest.approx(ref["tb_s"] / ref["ta_s"], rel=0.02)
    assert got["flags"] == []


def test_closed_form_on_8bit_noisy_capture():
    # 2.5 GS/s, 8 bit over ±1.2·IF and ±1.2·VRM, 1 LSB rms noise.
    model = LMRamp()
    ref = model.reference()
    dt = 0.4e-9
    t, v, i = double_pulse_record(model, dt)
    rng = np.random.default_rng(7)
    lsb_i = 2 * 1.2 * model.IF / 256
    lsb_v = 2 * 1.2 * ref["vrm_V"] / 256
    i_q = np.clip(np.round((i + rng.normal(0, lsb_i, i.size)) / lsb_i), -128, 127) * lsb_i
    v_q = np.clip(np.round((v + rng.normal(0, lsb_v, v.size)) / lsb_v), -128, 127) * lsb_v
    got = analyze_recovery(t, v_q, i_q).to_dict()
    # one code is 2.1 % of Irrm here: tolerance 1 % + 1 LSB (degraded case only)
    assert got["irrm_A"] == pytest.approx(ref["irrm_A"], abs=0.01 * ref["irrm_A"] + lsb_i)
    assert got["if_A"] == pytest.approx(ref["if_A"], rel=0.01)
    assert got["trr_s"] == pytest.approx(ref["trr_s"], rel=0.03)
    assert got["qrr_C"] == pytest.approx(ref["qrr_C"], rel=0.03)
    assert got["err_J"] == pytest.approx(ref["err_J"], rel=0.03)
    assert got["didt_A_per_s"] == pytest.approx(ref["didt_A_per_s"], rel=0.02)
    # the voltage peak is a step (no capacitance in this model): 1 % + 1 LSB
    assert got["vrm_V"] == pytest.approx(ref["vrm_V"], abs=0.01 * ref["vrm_V"] + lsb_v)
