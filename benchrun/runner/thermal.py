"""Junction temperature between shots: the dwell after a device swap and the minimum interval
between shots, from the energy a shot leaves in the device and the fixture's thermal time
constant (bench file ``fixture``).

The set temperature is that of the controlled plate (or the device case, by the bench's
``temperature_sensor``); the junction follows it only when the device has had time to reach
it and the shots' own heat has decayed. Model (a lumped first-order thermal network — one
Foster stage, R_th in parallel with C_th = τ/R_th — common practice for a fixture estimate):

* A device arriving from the handler starts at another temperature; after a time t its
  difference has decayed by exp(-t/τ). The dwell after a swap is five time constants
  (exp(-5) < 1 %; common practice) unless the bench file states ``swap_dwell``.
* A shot deposits its energy E in a time far shorter than τ: the rise right after it is
  ΔT₁ = E/C_th = E·R_th/τ, decaying as exp(-t/τ). Shots every Δt pile up (superposition of
  first-order responses, a geometric series) to a peak rise ΔT₁ / (1 − exp(−Δt/τ)). Keeping
  it within the sequence's temperature tolerance ΔT gives
  Δt_min = −τ·ln(1 − ΔT₁/ΔT); when ΔT₁ ≥ ΔT no interval is enough (pre-flight refuses).
* Energy per shot (upper estimate): conduction during the off time VF·IF·t_off, plus the
  energy the load inductor still holds after the second pulse, ½·L·I_pk² (freewheeling
  through the diode, nearly all of it ends in the diode when the load resistance is small),
  plus the reverse-recovery energy, at most VR·Qrr with Qrr ≤ Irrm²/(di/dt) (triangular
  recovery with tb ≤ ta; Irrm and di/dt from the sequence's ``expected``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from benchrun.config.bench import BenchConfig
from benchrun.config.sequence import SequenceConfig
from benchrun.records import TestPoint
from benchrun.runner.plan import expected_didt, inductor_current, plan_pulses

#: Forward voltage assumed for the conduction energy, V. From memory: datasheet VF of
#: 1200 V fast silicon and SiC diodes at rated current lies between about 1.5 and 3 V; the
#: upper end is taken (an upper estimate of the heat).
VF_ESTIMATE_V = 3.0
#: Dwell after a device swap, in fixture time constants (common practice: five).
SWAP_DWELL_TIME_CONSTANTS = 5.0

RULE = ("first-order thermal model of the fixture (one RC stage, common practice): dwell "
        "after a swap 5 tau unless stated; shots spaced so the piled-up rise "
        "dT1/(1-exp(-dt/tau)), dT1 = E*Rth/tau, stays within the temperature tolerance; "
        "E = VF*IF*t_off + L*Ipk^2/2 + VR*Irrm^2/(di/dt), VF = 3 V (upper estimate)")


@dataclass(frozen=True)
class ShotHeat:
    """Heat of one shot at a test point and the interval it asks for."""

    energy_J: float
    conduction_J: float
    tail_J: float
    recovery_J: float
    rise_per_shot_K: float | None
    min_interval_s: float | None
    #: why no interval is enough (None when one is)
    problem: str | None = None

    def to_dict(self) -> dict:
        return {"energy_J": self.energy_J, "conduction_J": self.conduction_J,
                "inductor_tail_J": self.tail_J, "recovery_J": self.recovery_J,
                "rise_per_shot_K": self.rise_per_shot_K,
                "min_interval_s": self.min_interval_s, "problem": self.problem}


def shot_energy(point: TestPoint, sequence: SequenceConfig, bench: BenchConfig
                ) -> tuple[float, float, float]:
    """(conduction during the off time, inductor energy after the train, recovery) in J."""
    fx = bench.fixture
    plan = plan_pulses(point, sequence, fx)
    conduction = VF_ESTIMATE_V * point.forward_current_A * plan.off_time_s
    rise = inductor_current(plan.second_pulse_s, point.bus_voltage_V, fx.load_inductance,
                            0.0, fx.switch_on_voltage)
    peak = point.forward_current_A + rise
    tail = 0.5 * fx.load_inductance * peak**2
    recovery = 0.0
    didt = expected_didt(point, sequence)
    fraction = getattr(sequence.expected, "irrm_fraction", None)
    if didt and fraction:
        irrm = fraction * point.forward_current_A
        recovery = point.bus_voltage_V * irrm**2 / didt
    return conduction, tail, recovery


def min_interval(energy_J: float, time_constant_s: float, resistance_K_per_W: float,
                 allowed_rise_K: float) -> tuple[float, float | None]:
    """(rise right after one shot ΔT₁, minimum interval) of the first-order model; the
    interval is None when ΔT₁ alone reaches ``allowed_rise_K``."""
    rise = energy_J * resistance_K_per_W / time_constant_s
    if rise >= allowed_rise_K:
        return rise, None
    return rise, -time_constant_s * math.log(1.0 - rise / allowed_rise_K)


def piled_up_rise(rise_per_shot_K: float, interval_s: float, time_constant_s: float,
                  shots: int) -> float:
    """Rise right after the ``shots``-th shot of a train (closed form of the superposition):
    ΔT₁·(1 − q^n)/(1 − q), q = exp(−Δt/τ)."""
    q = math.exp(-interval_s / time_constant_s)
    return rise_per_shot_K * (1.0 - q**shots) / (1.0 - q)


def shot_heat(point: TestPoint, sequence: SequenceConfig, bench: BenchConfig) -> ShotHeat:
    """Energy of a shot at ``point`` and the minimum interval the fixture asks for (None when
    the bench file states no thermal time constant or resistance)."""
    conduction, tail, recovery = shot_energy(point, sequence, bench)
    energy = conduction + tail + recovery
    fx = bench.fixture
    tau, rth = fx.thermal_time_constant, fx.thermal_resistance
    if tau is None or rth is None:
        return ShotHeat(energy, conduction, tail, recovery, None, None)
    allowed = sequence.tolerances.temperature
    rise, interval = min_interval(energy, tau, rth, allowed)
    problem = None
    if interval is None:
        where = point.label or f"point {point.index}"
        problem = (f"{where}: one shot heats the device by about {rise:.3g} K "
                   f"({energy:.3g} J, R_th {rth:g} K/W, tau {tau:g} s), more than the "
                   f"temperature tolerance {allowed:g} K")
    return ShotHeat(energy, conduction, tail, recovery, rise, interval, problem)


def swap_dwell(bench: BenchConfig) -> float:
    """Wait after the handler put a new device in the fixture, s."""
    fx = bench.fixture
    if fx.swap_dwell is not None:
        return fx.swap_dwell
    if fx.thermal_time_constant is None:
        return 0.0
    return SWAP_DWELL_TIME_CONSTANTS * fx.thermal_time_constant


def thermal_record(points: list[TestPoint], sequence: SequenceConfig, bench: BenchConfig
                   ) -> dict:
    """What the run manifest records (``thermal``): sensor, constants, dwell, per point the
    shot energy and minimum interval, and the rule."""
    fx = bench.fixture
    return {
        "temperature_sensor": fx.temperature_sensor,
        "time_constant_s": fx.thermal_time_constant,
        "thermal_resistance_K_per_W": fx.thermal_resistance,
        "swap_dwell_s": swap_dwell(bench),
        "points": {str(p.index): {"label": p.label, **shot_heat(p, sequence, bench).to_dict()}
                   for p in points},
        "rule": RULE,
    }
