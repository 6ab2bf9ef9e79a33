"""Inductive double-pulse circuit with the diode under test (pure physics, SI units).

Circuit (high-side diode under test freewheeling the load inductor, low-side switch)::

      bus cap C (Vbus) ── Ls ∥ Rp ──┬── P ─────────────┐
                                    │                 │
                              load L, R          diode (cathode at P)
                                    │                 │
                                    └── M ────────────┘ anode at M
                                        │
                               switch (drain M, source 0), gate via Rg
                                        │
      bus cap (−) ────────────────────── 0

* v_diode = V(M) − V(P) (anode-to-cathode, negative when blocking), i_diode forward positive.
* Switch model (a textbook three-capacitor MOSFET/IGBT model, e.g. B. J. Baliga, *Fundamentals
  of Power Semiconductor Devices*, ch. 6 on inductive-load turn-on): gate resistor Rg from a
  drive Vgg, capacitances Cgs, Cgd (Miller), Cds; channel current
  ``i_ch = gm·vov·tanh(v_ds/(gm·vov·Ron))`` with vov a smooth max(vgs − Vth, 0).  During the
  current rise the drain voltage is nearly constant, so the gate charges through Rg·Ciss and the
  commutation rate is approximately::

      di/dt ≈ gm·(Vgg − Vth − I/(2·gm)) / (Rg·(Cgs + Cgd))        (:meth:`SwitchModel.turn_on_didt`)

  — smaller Rg, faster di/dt.  Once the diode blocks, the gate sits on the Miller plateau
  Vgp = Vth + I/gm and the switch voltage collapses at dv/dt ≈ (Vgg − Vgp)/(Rg·Cgd).
  These two formulas are a simplified *model* of the switch; the simulator solves the full
  circuit equations, so the measured di/dt is close to, not identical with, the formula.

Solution method: the switching events (two turn-ons, two turn-offs) are integrated on a fine
uniform grid by LSODA (stiff/non-stiff switching BDF/Adams, scipy.integrate.odeint) until the
transients have settled; the long linear stretches use closed forms (series R-L-C discharge of
the bus capacitor while the switch conducts; freewheeling decay L·di/dt = −(VF + R·i) in the
off time, with the Lauritzen-Ma stored charge solved exactly).  Results are cached per
(fixture, switch, diode, timing, bus voltage, temperature).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
from scipy.integrate import odeint

from benchrun.simulator.acquisition import AcquisitionSettings, DigitizedChannel, digitize
from benchrun.simulator.diode_models import (
    DiodeModel,
    JunctionParams,
    LauritzenMaDiode,
    SchottkyDiode,
    limited_exp_array,
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
]


@dataclass(frozen=True)
class Fixture:
    """The double-pulse fixture.

    ``stray_damping_resistance_ohm`` sits in parallel with the loop stray inductance Ls and
    stands for skin-effect and eddy losses (it damps the Ls-C ringing with Q ≈ Rp/√(Ls/C));
    ``diode_parallel_capacitance_F`` is the capacitance across the diode terminals that is not
    part of the diode (load-inductor winding, probe, layout); it takes part in the ringing but is
    not seen by the diode current sensor.  The bleeder discharges the bus capacitor after the
    supply output is switched off (:func:`bus_voltage_after_off`); its current during a shot is
    negligible and is ignored.
    """

    load_inductance_H: float = 200e-6
    load_resistance_ohm: float = 0.02
    stray_inductance_H: float = 60e-9
    bus_capacitance_F: float = 1.0e-3
    bleeder_resistance_ohm: float = 20e3
    stray_damping_resistance_ohm: float = 120.0
    diode_parallel_capacitance_F: float = 60e-12
    max_current_A: float = 120.0
    max_pulse_s: float = 500e-6


@dataclass(frozen=True)
class SwitchModel:
    """Low-side switch (three-capacitor model, see the module docstring)."""

    gate_resistance_ohm: float = 22.0
    gate_on_V: float = 15.0
    gate_off_V: float = 0.0
    threshold_V: float = 4.0
    transconductance_S: float = 12.0
    on_resistance_ohm: float = 0.04
    cgs_F: float = 9.95e-9
    cgd_F: float = 50e-12
    cds_F: float = 200e-12
    overdrive_smoothing_V: float = 0.05

    @property
    def ciss_F(self) -> float:  # noqa: N802 (SI unit suffix)
        return self.cgs_F + self.cgd_F

    def turn_on_didt(self, current_A: float) -> float:
        """Approximate commutation di/dt (A/s) at turn-on with load current ``current_A``.

        Model: di/dt = gm·dvgs/dt with dvgs/dt = (Vgg − vgs)/(Rg·Ciss) taken at the middle of
        the current rise, vgs = Vth + I/(2·gm).
        """
        headroom = self.gate_on_V - self.threshold_V - current_A / (2.0 * self.transconductance_S)
        return self.transconductance_S * max(headroom, 0.0) / (
            self.gate_resistance_ohm * self.ciss_F
        )

    def turn_on_dvdt(self, current_A: float) -> float:
        """Approximate switch voltage collapse rate (V/s): (Vgg − Vgp)/(Rg·Cgd)."""
        plateau = self.threshold_V + current_A / self.transconductance_S
        return max(self.gate_on_V - plateau, 0.0) / (self.gate_resistance_ohm * self.cgd_F)

    def with_didt(self, didt_A_per_s: float, current_A: float) -> SwitchModel:
        """Copy with the gate resistance that gives ``didt_A_per_s`` by :meth:`turn_on_didt`."""
        if didt_A_per_s <= 0:
            raise ValueError("di/dt must be positive")
        headroom = self.gate_on_V - self.threshold_V - current_A / (2.0 * self.transconductance_S)
        if headroom <= 0:
            raise ValueError("current exceeds what the switch can carry at this gate drive")
        rg = self.transconductance_S * headroom / (didt_A_per_s * self.ciss_F)
        return dataclasses.replace(self, gate_resistance_ohm=rg)

    @property
    def saturation_current_A(self) -> float:  # noqa: N802 (SI unit suffix)
        """Largest channel current at full gate drive, gm·(Vgg − Vth)."""
        return self.transconductance_S * (self.gate_on_V - self.threshold_V)

    def on_voltage(self, current_A: np.ndarray | float) -> np.ndarray | float:
        """Drain voltage of the fully-on switch carrying ``current_A`` (inverse of the tanh law)."""
        imax = self.transconductance_S * (self.gate_on_V - self.threshold_V)
        ratio = np.clip(np.asarray(current_A, dtype=float) / imax, -0.999999, 0.999999)
        out = imax * self.on_resistance_ohm * np.arctanh(ratio)
        return float(out) if np.ndim(out) == 0 else out


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


def bus_voltage_after_off(fixture: Fixture, v0_V: float, t_s: float) -> float:
    """Bus voltage t seconds after the supply output is switched off: V0·exp(−t/(R_bleed·C))."""
    return v0_V * math.exp(-t_s / (fixture.bleeder_resistance_ohm * fixture.bus_capacitance_F))


# ---------------------------------------------------------------------------------------------
# event windows: full circuit ODE


@dataclass(frozen=True)
class _Circuit:
    fixture: Fixture
    switch: SwitchModel
    junction: JunctionParams
    bus_V: float
    gate_drive_V: float


def _channel_current(sw: SwitchModel, vgs: float, vds: float) -> float:
    w = sw.overdrive_smoothing_V
    x = (vgs - sw.threshold_V) / w
    vov = vgs - sw.threshold_V if x > 30.0 else w * math.log1p(math.exp(x))
    imax = sw.transconductance_S * vov
    if imax < 1e-12:
        return vds * 1e-9
    return imax * math.tanh(vds / (imax * sw.on_resistance_ohm)) + vds * 1e-9


def _make_rhs(c: _Circuit):
    fx, sw, jp = c.fixture, c.switch, c.junction
    Rp, Rs = fx.stray_damping_resistance_ohm, jp.rs_ohm
    Ls, L, R = fx.stray_inductance_H, fx.load_inductance_H, fx.load_resistance_ohm
    Cpar = fx.diode_parallel_capacitance_F
    Rg, Vgg, Vbus = sw.gate_resistance_ohm, c.gate_drive_V, c.bus_V
    a11 = sw.cgs_F + sw.cgd_F
    a12 = -sw.cgd_F
    a22 = sw.cds_F + sw.cgd_F
    det = a11 * a22 - a12 * a12
    k_rs = 1.0 + Rs / Rp
    junction_current = jp.junction_current
    capacitance = jp.capacitance

    def rhs(y, _t):
        vgs, vsw, iLs, IL, vj, q = y
        ij, dq = junction_current(vj, q)
        i_d = (IL - iLs - (vj - vsw + Vbus) / Rp) / k_rs
        v_d = vj + Rs * i_d
        dvj = (i_d - ij) / (capacitance(vj) + Cpar)
        dIL = (-v_d - R * IL) / L
        diLs = (v_d - vsw + Vbus) / Ls
        ich = _channel_current(sw, vgs, vsw)
        b1 = (Vgg - vgs) / Rg
        b2 = IL - i_d - ich
        dvgs = (a22 * b1 - a12 * b2) / det
        dvsw = (a11 * b2 - a12 * b1) / det
        return [dvgs, dvsw, diLs, dIL, dvj, dq]

    return rhs


_ATOL = np.array([1e-4, 1e-3, 1e-4, 1e-4, 1e-4, 1e-5])


@dataclass(frozen=True)
class _Window:
    t: np.ndarray
    y: np.ndarray  # (n, 6)
    i_d: np.ndarray  # terminal diode-branch current
    i_diode: np.ndarray  # current seen by the diode sensor
    v_diode: np.ndarray
    bus_charge_C: float


def _window_outputs(c: _Circuit, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    fx, jp = c.fixture, c.junction
    Rp, Rs, Cpar = fx.stray_damping_resistance_ohm, jp.rs_ohm, fx.diode_parallel_capacitance_F
    vsw, iLs, IL, vj, q = y[:, 1], y[:, 2], y[:, 3], y[:, 4], y[:, 5]
    i_d = (IL - iLs - (vj - vsw + c.bus_V) / Rp) / (1.0 + Rs / Rp)
    e = limited_exp_array(vj / jp.nvt_V) - 1.0
    ij = (
        (jp.is_A * jp.tau_s * e - jp.tau_s * q) / jp.tm_s if jp.is_charge_control else jp.is_A * e
    )
    cj = jp.capacitance_array(vj)
    # sensor current excludes the displacement current of the parallel (non-diode) capacitance
    i_sensor = (cj * i_d + Cpar * ij) / (cj + Cpar)
    v_d = vj + Rs * i_d
    return i_d, i_sensor, v_d


def _solve_window(
    c: _Circuit,
    t0: float,
    y0: np.ndarray,
    dt: float,
    expect_diode_on: bool,
    max_duration_s: float = 8e-6,
) -> _Window:
    """Integrate one switching event from ``t0`` until it has settled."""
    rhs = _make_rhs(c)
    tau_gate = c.switch.gate_resistance_ohm * c.switch.ciss_F
    chunk = max(150e-9, 4.0 * tau_gate)
    n_chunk = max(round(chunk / dt), 16)
    ts, ys = [np.array([t0])], [y0[None, :]]
    t_now, y_now = t0, y0
    swing = abs(c.switch.gate_on_V - c.switch.gate_off_V)
    while True:
        grid = t_now + dt * np.arange(n_chunk + 1)
        sol, info = odeint(
            rhs, y_now, grid, rtol=1e-6, atol=_ATOL, mxstep=200000, full_output=True
        )
        if info["message"] != "Integration successful.":
            raise RuntimeError(f"circuit integration failed: {info['message']}")
        ts.append(grid[1:])
        ys.append(sol[1:])
        t_now, y_now = grid[-1], sol[-1]
        if t_now - t0 >= max_duration_s:
            break
        tail = sol[-max(n_chunk // 3, 8) :]
        i_d, _, v_d = _window_outputs(c, tail)
        IL = tail[:, 3]
        scale_i = 0.003 * max(abs(float(IL[-1])), 1.0)
        scale_v = 0.002 * abs(c.bus_V) + 0.05
        settled = (
            abs(float(tail[-1, 0]) - c.gate_drive_V) < 0.25 * swing
            and np.ptp(v_d) < scale_v
            and np.ptp(tail[:, 1]) < scale_v
            and np.ptp(i_d) < scale_i
        )
        if expect_diode_on:
            settled = settled and abs(float(i_d[-1] - IL[-1])) < scale_i
        else:
            settled = settled and abs(float(i_d[-1])) < scale_i
        if settled:
            break
    t = np.concatenate(ts)
    y = np.concatenate(ys)
    i_d, i_sensor, v_d = _window_outputs(c, y)
    i_bus = y[:, 3] - i_d
    charge = float(np.sum(0.5 * (i_bus[1:] + i_bus[:-1]) * np.diff(t)))
    return _Window(t=t, y=y, i_d=i_d, i_diode=i_sensor, v_diode=v_d, bus_charge_C=charge)


# ---------------------------------------------------------------------------------------------
# closed-form stretches


def _rlc_discharge(
    i0: float, v0: float, R: float, L: float, C: float, t: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Series R-L-C loop with the capacitor charged to v0 driving current i0 at t = 0.

    L·di/dt = vC − R·i, C·dvC/dt = −i.  Returns (i, di/dt, vC).  Standard second-order circuit
    solution with roots s = −α ± √(α² − ω0²), α = R/(2L), ω0² = 1/(LC).
    """
    alpha = R / (2.0 * L)
    w02 = 1.0 / (L * C)
    disc = complex(alpha * alpha - w02)
    root = np.sqrt(disc)
    s2 = -alpha - root
    s1 = w02 / s2  # product of the roots is ω0² (avoids cancellation)
    if abs(s1 - s2) < 1e-9 * abs(s2):
        s1 = s1 * (1 + 1e-6)
    d0 = (v0 - R * i0) / L
    a = (d0 - s2 * i0) / (s1 - s2)
    b = i0 - a
    e1, e2 = np.exp(s1 * t), np.exp(s2 * t)
    i = (a * e1 + b * e2).real
    didt = (a * s1 * e1 + b * s2 * e2).real
    charge = (a * np.expm1(s1 * t) / s1 + b * np.expm1(s2 * t) / s2).real
    return i, didt, v0 - charge / C


