"""The switching-event solver against scipy's Radau integrator (an independent reference).

The event solver (:func:`benchrun.simulator.circuit.solve_event`) integrates the circuit with
its own hand-written right-hand side and analytic Jacobian.  Here the same circuit equations
are written out plainly from the model definitions (``JunctionParams.junction_current`` and
``capacitance`` — the Lauritzen-Ma equations, IEEE Trans. Power Electronics 6(2), 1991 — and
the three-capacitor switch of the circuit module docstring) and solved by
``scipy.integrate.solve_ivp(method="Radau")`` (implicit Runge-Kutta, order 5, finite-difference
Jacobian) at tight tolerances.  A commutation window — the diode freewheeling the load current
in steady state when the switch turns on — must give the same Irrm and reverse-recovery charge
within 0.5 %.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from benchrun.simulator.circuit import EventCircuit, Fixture, SwitchModel, _make_rhs, solve_event
from benchrun.simulator.devices import load_virtual_parts
from benchrun.simulator.diode_models import LauritzenMaDiode, SchottkyDiode

BUS_V = 600.0
DT = 0.1e-9

SILICON = LauritzenMaDiode(
    tau_s=140e-9, tm_s=50e-9, is_A=1e-10, n=2.0, cj0_F=400e-12, vj_V=0.7, m=0.45,
    series_resistance_ohm=0.02,
)


def reference_rhs(c: EventCircuit):
    """The event circuit written plainly (state: vgs, vsw, iLs, IL, vj, q = qM/τ)."""
    fx, sw, jp = c.fixture, c.switch, c.junction
    Rp, Rs = fx.stray_damping_resistance_ohm, jp.rs_ohm
    cap_matrix = np.array([[sw.cgs_F + sw.cgd_F, -sw.cgd_F], [-sw.cgd_F, sw.cds_F + sw.cgd_F]])

    def channel(vgs, vds):
        w = sw.overdrive_smoothing_V
        vov = w * np.logaddexp(0.0, (vgs - sw.threshold_V) / w)  # smooth max(vgs − Vth, 0)
        imax = sw.transconductance_S * vov
        if imax < 1e-12:
            return 1e-9 * vds
        return imax * math.tanh(vds / (imax * sw.on_resistance_ohm)) + 1e-9 * vds

    def rhs(_t, y):
        vgs, vsw, iLs, IL, vj, q = y
        ij, dq = jp.junction_current(vj, q)
        # diode branch: Rs in series with the junction; Rp across Ls; node P at Vbus − v(Ls)
        i_d = (IL - iLs - (vj - vsw + c.bus_V) / Rp) / (1.0 + Rs / Rp)
        v_d = vj + Rs * i_d
        dvj = (i_d - ij) / (jp.capacitance(vj) + fx.diode_parallel_capacitance_F)
        # gate and drain nodes: C · d(vgs, vsw)/dt = (gate current, drain current)
        b = [(c.gate_drive_V - vgs) / sw.gate_resistance_ohm, IL - i_d - channel(vgs, vsw)]
        dvgs, dvsw = np.linalg.solve(cap_matrix, b)
        return [
            dvgs,
            dvsw,
            (v_d - vsw + c.bus_V) / fx.stray_inductance_H,
            (-v_d - fx.load_resistance_ohm * IL) / fx.load_inductance_H,
            dvj,
            dq,
        ]

    return rhs


def sensor_current(c: EventCircuit, y: np.ndarray) -> np.ndarray:
    """Current in the diode sensor: the diode branch current less the displacement current of
    the parallel (non-diode) capacitance, which shares the junction voltage."""
    fx, jp = c.fixture, c.junction
    vsw, iLs, IL, vj, q = y[1], y[2], y[3], y[4], y[5]
    Rp, Rs, Cpar = fx.stray_damping_resistance_ohm, jp.rs_ohm, fx.diode_parallel_capacitance_F
    i_d = (IL - iLs - (vj - vsw + c.bus_V) / Rp) / (1.0 + Rs / Rp)
    ij = np.array([jp.junction_current(v, qq)[0] for v, qq in zip(vj, q, strict=True)])
    cj = np.array([jp.capacitance(v) for v in vj])
    return (cj * i_d + Cpar * ij) / (cj + Cpar)


def freewheeling_state(c: EventCircuit, current_A: float) -> np.ndarray:
    """Steady freewheeling: switch off, diode carrying the load current, no current in Ls."""
    jp, sw = c.junction, c.switch
    v_j = jp.junction_voltage_forward(current_A)
    v_d = v_j + jp.rs_ohm * current_A
    q = current_A if jp.is_charge_control else 0.0
    return np.array([sw.gate_off_V, c.bus_V + v_d, 0.0, current_A, v_j, q])


def recovery(t: np.ndarray, i: np.ndarray) -> tuple[float, float]:
    """Irrm = −min(i) and the reverse charge −∫ min(i, 0) dt from the falling zero crossing to
    the end of the window (plain definitions, IEC 60747-2 style)."""
    k0 = int(np.argmax(i < 0.0))
    seg = np.minimum(i[k0 - 1 :], 0.0)
    return float(-i.min()), float(-np.sum(0.5 * (seg[1:] + seg[:-1]) * np.diff(t[k0 - 1 :])))


@pytest.mark.parametrize(
    ("diode_name", "temperature_K", "rg", "current_A"),
    [
        ("silicon", 298.15, 22.0, 30.0),
        ("catalogue", 398.15, 15.0, 20.0),
        ("sic", 298.15, 10.0, 20.0),
    ],
)
def test_commutation_window_matches_scipy_radau(diode_name, temperature_K, rg, current_A):
    diode = {
        "silicon": SILICON,
        "catalogue": load_virtual_parts().part("DX-4417").nominal_model(),
        "sic": SchottkyDiode(cj0_F=1.45e-9, vj_V=1.5, m=0.5),
    }[diode_name]
    sw = SwitchModel(gate_resistance_ohm=rg)
    c = EventCircuit(Fixture(), sw, diode.at_temperature(temperature_K), BUS_V, sw.gate_on_V)
    y0 = freewheeling_state(c, current_A)
    ours = solve_event(c, 0.0, y0, DT, expect_diode_on=False)
    assert ours.settled

    ref = solve_ivp(
        reference_rhs(c), (0.0, float(ours.t[-1])), y0, method="Radau", t_eval=ours.t,
        rtol=1e-9, atol=[1e-7, 1e-6, 1e-7, 1e-7, 1e-7, 1e-8],
    )
    assert ref.success
    irrm_ref, q_ref = recovery(ref.t, sensor_current(c, ref.y))
    irrm, q = recovery(ours.t, ours.i_diode)
    assert irrm_ref > 0.1 * current_A  # a real reverse-recovery peak is being compared
    assert irrm == pytest.approx(irrm_ref, rel=5e-3)
    assert q == pytest.approx(q_ref, rel=5e-3)
    # the whole window, not only the two numbers: every state within 0.5 % of its range
    for k in range(6):
        span = np.ptp(ref.y[k]) + 1e-12
        assert np.max(np.abs(ours.y[:, k] - ref.y[k])) < 5e-3 * span


def test_analytic_jacobian_matches_central_differences():
    # the Jacobian handed to the integrator against central differences of the right-hand side
    # (common practice); states from a forward-conducting, a recovering and a blocking diode
    for diode in (SILICON, SchottkyDiode(cj0_F=1.45e-9, vj_V=1.5, m=0.5)):
        jp = diode.at_temperature(348.15)
        for drive in (0.0, 15.0):
            c = EventCircuit(Fixture(), SwitchModel(), jp, BUS_V, drive)
            rhs, jac = _make_rhs(c)
            states = [
                freewheeling_state(c, 30.0),
                np.array([6.0, 300.0, 20.0, 30.0, 0.3, 12.0 if jp.is_charge_control else 0.0]),
                np.array([12.0, 1.5, 30.5, 30.0, -598.0, 0.01 if jp.is_charge_control else 0.0]),
            ]
            for y in states:
                analytic = np.array(jac(y, 0.0))
                numeric = np.empty((6, 6))
                for j in range(6):
                    h = 1e-6 * max(abs(y[j]), 1e-3)
                    e = np.zeros(6)
                    e[j] = h
                    upper, lower = np.array(rhs(y + e, 0.0)), np.array(rhs(y - e, 0.0))
                    numeric[:, j] = (upper - lower) / (2 * h)
                scale = np.abs(numeric).max(axis=1, keepdims=True) + 1e-30
                assert np.max(np.abs(analytic - numeric) / scale) < 1e-4
