"""Diode models for the simulated bench (pure, SI units, kelvin).

Two models:

* :class:`LauritzenMaDiode` — the charge-control model of P. O. Lauritzen and C. L. Ma,
  "A simple diode model with reverse recovery", IEEE Trans. Power Electronics 6(2),
  pp. 188-191, 1991::

      qE = Is·τ·(exp(v/(n·VT)) − 1)      junction charge set by the junction voltage v
      i  = (qE − qM)/TM                  diffusion current (TM: transit time)
      dqM/dt = i − qM/τ                  stored charge (τ: high-level carrier lifetime)

  In steady forward conduction qM = τ·i and qE = (τ + TM)·i.  After the junction blocks
  (qE ≈ −Is·τ ≈ 0) the current is i = −qM/TM and the stored charge decays with
  τ·TM/(τ + TM) (the recovery tail).  A depletion capacitance
  C(v) = Cj0/(1 − v/Vj)^M (v anode-to-cathode, i.e. C = Cj0/(1 + VR/Vj)^M for a reverse
  voltage VR) sits across the junction, linearised above FC·Vj as in the Berkeley SPICE
  diode model.

  Optional extension (our variant, off by default): **punch-through sweep-out** of the stored
  charge, a two-region charge picture (base plasma + depletion layer).  The depletion layer
  grows into the low-doped base as w ∝ √(Vj − v) (abrupt-junction law, S. M. Sze, *Physics of
  Semiconductor Devices*, ch. 2) and reaches the end of the base at the punch-through voltage
  Vpt; the depleted fraction of the base is

      f(v) = (√(Vj − v) − √Vj)/(√(Vj + Vpt) − √Vj)   for v < 0   (0 ≤ f ≤ 1)

  and the plasma left in the undepleted part is swept out as the layer advances
  (uniform plasma: dqM = qM·d ln(1 − f)).  The sweep current

      i_x = −qM·(df/dt)/(1 − f) = Cx(v, qM)·dv/dt,   Cx = qM·|f′(v)|/(1 − f)

  flows at the terminals and removes stored charge (dqM/dt = i − qM/τ + i_x).  While charge
  remains, Cx is large and holds the voltage rise back; when the layer reaches the end of the
  base the charge is exhausted at once, Cx collapses to 0 and the current snaps off against the
  small depletion capacitance — the mechanism of snappy recovery described for punch-through
  PiN diodes (J. Lutz et al., *Semiconductor Power Devices*, Springer 2011, ch. 5, from
  memory).  It is snappier at low current and cold (little charge when the voltage builds up),
  at high di/dt (the overshoot VR + Ls·di/dt reaches Vpt) and at high VR.  ``punch_through_V``
  = inf (default) switches it off and the model is exactly Lauritzen-Ma.

  **Plasma extent set by the stored charge** (``plasma_fill_charge_C`` = Q_h, 0 = off; our
  variant, on top of the sweep-out).  The plasma of a PiN diode fills the whole low-doped base
  only at high injection; at low current density the cathode side injects little and the
  plasma thins out towards it (B. J. Baliga, *Fundamentals of Power Semiconductor Devices*,
  Springer 2008, ch. 5, on the carrier distribution and the reverse recovery of PiN
  rectifiers; Lutz et al., ch. 5; both from memory).  We describe the depth of the plasma
  x_p ≤ W by the saturating law (x_p/W)² = Q0/(Q0 + Q_h), Q0 the charge stored when the
  recovery starts (frozen over the recovery: a quasi-static approximation of ours).  By the
  square-root depletion law the layer reaches the end of the plasma at

      Vex = Vpt·Q0/(Q0 + Q_h)

  and the sweep-out above runs with Vex in place of Vpt.  The recovery then ends abruptly
  when the layer runs out of plasma below the reverse voltage: at low forward current (small
  Q0), cold (Q0 = τ(T)·IF falls with the lifetime), at high VR and at high di/dt (a steeper
  commutation leaves less charge when the voltage builds up).  At rated current and hot the
  plasma fills the base, Vex lies far above VR and the recovery ends in the recombination
  tail: soft.  Q_h = 0 keeps Vex = Vpt (the sweep-out alone).

  The transit time may depend on temperature, TM(T) = TM·(T/T0)^a (``tm_temp_exponent``; TM
  = W²/(2·Da) and the ambipolar diffusivity Da falls as T rises, a ≈ 1-1.5, from memory).

* :class:`SchottkyDiode` — a majority-carrier (SiC Schottky) diode: thermionic-emission forward
  characteristic i = Is(T)·(exp(v/(n·VT)) − 1), no stored charge, the same depletion
  capacitance (temperature independent), hence a purely capacitive "recovery" whose charge is
  Qc = ∫ C(V) dV.

Temperature laws (compact-model practice, exponents from memory):

* lifetime τ(T) = τ(T0)·(T/T0)^k with k = ``tau_temp_exponent`` (≈ 1.5-3);
* saturation current, Berkeley SPICE form Is(T) = Is·(T/T0)^(XTI/n)·exp((T/T0 − 1)·Eg/(n·VT));
* Schottky: Is(T) = Is·(T/T0)²·exp(−(φB/k)·(1/T − 1/T0)) (Richardson law, barrier φB);
* series resistance R(T) = R·(T/T0)^r (``rs_temp_exponent``, 0 = constant).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

BOLTZMANN_J_PER_K = 1.380649e-23
ELEMENTARY_CHARGE_C = 1.602176634e-19

# exp() is continued linearly above this argument (common practice in circuit simulators,
# avoids overflow while a Newton iteration explores large forward voltages)
_EXP_LIMIT = 80.0
_EXP_AT_LIMIT = math.exp(_EXP_LIMIT)
#: smallest undepleted base fraction 1 − f used in the sweep capacitance (numerical floor)
SWEEP_FLOOR = 0.01
#: smallest voltage at which the layer reaches the end of the plasma (numerical floor: an event
#: that starts with almost no stored charge has almost nothing to sweep)
MIN_PLASMA_PUNCH_THROUGH_V = 1.0


def thermal_voltage(temperature_K: float) -> float:
    """Return kT/q in volts."""
    return BOLTZMANN_J_PER_K * temperature_K / ELEMENTARY_CHARGE_C


def limited_exp(x: float) -> float:
    """exp(x), continued linearly (value and slope matched) above ``_EXP_LIMIT``."""
    if x <= _EXP_LIMIT:
        return math.exp(x)
    return _EXP_AT_LIMIT * (1.0 + x - _EXP_LIMIT)


def limited_exp_array(x: np.ndarray) -> np.ndarray:
    """Vectorised :func:`limited_exp`."""
    x = np.asarray(x, dtype=float)
    return np.where(
        x <= _EXP_LIMIT,
        np.exp(np.minimum(x, _EXP_LIMIT)),
        _EXP_AT_LIMIT * (1.0 + x - _EXP_LIMIT),
    )


@dataclass(frozen=True)
class LauritzenMaDiode:
    """Lauritzen-Ma charge-control diode (IEEE Trans. Power Electronics 6(2), 1991).

    Parameters are given at ``t_ref_K``.  ``is_A`` is the saturation current of the
    static characteristic i = Is·(exp(v/(n·VT)) − 1)·τ/(τ + TM) (steady state of the model).
    """

    tau_s: float
    tm_s: float
    is_A: float
    n: float
    cj0_F: float
    vj_V: float
    m: float
    tau_temp_exponent: float = 2.0
    t_ref_K: float = 298.15
    series_resistance_ohm: float = 0.0
    fc: float = 0.5
    eg_eV: float = 1.11
    xti: float = 3.0
    rs_temp_exponent: float = 0.0
    punch_through_V: float = math.inf
    tm_temp_exponent: float = 0.0
    plasma_fill_charge_C: float = 0.0

    kind = "lauritzen-ma"

    def at_temperature(self, temperature_K: float) -> JunctionParams:
        """Temperature-adjusted parameters used by the circuit solver."""
        ratio = temperature_K / self.t_ref_K
        vt = thermal_voltage(temperature_K)
        nvt = self.n * vt
        is_t = (
            self.is_A
            * ratio ** (self.xti / self.n)
            * math.exp((ratio - 1.0) * self.eg_eV / nvt)
        )
        tau = self.tau_s * ratio**self.tau_temp_exponent
        return JunctionParams(
            kind=self.kind,
            tau_s=tau,
            tm_s=self.tm_s * ratio**self.tm_temp_exponent,
            is_A=is_t,
            nvt_V=nvt,
            rs_ohm=self.series_resistance_ohm * ratio**self.rs_temp_exponent,
            cj0_F=self.cj0_F,
            vj_V=self.vj_V,
            m=self.m,
            fc=self.fc,
            vpt_V=self.punch_through_V,
            qfill_C=self.plasma_fill_charge_C,
        )


@dataclass(frozen=True)
class SchottkyDiode:
    """Majority-carrier (SiC Schottky) diode: thermionic forward law + depletion capacitance."""

    cj0_F: float
    vj_V: float
    m: float
    is_A: float = 1e-14
    n: float = 1.05
    barrier_eV: float = 1.2
    series_resistance_ohm: float = 0.05
    t_ref_K: float = 298.15
    fc: float = 0.5
    rs_temp_exponent: float = 1.5

    kind = "schottky"

    def at_temperature(self, temperature_K: float) -> JunctionParams:
        """Temperature-adjusted parameters (capacitance is temperature independent)."""
        ratio = temperature_K / self.t_ref_K
        vt = thermal_voltage(temperature_K)
        k_ev = BOLTZMANN_J_PER_K / ELEMENTARY_CHARGE_C
        is_t = (
            self.is_A
            * ratio**2
            * math.exp(-(self.barrier_eV / k_ev) * (1.0 / temperature_K - 1.0 / self.t_ref_K))
        )
        return JunctionParams(
            kind=self.kind,
            tau_s=0.0,
            tm_s=0.0,
            is_A=is_t,
            nvt_V=self.n * vt,
            rs_ohm=self.series_resistance_ohm * ratio**self.rs_temp_exponent,
            cj0_F=self.cj0_F,
            vj_V=self.vj_V,
            m=self.m,
            fc=self.fc,
        )


DiodeModel = LauritzenMaDiode | SchottkyDiode


@dataclass(frozen=True)
class JunctionParams:
    """Diode parameters at one temperature, in the form the solver uses."""

    kind: str
    tau_s: float
    tm_s: float
    is_A: float
    nvt_V: float
    rs_ohm: float
    cj0_F: float
    vj_V: float
    m: float
    fc: float
    vpt_V: float = math.inf  # punch-through voltage of the sweep-out extension (inf = off)
    qfill_C: float = 0.0  # charge Q_h of the plasma-extent law (0 = the plasma fills the base)

    def at_stored_charge(self, q_stored_C: float) -> JunctionParams:
        """Parameters for a recovery that starts with stored charge ``q_stored_C``.

        With the plasma-extent law (``qfill_C`` > 0) the depletion layer reaches the end of the
        plasma at Vex = Vpt·Q0/(Q0 + Q_h) (see the module docstring); this returns a copy whose
        ``vpt_V`` is Vex (unchanged otherwise, and for Q0 ≤ 0, where nothing can be swept).
        """
        if not self.has_sweep_out or self.qfill_C <= 0.0 or q_stored_C <= 0.0:
            return self
        vex = self.vpt_V * q_stored_C / (q_stored_C + self.qfill_C)
        return dataclasses.replace(self, vpt_V=max(vex, MIN_PLASMA_PUNCH_THROUGH_V))

    @property
    def is_charge_control(self) -> bool:
        return self.kind == "lauritzen-ma"

    @property
    def tail_time_constant_s(self) -> float:
        """τ·TM/(τ + TM): decay of the stored charge once the junction blocks (0 for Schottky)."""
        if not self.is_charge_control:
            return 0.0
        return self.tau_s * self.tm_s / (self.tau_s + self.tm_s)

    @property
    def has_sweep_out(self) -> bool:
        """True when the punch-through sweep-out of the stored charge is modelled."""
        return self.is_charge_control and math.isfinite(self.vpt_V)

    def depleted_fraction(self, v: float) -> float:
        """f(v): fraction of the base the depletion layer covers at junction voltage ``v``."""
        if not self.has_sweep_out or v >= 0.0:
            return 0.0
        root_vj = math.sqrt(self.vj_V)
        span = math.sqrt(self.vj_V + self.vpt_V) - root_vj
        return min((math.sqrt(self.vj_V - v) - root_vj) / span, 1.0)

    def sweep_capacitance(self, v: float, q_stored_C: float) -> float:
        """Cx = qM·|f′(v)|/(1 − f): the sweep current is Cx·dv/dt (0 without sweep-out).

        Beyond punch-through (f = 1) the layer no longer moves and Cx = 0; 1 − f is floored at
        ``SWEEP_FLOOR`` so a residue of charge left there by the integrator stays bounded.
        """
        if not self.has_sweep_out or v >= 0.0 or q_stored_C <= 0.0:
            return 0.0
        root = math.sqrt(self.vj_V - v)
        span = math.sqrt(self.vj_V + self.vpt_V) - math.sqrt(self.vj_V)
        f = (root - math.sqrt(self.vj_V)) / span
        if f >= 1.0:
            return 0.0
        return q_stored_C / (2.0 * root * span * max(1.0 - f, SWEEP_FLOOR))

    def sweep_capacitance_array(self, v: np.ndarray, q_stored_C: np.ndarray) -> np.ndarray:
        """Vectorised :meth:`sweep_capacitance`."""
        v = np.asarray(v, dtype=float)
        q = np.asarray(q_stored_C, dtype=float)
        if not self.has_sweep_out:
            return np.zeros(np.broadcast(v, q).shape)
        root = np.sqrt(self.vj_V - np.minimum(v, 0.0))
        span = math.sqrt(self.vj_V + self.vpt_V) - math.sqrt(self.vj_V)
        f = (root - math.sqrt(self.vj_V)) / span
        cx = np.maximum(q, 0.0) / (2.0 * root * span * np.maximum(1.0 - f, SWEEP_FLOOR))
        return np.where((v < 0.0) & (f < 1.0), cx, 0.0)

    # --- junction capacitance -------------------------------------------------------------
    def capacitance(self, v: float) -> float:
        """Depletion capacitance at anode-to-cathode junction voltage ``v`` (scalar)."""
        v_lin = self.fc * self.vj_V
        if v < v_lin:
            return self.cj0_F / (1.0 - v / self.vj_V) ** self.m
        f1 = (1.0 - self.fc) ** (1.0 + self.m)
        return self.cj0_F / f1 * (1.0 - self.fc * (1.0 + self.m) + self.m * v / self.vj_V)

    def capacitance_array(self, v: np.ndarray) -> np.ndarray:
        """Vectorised :meth:`capacitance`."""
        v = np.asarray(v, dtype=float)
        v_lin = self.fc * self.vj_V
        below = self.cj0_F / (1.0 - np.minimum(v, v_lin) / self.vj_V) ** self.m
        f1 = (1.0 - self.fc) ** (1.0 + self.m)
        above = self.cj0_F / f1 * (1.0 - self.fc * (1.0 + self.m) + self.m * v / self.vj_V)
        return np.where(v < v_lin, below, above)

    def depletion_charge(self, v: float) -> float:
        """∫₀^v C(u) du for v ≤ FC·Vj (closed form of the depletion charge)."""
        if v > self.fc * self.vj_V:
            raise ValueError("depletion_charge is defined here for v <= FC*Vj only")
        return (
            self.cj0_F
            * self.vj_V
            / (1.0 - self.m)
            * (1.0 - (1.0 - v / self.vj_V) ** (1.0 - self.m))
        )

    # --- static (quasi-steady) behaviour ----------------------------------------------------
    def junction_current(self, v: float, q: float) -> tuple[float, float]:
        """Junction current and d(q)/dt at junction voltage ``v``.

        ``q`` is the stored charge divided by τ (amperes), qM = τ·q; for a Schottky diode ``q``
        is unused and its derivative is 0.
        """
        e = limited_exp(v / self.nvt_V) - 1.0
        if self.kind == "lauritzen-ma":
            i = (self.is_A * self.tau_s * e - self.tau_s * q) / self.tm_s
            return i, (i - q) / self.tau_s
        return self.is_A * e, 0.0

    def junction_voltage_forward(self, current_A: float, q: float | None = None) -> float:
        """Junction voltage carrying ``current_A`` (current-forced form).

        For the charge-control model qE = qM + TM·i with qM = τ·q (steady state q = i when
        ``q`` is None); v = n·VT·ln(1 + qE/(Is·τ)).  Valid while qE > −Is·τ.
        """
        if self.kind == "lauritzen-ma":
            qm = self.tau_s * (current_A if q is None else q)
            qe = qm + self.tm_s * current_A
            return self.nvt_V * math.log1p(qe / (self.is_A * self.tau_s))
        return self.nvt_V * math.log1p(current_A / self.is_A)

    def forward_voltage(self, current_A: float) -> float:
        """Steady terminal forward voltage at ``current_A`` (junction + series resistance)."""
        return self.junction_voltage_forward(current_A) + self.rs_ohm * current_A