def _segment_points(duration: float, n: int) -> np.ndarray:
    return np.linspace(0.0, duration, max(n, 2))


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


def _window_to_builder(b: _Builder, w: _Window) -> None:
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
    i0: float,
    vc0: float,
    i_d0: float,
    vgs0: float,
) -> tuple[float, float]:
    """Switch on, diode blocking: closed-form R-L-C ramp. Returns (current, bus V) at the end."""
    n = 400
    tau = np.linspace(0.0, duration, n)
    L = fx.load_inductance_H + fx.stray_inductance_H
    R = fx.load_resistance_ohm + sw.on_resistance_ohm
    i, didt, vc = _rlc_discharge(i0, vc0, R, L, fx.bus_capacitance_F, tau)
    v_sw = np.asarray(sw.on_voltage(i))
    v_p = vc - fx.stray_inductance_H * didt
    tail_tc = jp.tail_time_constant_s
    i_d = i_d0 * np.exp(-tau / tail_tc) if tail_tc > 0 else np.full_like(tau, i_d0)
    b.add(
        t=t0 + tau,
        v_diode=v_sw - v_p,
        i_diode=i_d,
        v_switch=v_sw,
        i_switch=i - i_d,
        gate=_gate_approach(sw, sw.gate_on_V, vgs0, tau),
        i_load=i,
    )
    return float(i[-1]), float(vc[-1])


