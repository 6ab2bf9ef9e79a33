"""The punch-through sweep-out diode (snappy recovery) against its closed forms.

Model (benchrun.simulator.diode_models, our variant of the Lauritzen-Ma charge-control model,
IEEE Trans. Power Electronics 6(2), 1991): the depleted fraction of the base is
f(v) = (√(Vj − v) − √Vj)/(√(Vj + Vpt) − √Vj) (abrupt-junction depletion width w ∝ √(Vj − v),
S. M. Sze, *Physics of Semiconductor Devices*, ch. 2), and the plasma left in the undepleted
base is swept out as the layer advances: i_x = −qM·(df/dt)/(1 − f), dqM/dt = i − qM/τ + i_x.

* closed form: with diffusion and recombination absent, d ln qM = d ln(1 − f), hence
  qM(v) = qM0·(1 − f(v))/(1 − f(v0)) (derivation ours, from the model equation above).
"""

from __future__ import annotations

import dataclasses
import math

import pytest
from scipy.integrate import solve_ivp

from benchrun.simulator.physics import (
    Fixture,
    LauritzenMaDiode,
    PulseTiming,
    SwitchModel,
    first_pulse_for_current,
    simulate_double_pulse,
)

FIXTURE = Fixture(load_inductance_H=20e-6, bus_capacitance_F=1.0)
SNAPPY = LauritzenMaDiode(
    tau_s=100e-9, tm_s=30e-9, is_A=1e-10, n=2.0, cj0_F=400e-12, vj_V=0.7, m=0.45,
    series_resistance_ohm=0.02, tm_temp_exponent=1.5, punch_through_V=700.0,
)


def test_sweep_law_closed_form():
    """Pure sweep (no diffusion, no recombination): qM = qM0·(1 − f(v))/(1 − f(v0))."""
    jp = SNAPPY.at_temperature(298.15)
    q0, v_start, rate = 2e-6, -5.0, -1e9  # C, V, V/s (the voltage is imposed)

    def rhs(t, y):
        v = v_start + rate * t
        return [jp.sweep_capacitance(v, y[0]) * rate]

    t_end = (-650.0 - v_start) / rate
    sol = solve_ivp(rhs, (0.0, t_end), [q0], rtol=1e-10, atol=1e-15, dense_output=True)
    for v in (-50.0, -300.0, -600.0, -650.0):
        expected = q0 * (1.0 - jp.depleted_fraction(v)) / (1.0 - jp.depleted_fraction(v_start))
        assert sol.sol((v - v_start) / rate)[0] == pytest.approx(expected, rel=1e-6)


def test_depleted_fraction_is_the_square_root_law():
    jp = SNAPPY.at_temperature(298.15)
    assert jp.depleted_fraction(0.5) == 0.0
    assert jp.depleted_fraction(-700.0) == pytest.approx(1.0)
    assert jp.depleted_fraction(-2000.0) == 1.0
    # w ∝ √(Vj − v): ratio of widths at two voltages (Sze ch. 2)
    w = lambda v: math.sqrt(0.7 - v) - math.sqrt(0.7)  # noqa: E731
    assert jp.depleted_fraction(-100.0) / jp.depleted_fraction(-400.0) == pytest.approx(
        w(-100.0) / w(-400.0)
    )
    assert jp.sweep_capacitance(-800.0, 1e-6) == 0.0  # punched through: nothing moves


def test_without_punch_through_the_model_is_lauritzen_ma():
    lm = dataclasses.replace(SNAPPY, punch_through_V=math.inf)
    far = dataclasses.replace(SNAPPY, punch_through_V=1e12)
    sw = SwitchModel(gate_resistance_ohm=10.0)
    timing = PulseTiming(first_pulse_for_current(FIXTURE, 600.0, 20.0), 2e-6, 1.5e-6)
    a = simulate_double_pulse(FIXTURE, sw, lm, timing, 600.0, 298.15)
    b = simulate_double_pulse(FIXTURE, sw, far, timing, 600.0, 298.15)
    assert b.peak_reverse_current_A == pytest.approx(a.peak_reverse_current_A, rel=2e-3)


def test_transit_time_and_lifetime_follow_temperature():
    cold, hot = SNAPPY.at_temperature(233.15), SNAPPY.at_temperature(398.15)
    # TM(T) = TM·(T/T0)^a, τ(T) = τ·(T/T0)^k (power laws stated in the model docstring)
    assert hot.tm_s / cold.tm_s == pytest.approx((398.15 / 233.15) ** 1.5)
    assert hot.tau_s / cold.tau_s == pytest.approx((398.15 / 233.15) ** 2.0)
    assert hot.tail_time_constant_s > cold.tail_time_constant_s


def test_plasma_extent_law():
    """Vex = Vpt·Q0/(Q0 + Q_h) (module docstring); Q_h = 0 leaves Vpt unchanged."""
    fill = dataclasses.replace(SNAPPY, plasma_fill_charge_C=2e-6)
    jp = fill.at_temperature(298.15)
    assert jp.at_stored_charge(2e-6).vpt_V == pytest.approx(350.0)
    assert jp.at_stored_charge(6e-6).vpt_V == pytest.approx(700.0 * 6 / 8)
    assert jp.at_stored_charge(0.0) is jp  # nothing stored, nothing swept
    plain = SNAPPY.at_temperature(298.15)
    assert plain.at_stored_charge(1e-7) is plain
    # the pure sweep then exhausts the charge at −Vex: qM ∝ 1 − f(v) reaches 0 there
    ex = jp.at_stored_charge(2e-6)
    assert ex.depleted_fraction(-350.0) == pytest.approx(1.0)
    assert ex.sweep_capacitance(-351.0, 1e-6) == 0.0
