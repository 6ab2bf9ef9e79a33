"""Checks of the simulated-bench physics against closed forms and reference libraries.

Sources are named beside each check.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp
from scipy.optimize import brentq

from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.physics import (
    Fixture,
    LauritzenMaDiode,
    PulseTiming,
    SchottkyDiode,
    SwitchModel,
    first_pulse_for_current,
    simulate_current_ramp,
    simulate_double_pulse,
)

T25 = 298.15
T125 = 398.15

DIODE = LauritzenMaDiode(
    tau_s=140e-9, tm_s=50e-9, is_A=1e-10, n=2.0, cj0_F=400e-12, vj_V=0.7, m=0.45,
    series_resistance_ohm=0.02,
)


def recovery_numbers(wf, window_s=1.5e-6):
    """Irrm, reverse charge after the falling zero crossing, and di/dt of the second turn-on.

    Plain definitions (DESIGN §3 / IEC 60747-2 style): Irrm = −min(i); charge = −∫ i dt over
    the negative lobe(s) from the falling zero crossing t0 to the end of the window; di/dt from
    the +0.5·IF to the −0.5·Irrm crossings.
    """
    m = (wf.t >= wf.t_second_on_s) & (wf.t <= wf.t_second_on_s + window_s)
    t, i = wf.t[m], wf.i_diode[m]
    k0 = int(np.argmax(i < 0))
    irrm = float(-i.min())
    seg_t, seg_i = t[k0:], np.minimum(i[k0:], 0.0)
    q = float(-np.sum(0.5 * (seg_i[1:] + seg_i[:-1]) * np.diff(seg_t)))
    i_f = wf.current_at_second_turn_on_A
    ka = int(np.argmax(i < 0.5 * i_f))
    kb = int(np.argmax(i < -0.5 * irrm))
    didt = (0.5 * i_f + 0.5 * irrm) / (t[kb] - t[ka])
    return irrm, q, didt, t[k0]


# --- (1) closed-form Lauritzen-Ma solution under an ideal current ramp ---------------------------
# Lauritzen & Ma, IEEE Trans. Power Electronics 6(2):188-191, 1991, eqs. for qE, i, dqM/dt.
# With i(t) = IF − a·t imposed and qM(0) = τ·IF (steady state), dqM/dt = i − qM/τ integrates to
#   qM(t) = τ·(IF − a·t) + a·τ²·(1 − e^(−t/τ))
# (check: dqM/dt = −a·τ + a·τ·e^(−t/τ) = i − qM/τ).  qE = qM + TM·i, so
#   qE(t) = (τ + TM)·(IF − a·t) + a·τ²·(1 − e^(−t/τ)),  v = n·VT·ln(1 + qE/(Is·τ)),
# and the junction blocks (v = 0) when qE = 0, at a current
#   i_s = −a·τ²·(1 − e^(−t_s/τ))/(τ + TM).
@pytest.mark.parametrize(("if_A", "didt"), [(30.0, 500e6), (10.0, 200e6), (45.0, 1500e6)])
def test_ramp_matches_lauritzen_ma_closed_form(if_A, didt):
    # the closed form has no junction capacitance: make it negligible (1 pF) for this check
    diode = dataclasses.replace(DIODE, cj0_F=1e-12)
    jp = diode.at_temperature(T25)
    tau, tm = jp.tau_s, jp.tm_s

    def qe(t):
        return (tau + tm) * (if_A - didt * t) + didt * tau**2 * (1 - math.exp(-t / tau))

    t_s = brentq(qe, if_A / didt, if_A / didt + 20 * tau)
    res = simulate_current_ramp(diode, T25, if_A, didt, duration_s=1.02 * t_s)
    before = res.t < 0.97 * t_s
    t = res.t[before]
    qm_closed = tau * (if_A - didt * t) + didt * tau**2 * (1 - np.exp(-t / tau))
    scale = tau * if_A
    assert np.max(np.abs(res.q_stored_C[before] - qm_closed)) < 2e-3 * scale
    qe_closed = np.array([qe(x) for x in t])
    v_closed = jp.nvt_V * np.log1p(qe_closed / (jp.is_A * tau))
    early = t < 0.8 * t_s  # away from the log singularity at blocking
    assert np.max(np.abs(res.v_junction[before][early] - v_closed[early])) < 2e-3
    # blocking instant: the junction voltage falls through zero
    k = int(np.argmax(res.v_junction < 0.0))
    assert k > 0
    t_block = res.t[k]
    assert t_block == pytest.approx(t_s, rel=0.01)
    i_s = -didt * tau**2 * (1 - math.exp(-t_s / tau)) / (tau + tm)
    assert res.i[k] == pytest.approx(i_s, rel=0.02)


def test_tail_time_constant_is_tau_tm_over_sum():
    # Lauritzen & Ma 1991: once blocked (qE ≈ 0), i = −qM/TM and dqM/dt = −qM·(1/TM + 1/τ):
    # the tail decays with τ·TM/(τ + TM).  Fit the simulated tail of the second turn-on.
    fx = Fixture()
    t1 = first_pulse_for_current(fx, 600.0, 30.0)
    wf = simulate_double_pulse(
        fx, SwitchModel(), DIODE, PulseTiming(t1, 8e-6, 4e-6), 600.0, T25
    )
    m = (wf.t > wf.t_second_on_s) & (wf.t < wf.t_second_on_s + 1e-6)
    t, i = wf.t[m], wf.i_diode[m]
    k_min = int(np.argmin(i))
    irrm = -i[k_min]
    after = np.arange(len(i)) > k_min
    # fit between 40 % and 10 % of Irrm on the way back (the ringing has died out there)
    sel = after & (i > -0.4 * irrm) & (i < -0.1 * irrm)
    slope = np.polyfit(t[sel], np.log(-i[sel]), 1)[0]
    expected = DIODE.tau_s * DIODE.tm_s / (DIODE.tau_s + DIODE.tm_s)
    # the switch-voltage collapse adds C·dv/dt current during the tail: allow 15 %
    assert -1.0 / slope == pytest.approx(expected, rel=0.15)


# --- (3) SiC Schottky: reverse charge equals ∫C(V)dV --------------------------------------------
def depletion_charge_closed(cj0, vj, m, v):
    """∫₀^V Cj0/(1 + u/Vj)^M du = Cj0·Vj/(1 − M)·((1 + V/Vj)^(1−M) − 1), V reverse voltage
    (integral of the abrupt/graded-junction depletion capacitance, e.g. Sze, Physics of
    Semiconductor Devices, ch. 2)."""
    return cj0 * vj / (1 - m) * ((1 + v / vj) ** (1 - m) - 1)


def test_schottky_charge_equals_integral_of_capacitance():
    diode = SchottkyDiode(cj0_F=1.45e-9, vj_V=1.5, m=0.5)
    fx = Fixture()
    t1 = first_pulse_for_current(fx, 600.0, 20.0)
    wf = simulate_double_pulse(fx, SwitchModel(), diode, PulseTiming(t1, 6e-6, 4e-6), 600.0, T25)
    m = (wf.t >= wf.t_second_on_s) & (wf.t <= wf.t_second_on_s + 2e-6)
    t, i, v = wf.t[m], wf.i_diode[m], wf.v_diode[m]
    k0 = int(np.argmax(i < 0))
    # net charge from the zero crossing to the end (ringing has settled there)
    q_sim = -float(np.sum(0.5 * (i[k0 + 1 :] + i[k0:-1]) * np.diff(t[k0:])))
    v_start, v_end = -v[k0], -v[-1]  # reverse voltages (v_start ≈ 0 at the crossing)
    q_closed = depletion_charge_closed(1.45e-9, 1.5, 0.5, v_end) - depletion_charge_closed(
        1.45e-9, 1.5, 0.5, max(v_start, 0.0)
    )
    # independent numerical integral (scipy.integrate.quad) of the same C(V)
    q_quad, _ = quad(lambda u: 1.45e-9 / (1 + u / 1.5) ** 0.5, max(v_start, 0.0), v_end)
    assert q_closed == pytest.approx(q_quad, rel=1e-9)
    # diode-branch current seen by the sensor: junction current + Cj·dv/dt; leakage negligible
    assert q_sim == pytest.approx(q_closed, rel=0.02)


def test_schottky_qc_of_catalogue_part_in_range():
    # datasheet-typical Qc of a 1200 V / 20 A SiC Schottky at 600 V: 50-120 nC (from memory)
    part = load_virtual_parts().part("DX-5203")
    d = part.nominal_model()
    qc = depletion_charge_closed(d.cj0_F, d.vj_V, d.m, 600.0)
    assert 50e-9 < qc < 120e-9


# --- (4) trends and the double-pulse timing formula ---------------------------------------------
def test_first_pulse_formula_against_ode():
    # t1 = −(L/R)·ln(1 − I·R/V) (DESIGN §4; first-order R-L charging) against scipy solve_ivp
    fx = Fixture(load_inductance_H=200e-6, load_resistance_ohm=0.5)
    t1 = first_pulse_for_current(fx, 600.0, 30.0)
    sol = solve_ivp(
        lambda _t, y: [(600.0 - 0.5 * y[0]) / 200e-6], (0, t1), [0.0], rtol=1e-10, atol=1e-12
    )
    assert sol.y[0, -1] == pytest.approx(30.0, rel=1e-6)
    # ideal inductor: t1 = L·I/V
    assert first_pulse_for_current(Fixture(load_resistance_ohm=0.0), 600.0, 30.0) == (
        pytest.approx(200e-6 * 30.0 / 600.0)
    )


def test_simulated_current_reaches_target_and_droops_as_expected():
    fx = Fixture()
    sw = SwitchModel()
    i_target = 30.0
    t1 = first_pulse_for_current(fx, 600.0, i_target, v_switch_on=float(sw.on_voltage(i_target)))
    off = 10e-6
    wf = simulate_double_pulse(fx, sw, DIODE, PulseTiming(t1, off, 4e-6), 600.0, T25)
    # the switch turn-on delay (gate charging to Vth) costs a little current: within 2 %
    assert wf.current_at_first_turn_off_A == pytest.approx(i_target, rel=0.02)
    # droop in the off time ≈ (VF + I·R)·t_off/L (DESIGN §4), measured once the turn-off
    # transient is over (the current still rises while the switch voltage climbs)
    jp = DIODE.at_temperature(T25)
    t_a = t1 + 2e-6
    i1 = float(np.interp(t_a, wf.t, wf.i_load))
    span = wf.t_second_on_s - t_a
    droop = (jp.forward_voltage(i1) + i1 * fx.load_resistance_ohm) * span / fx.load_inductance_H
    measured = i1 - wf.current_at_second_turn_on_A
    assert measured == pytest.approx(droop, rel=0.15)


def _shot(diode, current, temperature, rg=22.0):
    fx = Fixture()
    sw = SwitchModel(gate_resistance_ohm=rg)
    t1 = first_pulse_for_current(fx, 600.0, current)
    return simulate_double_pulse(fx, sw, diode, PulseTiming(t1, 8e-6, 4e-6), 600.0, temperature)


def test_silicon_recovery_rises_with_temperature_current_and_didt():
    # physical trends of stored-charge recovery (e.g. Baliga, Fundamentals of Power
    # Semiconductor Devices, ch. 5): longer lifetime (hot), more forward charge (higher IF)
    # and less recombination time (faster di/dt) all raise Irrm and Qrr.
    base = recovery_numbers(_shot(DIODE, 30.0, T25))
    hot = recovery_numbers(_shot(DIODE, 30.0, T125))
    high_i = recovery_numbers(_shot(DIODE, 45.0, T25))
    slow = recovery_numbers(_shot(DIODE, 30.0, T25, rg=44.0))
    assert hot[0] > 1.1 * base[0] and hot[1] > 1.3 * base[1]
    assert high_i[0] > base[0] and high_i[1] > base[1]
    assert slow[2] < 0.7 * base[2]  # larger gate resistance, slower di/dt
    assert slow[0] < base[0] and slow[1] < base[1]


def test_didt_follows_gate_resistance_model():
    # the documented gate-resistance mapping (SwitchModel.turn_on_didt) is a simplified model of
    # the full switch equations the simulator solves: agreement within 25 % (common practice)
    for rg in (11.0, 22.0, 44.0):
        sw = SwitchModel(gate_resistance_ohm=rg)
        _irrm, _q, didt, _t0 = recovery_numbers(_shot(DIODE, 30.0, T25, rg=rg))
        assert didt == pytest.approx(sw.turn_on_didt(30.0), rel=0.25)


def test_catalogue_silicon_part_is_realistic():
    # target ranges for a 1200 V / 30 A fast-recovery diode at 600 V, 30 A, ~500 A/µs, 25 °C
    # (datasheet-typical, from memory): Irrm 15-30 A, Qrr 1-4 µC; markedly higher at 125 °C
    diode = load_virtual_parts().part("DX-4417").nominal_model()
    irrm, qrr, didt, _ = recovery_numbers(_shot(diode, 30.0, T25))
    assert 350e6 < didt < 700e6
    assert 15.0 < irrm < 30.0
    assert 1e-6 < qrr < 4e-6
    irrm_hot, qrr_hot, _, _ = recovery_numbers(_shot(diode, 30.0, T125))
    assert qrr_hot > 1.4 * qrr and irrm_hot > irrm


def test_blocking_voltage_overshoot_and_settling():
    # after recovery the diode blocks the bus voltage; the overshoot is bounded by Ls·|di/dt|
    # of the tail plus the switch-voltage collapse (DESIGN §4) — check it is present and sane
    wf = _shot(DIODE, 30.0, T25)
    m = (wf.t > wf.t_second_on_s) & (wf.t < wf.t_second_on_s + 1.5e-6)
    v = wf.v_diode[m]
    vr = -v[-1]
    assert vr == pytest.approx(600.0 - float(SwitchModel().on_voltage(30.0)), abs=3.0)
    overshoot = -v.min() - vr
    assert 1.0 < overshoot < 200.0


@pytest.mark.parametrize(
    ("current", "rg"), [(1.0, 22.0), (30.0, 200.0)], ids=["pulse-shorter-than-turn-on", "slow-gate"]
)
def test_events_longer_than_the_pulses_are_carried_through(current, rg):
    # a gate edge that arrives before the previous switching event has settled starts the next
    # event from the full circuit state: waveforms stay continuous (inductor current cannot jump,
    # basic circuit theory) and the shot completes
    fx = Fixture()
    timing = PulseTiming(first_pulse_for_current(fx, 600.0, current), 3e-6, 2e-6)
    wf = simulate_double_pulse(fx, SwitchModel(gate_resistance_ohm=rg), DIODE, timing, 600.0, T25)
    assert np.all(np.diff(wf.t) > 0)
    assert np.all(np.isfinite(wf.v_diode)) and np.all(np.isfinite(wf.i_diode))
    steps = np.abs(np.diff(wf.i_load))
    assert steps.max() < 0.05 * max(current, 1.0)
    assert wf.current_at_second_turn_on_A > 0.5 * current
    # the diode ends up blocking the bus during the second pulse
    k = int(np.searchsorted(wf.t, wf.t_second_off_s)) - 1
    assert wf.v_diode[k] < -0.9 * 600.0