def _off_stretch(
    b: _Builder,
    fx: Fixture,
    sw: SwitchModel,
    jp: JunctionParams,
    t0: float,
    duration: float,
    i0: float,
    vc: float,
    q0: float,
    vgs0: float,
) -> tuple[float, float]:
    """Switch off, diode freewheeling: L·di/dt = −(R·i + VF(i)), VF linearised at i0.

    The stored charge obeys dqM/dt = i − qM/τ, solved exactly for i(t) = P·e^(−λt) + Q.
    Returns (current, q = qM/τ) at the end.
    """
    n = 200
    tau_t = np.linspace(0.0, duration, n)
    L, R = fx.load_inductance_H, fx.load_resistance_ohm
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
    b.add(
        t=t0 + tau_t,
        v_diode=v_d,
        i_diode=i,
        v_switch=vc + v_d,
        i_switch=np.zeros_like(i),
        gate=_gate_approach(sw, sw.gate_off_V, vgs0, tau_t),
        i_load=i,
    )
    return float(i[-1]), q_end


def _fine_dt(switch: SwitchModel, fixture: Fixture, junction: JunctionParams) -> float:
    """Output step inside event windows: resolve the ringing and the switching edges."""
    c_ring = junction.capacitance(-abs(100.0)) + fixture.diode_parallel_capacitance_F
    period = 2 * math.pi * math.sqrt(fixture.stray_inductance_H * c_ring)
    return float(min(0.1e-9, period / 40.0))


