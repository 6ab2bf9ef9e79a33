"""Inductive double-pulse shot with the diode under test (pure physics, SI units).

The circuit, the switch model (gate resistance → commutation di/dt and voltage-collapse dv/dt)
and the switching-event solver are in :mod:`benchrun.simulator.circuit`; the diode models in
:mod:`benchrun.simulator.diode_models`; the scope acquisition in
:mod:`benchrun.simulator.acquisition`.  This module strings a whole shot together:

pre-trigger rest → first turn-on → first pulse → first turn-off → off time → second turn-on
(the recovery under test) → second pulse → second turn-off → freewheeling.

The switching events are integrated numerically until their transients have settled; the long
stretches in between use closed forms: the series R-L-C discharge of the bus capacitor while
the switch conducts, and the freewheeling decay L·di/dt = −(VF + R·i) in the off time with the
Lauritzen-Ma stored charge solved exactly.  Results are cached per (fixture, switch, diode,
timing, bus voltage, temperature), so repeated shots only redo the acquisition.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
from scipy.integrate import odeint, solve_ivp

from benchrun.simulator.acquisition import AcquisitionSettings, DigitizedChannel, digitize
from benchrun.simulator.circuit import (
    EventCircuit,
    EventSolution,
    Fixture,
    SwitchModel,
    bus_voltage_after_off,
    rlc_discharge,
    solve_event,
)
from benchrun.simulator.diode_models import (
    DiodeModel,
    JunctionParams,
    LauritzenMaDiode,
    SchottkyDiode,
)

__all__ = [
    "AcquisitionSettings",
    "CircuitWaveforms",
    "DigitizedChannel",
    "Fixture",
    "LauritzenMaDiode",
    "PulseTiming",
    "RampResponse",
    "SchottkyDiode",
    "SwitchModel",
    "bus_voltage_after_off",
    "digitize",
    "first_pulse_for_current",
    "simulate_current_ramp",
    "simulate_double_pulse",
    "simulate_inductive_recovery",
]


@dataclass(frozen=True)
class PulseTiming:
    """Gate timing of the double pulse; t = 0 is the first gate rising edge.

    ``post_s`` is how long the record is simulated after the second turn-off.
    """

    first_pulse_s: float
    off_time_s: float
    second_pulse_s: float
    post_s: float = 20e-6

    @property
    def second_on_s(self) -> float:
        return self.first_pulse_s + self.off_time_s

    @property
    def second_off_s(self) -> float:
        return self.first_pulse_s + self.off_time_s + self.second_pulse_s


@dataclass(frozen=True, eq=False)
class CircuitWaveforms:
    """Dense physical waveforms of one double-pulse shot (non-uniform time grid, read-only).

    Arrays: ``t`` (s, 0 = first gate edge), ``v_diode`` (anode-to-cathode, V), ``i_diode``
    (forward positive, A, as seen by the diode current sensor), ``v_switch`` (drain-source, V),
    ``i_switch`` (drain current, A), ``gate`` (gate-source voltage, V), ``i_load`` (A).
    Scalars: the load current at the second turn-on and at the first turn-off, the bus voltage
    at the second turn-on, event instants, and the peak reverse diode current of the second
    turn-on (for checks; the analysis measures its own).
    """

    t: np.ndarray
    v_diode: np.ndarray
    i_diode: np.ndarray
    v_switch: np.ndarray
    i_switch: np.ndarray
    gate: np.ndarray
    i_load: np.ndarray
    bus_voltage_V: float
    temperature_K: float
    current_at_first_turn_off_A: float
    current_at_second_turn_on_A: float
    bus_voltage_at_second_turn_on_V: float
    peak_reverse_current_A: float
    t_first_off_s: float
    t_second_on_s: float
    t_second_off_s: float
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    CHANNELS: ClassVar[dict[str, str]] = {
        "diode_voltage": "v_diode",
        "diode_current": "i_diode",
        "switch_voltage": "v_switch",
        "switch_current": "i_switch",
        "gate": "gate",
        "load_current": "i_load",
    }

    def channel(self, name: str) -> np.ndarray:
        """Physical waveform for a scope channel name (``diode_voltage``, ``diode_current``...)."""
        try:
            return getattr(self, self.CHANNELS[name])
        except KeyError as exc:
            raise KeyError(f"unknown channel {name!r}; known: {sorted(self.CHANNELS)}") from exc


def first_pulse_for_current(
    fixture: Fixture,
    bus_voltage_V: float,
    current_A: float,
    v_switch_on: float = 0.0,
) -> float:
    """First pulse width that charges the load inductor to ``current_A``.

    t1 = L·I/(Vbus − Vsw) for an ideal inductor; with winding resistance R,
    t1 = −(L/R)·ln(1 − I·R/(Vbus − Vsw)) (first-order R-L charging, standard circuit theory).
    """
    if current_A <= 0:
        raise ValueError("current must be positive")
    drive = bus_voltage_V - v_switch_on
    if drive <= 0:
        raise ValueError("bus voltage must exceed the switch on-state voltage")
    L = fixture.load_inductance_H
    R = fixture.load_resistance_ohm
    if R <= 0:
        return L * current_A / drive
    x = current_A * R / drive
    if x >= 1.0:
        raise ValueError("current not reachable: I·R >= Vbus − Vsw")
    return -(L / R) * math.log1p(-x)



# ---------------------------------------------------------------------------------------------
# the shot


class _Builder:
    def __init__(self) -> None:
        self.parts: list[dict[str, np.ndarray]] = []

    def add(self, **arrays: np.ndarray) -> None:
        self.parts.append({k: np.asarray(v, dtype=float) for k, v in arrays.items()})

    def build(self) -> dict[str, np.ndarray]:
        keys = self.parts[0].keys()
        out: dict[str, np.ndarray] = {}
        keep = []
        last_t = -np.inf
        for p in self.parts:
            mask = p["t"] > last_t
            keep.append(mask)
            last_t = p["t"][mask][-1] if mask.any() else last_t
        for k in keys:
            arr = np.concatenate([p[k][m] for p, m in zip(self.parts, keep, strict=True)])
            arr.flags.writeable = False
            out[k] = arr
        return out


def _window_to_builder(b: _Builder, w: EventSolution) -> None:
    b.add(
        t=w.t,
        v_diode=w.v_diode,
        i_diode=w.i_diode,
        v_switch=w.y[:, 1],
        i_switch=w.y[:, 3] - w.i_d,
        gate=w.y[:, 0],
        i_load=w.y[:, 3],
    )


def _gate_approach(sw: SwitchModel, target: float, vgs0: float, tau: np.ndarray) -> np.ndarray:
    """Gate voltage finishing its R-C approach to the drive level (drain voltage constant)."""
    return target + (vgs0 - target) * np.exp(-tau / (sw.gate_resistance_ohm * sw.ciss_F))


def _on_stretch(
    b: _Builder,
    fx: Fixture,
    sw: SwitchModel,
    jp: JunctionParams,
    t0: float,
    duration: float,
    y0: np.ndarray,
    vc0: float,
    i_d0: float,
) -> tuple[np.ndarray, float]:
    """Switch on, diode blocking: closed-form R-L-C ramp.  Returns (state, bus V) at the end."""
    n = 400
    tau = np.linspace(0.0, duration, n)
    L = fx.load_inductance_H + fx.stray_inductance_H
    R = fx.load_resistance_ohm + sw.on_resistance_ohm
    i, didt, vc = rlc_discharge(float(y0[3]), vc0, R, L, fx.bus_capacitance_F, tau)
    gate = _gate_approach(sw, sw.gate_on_V, float(y0[0]), tau)
    tail_tc = jp.tail_time_constant_s
    i_d = i_d0 * np.exp(-tau / tail_tc) if tail_tc > 0 else np.full_like(tau, i_d0)
    v_sw = np.asarray(sw.on_voltage(i - i_d, gate))
    v_p = vc - fx.stray_inductance_H * didt
    v_d = v_sw - v_p
    b.add(
        t=t0 + tau,
        v_diode=v_d,
        i_diode=i_d,
        v_switch=v_sw,
        i_switch=i - i_d,
        gate=gate,
        i_load=i,
    )
    q_end = -jp.tm_s * float(i_d[-1]) / jp.tau_s if jp.is_charge_control else 0.0
    v_j = float(v_d[-1]) - jp.rs_ohm * float(i_d[-1])
    y = np.array([gate[-1], v_sw[-1], i[-1] - i_d[-1], i[-1], v_j, q_end], dtype=float)
    return y, float(vc[-1])


def _off_stretch(
    b: _Builder,
    fx: Fixture,
    sw: SwitchModel,
    jp: JunctionParams,
    t0: float,
    duration: float,
    y0: np.ndarray,
    vc: float,
) -> np.ndarray:
    """Switch off, diode freewheeling: L·di/dt = −(R·i + VF(i)), VF linearised at i0.

    The stored charge obeys dqM/dt = i − qM/τ, solved exactly for i(t) = P·e^(−λt) + Q.
    Returns the circuit state at the end.
    """
    n = 200
    tau_t = np.linspace(0.0, duration, n)
    L, R = fx.load_inductance_H, fx.load_resistance_ohm
    i0, q0 = float(y0[3]), float(y0[5])
    i_ref = max(i0, 1e-3)
    v0 = jp.forward_voltage(i_ref)
    r_d = (jp.forward_voltage(i_ref * 1.001) - v0) / (i_ref * 0.001)
    r_tot = R + r_d
    v_const = v0 - r_d * i_ref  # VF(i) ≈ v_const + r_d·i
    lam = r_tot / L
    Q = -v_const / r_tot
    P = i0 - Q
    i = P * np.exp(-lam * tau_t) + Q
    if jp.is_charge_control:
        tau = jp.tau_s
        c = P * tau / (1.0 - lam * tau)
        K = q0 * tau - tau * Q - c
        qm = tau * Q + c * np.exp(-lam * tau_t) + K * np.exp(-tau_t / tau)
        q = qm / tau
        qe = qm + jp.tm_s * i
        v_j = jp.nvt_V * np.log1p(np.maximum(qe / (jp.is_A * jp.tau_s), -0.999999))
        q_end = float(q[-1])
    else:
        v_j = jp.nvt_V * np.log1p(np.maximum(i / jp.is_A, -0.999999))
        q_end = 0.0
    v_d = v_j + jp.rs_ohm * i
    gate = _gate_approach(sw, sw.gate_off_V, float(y0[0]), tau_t)
    b.add(
        t=t0 + tau_t,
        v_diode=v_d,
        i_diode=i,
        v_switch=vc + v_d,
        i_switch=np.zeros_like(i),
        gate=gate,
        i_load=i,
    )
    return np.array([gate[-1], vc + v_d[-1], 0.0, i[-1], v_j[-1], q_end], dtype=float)


def _fine_dt(switch: SwitchModel, fixture: Fixture, junction: JunctionParams) -> float:
    """Output step inside event windows: resolve the ringing and the switching edges."""
    c_ring = junction.capacitance(-abs(100.0)) + fixture.diode_parallel_capacitance_F
    period = 2 * math.pi * math.sqrt(fixture.stray_inductance_H * c_ring)
    return float(min(0.1e-9, period / 40.0))


@functools.lru_cache(maxsize=16)  # a shot holds a few MB of waveforms
def simulate_double_pulse(
    fixture: Fixture,
    switch: SwitchModel,
    diode: DiodeModel,
    timing: PulseTiming,
    bus_voltage_V: float,
    temperature_K: float,
) -> CircuitWaveforms:
    """Simulate one double-pulse shot; t = 0 at the first gate rising edge.

    Record: pre-trigger rest state, first turn-on (the diode's depletion charge is supplied),
    first pulse (load current ramps), first turn-off (diode takes the current), off time
    (diode freewheels, current droops by ≈ (VF + I·R)·t_off/L), second turn-on (reverse
    recovery of the diode under test, switch voltage collapse), second pulse, second turn-off,
    and ``timing.post_s`` of freewheeling.  Each gate edge starts a switching event that is
    integrated until it settles (then a closed form carries on to the next edge) or until the
    next edge (then the next event starts from the full circuit state).  Cached: identical
    arguments return the same object.
    """
    if bus_voltage_V <= 0:
        raise ValueError("bus voltage must be positive")
    if min(timing.first_pulse_s, timing.off_time_s, timing.second_pulse_s) <= 0:
        raise ValueError("pulse widths and off time must be positive")
    if timing.post_s < 0:
        raise ValueError("post_s must not be negative")
    fx, sw = fixture, switch
    jp = diode.at_temperature(temperature_K)
    dt = _fine_dt(sw, fx, jp)
    b = _Builder()
    vc = float(bus_voltage_V)

    # rest state before the first edge: no current, M held at P by the load inductor
    y = np.array([sw.gate_off_V, vc, 0.0, 0.0, 0.0, 0.0])
    b.add(
        t=np.array([-1e-6, 0.0]),
        v_diode=np.zeros(2),
        i_diode=np.zeros(2),
        v_switch=np.full(2, vc),
        i_switch=np.zeros(2),
        gate=np.full(2, sw.gate_off_V),
        i_load=np.zeros(2),
    )
    t_stop = timing.second_off_s + timing.post_s
    edges = (0.0, timing.first_pulse_s, timing.second_on_s, timing.second_off_s, t_stop)
    facts: dict[str, float] = {}
    for k in range(4):
        switch_on = k % 2 == 0
        drive = sw.gate_on_V if switch_on else sw.gate_off_V
        if k == 1:
            facts["i_first_off"] = float(y[3])
        if k == 2:
            facts["i_second_on"] = float(y[3])
            facts["vc_second_on"] = vc
        # the plasma extent (sweep-out law) is set by the charge stored when the event starts
        jp_event = jp.at_stored_charge(float(y[5]) * jp.tau_s)
        w = solve_event(
            EventCircuit(fx, sw, jp_event, vc, drive), edges[k], y, dt,
            expect_diode_on=not switch_on, t_limit=edges[k + 1],
        )
        _window_to_builder(b, w)
        if k == 2:
            facts["peak_reverse"] = float(max(0.0, -np.min(w.i_diode)))
        vc -= w.bus_charge_C / fx.bus_capacitance_F
        t_end = float(w.t[-1])
        y = w.y[-1].copy()
        if t_end < edges[k + 1]:
            if switch_on:
                y, vc = _on_stretch(
                    b, fx, sw, jp, t_end, edges[k + 1] - t_end, y, vc, float(w.i_diode[-1])
                )
            else:
                y = _off_stretch(b, fx, sw, jp, t_end, edges[k + 1] - t_end, y, vc)

    arrays = b.build()
    return CircuitWaveforms(
        **arrays,
        bus_voltage_V=float(bus_voltage_V),
        temperature_K=float(temperature_K),
        current_at_first_turn_off_A=facts["i_first_off"],
        current_at_second_turn_on_A=facts["i_second_on"],
        bus_voltage_at_second_turn_on_V=facts["vc_second_on"],
        peak_reverse_current_A=facts["peak_reverse"],
        t_first_off_s=timing.first_pulse_s,
        t_second_on_s=timing.second_on_s,
        t_second_off_s=timing.second_off_s,
    )


@dataclass(frozen=True)
class RampResponse:
    """Diode driven by an ideal falling current ramp: time, current, junction voltage, qM."""

    t: np.ndarray
    i: np.ndarray
    v_junction: np.ndarray
    q_stored_C: np.ndarray


def simulate_current_ramp(
    diode: DiodeModel,
    temperature_K: float,
    forward_current_A: float,
    didt_A_per_s: float,
    duration_s: float,
    dt_s: float = 0.05e-9,
) -> RampResponse:
    """Drive the diode (junction, capacitance, stored charge) with i(t) = IF − a·t.

    Starts from steady forward conduction (qM = τ·IF).  Uses the same junction equations and
    integrator as :func:`simulate_double_pulse`; an ideal current source keeps forcing current
    after the junction blocks, so only the part up to blocking is physical.  Used to check the
    solver against the closed-form ramp solution of the Lauritzen-Ma model.
    """
    jp = diode.at_temperature(temperature_K)
    jp = jp.at_stored_charge(jp.tau_s * forward_current_A)
    cap = jp.capacitance
    jc = jp.junction_current
    cx = jp.sweep_capacitance
    tau = jp.tau_s

    def rhs(y, t):
        v, q = y
        ij, dq = jc(v, q)
        c_sweep = cx(v, tau * q)
        dv = (forward_current_A - didt_A_per_s * t - ij) / (cap(v) + c_sweep)
        return [dv, dq + (c_sweep * dv / tau if c_sweep > 0.0 else 0.0)]

    v0 = jp.junction_voltage_forward(forward_current_A)
    q0 = forward_current_A if jp.is_charge_control else 0.0
    t = np.arange(0.0, duration_s + 0.5 * dt_s, dt_s)
    if jp.has_sweep_out:
        # the sweep capacitance switches on as the junction voltage passes 0: an implicit
        # method with step control across that corner (Radau IIA, scipy.integrate.solve_ivp)
        ivp = solve_ivp(lambda tt, y: rhs(y, tt), (0.0, float(t[-1])), [v0, q0],
                        method="Radau", t_eval=t, rtol=1e-8, atol=[1e-6, 1e-7])
        sol = ivp.y.T
    else:
        sol = odeint(rhs, [v0, q0], t, rtol=1e-8, atol=[1e-6, 1e-7], mxstep=200000)
    return RampResponse(
        t=t,
        i=forward_current_A - didt_A_per_s * t,
        v_junction=sol[:, 0],
        q_stored_C=sol[:, 1] * jp.tau_s,
    )


def junction_at(diode: DiodeModel, temperature_K: float) -> JunctionParams:
    """Temperature-adjusted solver parameters of ``diode`` (convenience re-export)."""
    return diode.at_temperature(temperature_K)



@dataclass(frozen=True)
class InductiveRecovery:
    """Diode recovery into an inductive loop: time, loop current, junction voltage, qM."""

    t: np.ndarray
    i: np.ndarray
    v_junction: np.ndarray
    q_stored_C: np.ndarray


def simulate_inductive_recovery(
    diode: DiodeModel,
    temperature_K: float,
    forward_current_A: float,
    reverse_voltage_V: float,
    loop_inductance_H: float,
    duration_s: float,
    loop_resistance_ohm: float = 0.0,
    parallel_capacitance_F: float = 0.0,
    dt_s: float = 0.05e-9,
) -> InductiveRecovery:
    """The reduced recovery circuit: the diode, conducting ``forward_current_A`` in steady
    state, is switched at t = 0 onto a source of −``reverse_voltage_V`` through the loop
    inductance L (and resistance R), with a capacitance Cp across the diode (layout, probe)::

        L·di/dt = −VR − v − (R + Rs)·i,   i = ij(v, qM) + (C(v) + Cp)·dv/dt + i_x

    di/dt = −VR/L while the diode conducts; once it blocks, its recovery current flows through
    L, so a snap-off drives the voltage beyond VR by L·di/dt and the loop rings with the
    diode capacitance (the circuit of Lauritzen & Ma's recovery test, IEEE Trans. Power
    Electronics 6(2), 1991, from memory).  The junction equations are those of
    :func:`simulate_double_pulse`; integrated by Radau IIA (scipy.integrate.solve_ivp).
    Used to check the model against ngspice on a circuit small enough to run in seconds.
    """
    jp = diode.at_temperature(temperature_K)
    jp = jp.at_stored_charge(jp.tau_s * forward_current_A)
    cap = jp.capacitance
    jc = jp.junction_current
    cx = jp.sweep_capacitance
    tau = jp.tau_s
    L, R = loop_inductance_H, loop_resistance_ohm + jp.rs_ohm

    def rhs(_t, y):
        i, v, q = y
        ij, dq = jc(v, q)
        c_sweep = cx(v, tau * q)
        dv = (i - ij) / (cap(v) + parallel_capacitance_F + c_sweep)
        return [(-reverse_voltage_V - v - R * i) / L, dv, dq + c_sweep * dv / tau]

    v0 = jp.junction_voltage_forward(forward_current_A)
    q0 = forward_current_A if jp.is_charge_control else 0.0
    t = np.arange(0.0, duration_s + 0.5 * dt_s, dt_s)
    ivp = solve_ivp(rhs, (0.0, float(t[-1])), [forward_current_A, v0, q0], method="Radau",
                    t_eval=t, rtol=1e-7, atol=[1e-6, 1e-5, 1e-7], max_step=0.2e-9)
    if not ivp.success:
        raise RuntimeError(f"recovery integration failed: {ivp.message}")
    return InductiveRecovery(t=ivp.t, i=ivp.y[0], v_junction=ivp.y[1],
                             q_stored_C=ivp.y[2] * tau)