@functools.lru_cache(maxsize=64)
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
    and ``timing.post_s`` of freewheeling.  Cached: identical arguments return the same object.
    """
    if bus_voltage_V <= 0:
        raise ValueError("bus voltage must be positive")
    if min(timing.first_pulse_s, timing.off_time_s, timing.second_pulse_s) <= 0:
        raise ValueError("pulse widths and off time must be positive")
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

    # first turn-on
    w = _solve_window(_Circuit(fx, sw, jp, vc, sw.gate_on_V), 0.0, y, dt, expect_diode_on=False)
    _window_to_builder(b, w)
    vc -= w.bus_charge_C / fx.bus_capacitance_F
    t_end = float(w.t[-1])
    if t_end >= timing.first_pulse_s:
        raise ValueError("first pulse shorter than the switch turn-on transient")
    i_now, vc = _on_stretch(
        b, fx, sw, jp, t_end, timing.first_pulse_s - t_end,
        float(w.y[-1, 3]), vc, float(w.i_diode[-1]), float(w.y[-1, 0]),
    )

    # first turn-off
    t1 = timing.first_pulse_s
    i_first_off = i_now
    y = np.array([sw.gate_on_V, float(sw.on_voltage(i_now)), i_now, i_now,
                  float(sw.on_voltage(i_now)) - vc, 0.0])
    w = _solve_window(_Circuit(fx, sw, jp, vc, sw.gate_off_V), t1, y, dt, expect_diode_on=True)
    _window_to_builder(b, w)
    vc -= w.bus_charge_C / fx.bus_capacitance_F
    t_end = float(w.t[-1])
    t2 = timing.second_on_s
    if t_end >= t2:
        raise ValueError("off time shorter than the switch turn-off transient")
    i_now, q_now = _off_stretch(
        b, fx, sw, jp, t_end, t2 - t_end, float(w.y[-1, 3]), vc, float(w.y[-1, 5]),
        float(w.y[-1, 0]),
    )

    # second turn-on: the recovery under test
    i_second_on = i_now
    vj = jp.junction_voltage_forward(i_now, q_now if jp.is_charge_control else None)
    y = np.array([sw.gate_off_V, vc + vj + jp.rs_ohm * i_now, 0.0, i_now, vj, q_now])
    w = _solve_window(_Circuit(fx, sw, jp, vc, sw.gate_on_V), t2, y, dt, expect_diode_on=False)
    _window_to_builder(b, w)
    peak_reverse = float(max(0.0, -np.min(w.i_diode)))
    vc_second_on = vc
    vc -= w.bus_charge_C / fx.bus_capacitance_F
    t_end = float(w.t[-1])
    t3 = timing.second_off_s
    if t_end >= t3:
        raise ValueError("second pulse shorter than the recovery transient")
    i_now, vc = _on_stretch(
        b, fx, sw, jp, t_end, t3 - t_end, float(w.y[-1, 3]), vc, float(w.i_diode[-1]),
        float(w.y[-1, 0]),
    )

    # second turn-off and freewheeling after the shot
    y = np.array([sw.gate_on_V, float(sw.on_voltage(i_now)), i_now, i_now,
                  float(sw.on_voltage(i_now)) - vc, 0.0])
    w = _solve_window(_Circuit(fx, sw, jp, vc, sw.gate_off_V), t3, y, dt, expect_diode_on=True)
    _window_to_builder(b, w)
    vc -= w.bus_charge_C / fx.bus_capacitance_F
    t_end = float(w.t[-1])
    t_stop = t3 + max(timing.post_s, t_end - t3 + 1e-6)
    _off_stretch(
        b, fx, sw, jp, t_end, t_stop - t_end, float(w.y[-1, 3]), vc, float(w.y[-1, 5]),
        float(w.y[-1, 0]),
    )

    arrays = b.build()
    return CircuitWaveforms(
        **arrays,
        bus_voltage_V=float(bus_voltage_V),
        temperature_K=float(temperature_K),
        current_at_first_turn_off_A=i_first_off,
        current_at_second_turn_on_A=i_second_on,
        bus_voltage_at_second_turn_on_V=vc_second_on,
        peak_reverse_current_A=peak_reverse,
        t_first_off_s=t1,
        t_second_on_s=t2,
        t_second_off_s=t3,
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
    cap = jp.capacitance
    jc = jp.junction_current

    def rhs(y, t):
        v, q = y
        ij, dq = jc(v, q)
        return [(forward_current_A - didt_A_per_s * t - ij) / cap(v), dq]

    v0 = jp.junction_voltage_forward(forward_current_A)
    q0 = forward_current_A if jp.is_charge_control else 0.0
    t = np.arange(0.0, duration_s + 0.5 * dt_s, dt_s)
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

