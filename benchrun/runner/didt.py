"""di/dt as a controlled test condition: its measurement, its model and the trim (pure logic).

Measurement (``commutation_didt``)
    The commutation rate is the rate of change of the diode current through its zero
    crossing (the trade's "rate of forward current change through zero", JEDEC's diRR/dt "when
    the current is passing through zero" in its RRSF definition, JESD282-B): the slope of a
    least-squares straight line through the samples within ±h of zero around the crossing,
    h = 50 % of the smaller of IF and the reverse peak.  A window symmetric about the crossing
    estimates the tangent there: the curvature of the current (the switch's di/dt still
    rising at turn-on, or falling as its current grows) cancels to first order.  At the zero
    crossing the device under test barely shapes the current (a PiN diode still conducts its
    stored charge; a Schottky's junction voltage is still small): the switch (gate drive,
    gate resistor) and the loop set the slope.  Only close to the reverse peak does the
    device's recovery bend it, hence h ≤ half the peak.  The window spans 2h, enough samples
    at low current (at 3 A, ±1.5 A: about 2.5 ns at 1.2 kA/µs), where a window above zero
    (50 % to 10 % of IF) lasts a few samples and lies in the switch's turn-on onset.

Model (``DidtModel``)
    During the current rise the switch's gate charges through Rg, so (three-capacitor switch
    model, B. J. Baliga, *Fundamentals of Power Semiconductor Devices*, ch. 6; the simulator's
    :meth:`benchrun.simulator.circuit.SwitchModel.turn_on_didt`)::

        di/dt = k·(Vdrive − Vth − I/(2·gm)) / Rg

    The fixture declares how di/dt is set: a set of switchable gate resistors (discrete) or a
    gate-drive voltage range (continuous).  ``k`` (= gm/Ciss) is the one parameter the
    controller learns: from the fixture's nominal values, then from each trim shot
    (k = measured di/dt · Rg / headroom).

Trim (``control_didt``)
    Pick the setting the model says gives the target; fire a trim shot; measure; if outside the
    tolerance, update k and pick again, up to ``max_trims`` shots.  Discrete resistors can miss
    a target between two of them: then the point is invalid with the reason (nearest achievable
    di/dt named), never fired at a di/dt outside its tolerance.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "DIDT_DEFINITION",
    "DidtModel",
    "DidtOutcome",
    "DidtSetting",
    "commutation_didt",
    "control_didt",
]

#: The measurement definition in one sentence, as reports print it.
DIDT_DEFINITION = (
    "di/dt is the rate of change of the diode current through its zero crossing: the "
    "least-squares slope of the samples within ±h of zero around the crossing, h = 50 % of "
    "the smaller of IF and the reverse peak (there the switch and the loop set it; the device "
    "under test shapes the current only near its reverse peak)."
)


def commutation_didt(
    t: np.ndarray, i: np.ndarray, if_A: float, *, half_width: float = 0.5
) -> float | None:
    """Falling slope magnitude (A/s) of the diode current through its first zero crossing
    after the plateau: a least-squares line through the samples within ±h of zero around the
    crossing, h = ``half_width``·min(IF, |reverse peak|); None if not found.

    Parameters
    ----------
    t, i
        Time [s] and diode current [A] (forward positive), the commutation inside.
    if_A
        The forward current before the commutation [A].
    half_width
        h as a fraction of the smaller of IF and the reverse peak; see the module docstring.
    """
    t = np.asarray(t, dtype=float)
    i = np.asarray(i, dtype=float)
    if if_A <= 0 or t.size < 3:
        return None
    below = np.flatnonzero(i < 0.0)
    above_plateau = np.flatnonzero(i >= 0.5 * if_A)
    if below.size == 0 or above_plateau.size == 0:
        return None
    start = int(above_plateau[0])
    zero = below[below > start]
    if zero.size == 0:
        return None
    stop = int(zero[0])
    half = half_width * min(if_A, float(-i[stop:].min()))
    if half <= 0:
        return None
    deep = np.flatnonzero(i[stop:] <= -half)
    last = stop + (int(deep[0]) if deep.size else 0)
    high = np.flatnonzero(i[start:stop] >= half)
    first = start + int(high[-1]) if high.size else start
    ts, ys = t[first : last + 1], i[first : last + 1]
    inside = np.abs(ys) <= half
    if np.count_nonzero(inside) < 3:
        # too few samples inside: the two bracketing crossings (linear interpolation)
        t_hi = np.interp(half, ys[::-1], ts[::-1])
        t_lo = np.interp(-half, ys[::-1], ts[::-1])
        return float(2.0 * half / (t_lo - t_hi)) if t_lo > t_hi else None
    slope = np.polyfit(ts[inside], ys[inside], 1)[0]
    return float(-slope) if slope < 0 else None


@dataclass(frozen=True)
class DidtSetting:
    """One gate-drive setting: gate resistance [Ω] and drive voltage [V]."""

    gate_resistance_ohm: float
    drive_V: float


@dataclass(frozen=True)
class DidtModel:
    """di/dt = k·(Vdrive − Vth − I/(2·gm))/Rg (see the module docstring)."""

    k: float  # gm/Ciss [A/(V·s)·Ω]
    threshold_V: float
    transconductance_S: float

    def headroom(self, drive_V: float, current_A: float) -> float:
        return drive_V - self.threshold_V - current_A / (2.0 * self.transconductance_S)

    def didt(self, setting: DidtSetting, current_A: float) -> float:
        h = self.headroom(setting.drive_V, current_A)
        return self.k * max(h, 0.0) / setting.gate_resistance_ohm

    def learn(self, setting: DidtSetting, current_A: float, measured: float) -> DidtModel:
        """The model with k set so it reproduces ``measured`` at ``setting``."""
        h = self.headroom(setting.drive_V, current_A)
        if h <= 0 or measured <= 0:
            return self
        return DidtModel(measured * setting.gate_resistance_ohm / h, self.threshold_V,
                         self.transconductance_S)

    def choose(self, target: float, current_A: float, *,
               resistors_ohm: Sequence[float] = (), drive_V: float | None = None,
               drive_range_V: tuple[float, float] | None = None) -> DidtSetting:
        """The setting the model puts nearest to ``target``: the best of the switchable
        resistors at ``drive_V``, or the drive voltage (clamped to its range) at the one
        resistor."""
        if drive_range_V is not None:
            if len(resistors_ohm) != 1:
                raise ValueError("a drive-voltage setting needs exactly one gate resistor")
            rg = float(resistors_ohm[0])
            v = (self.threshold_V + current_A / (2.0 * self.transconductance_S)
                 + target * rg / self.k)
            v = min(max(v, drive_range_V[0]), drive_range_V[1])
            return DidtSetting(rg, v)
        if drive_V is None or not resistors_ohm:
            raise ValueError("switchable resistors need the drive voltage")
        return min((DidtSetting(float(r), drive_V) for r in resistors_ohm),
                   key=lambda s: abs(math.log(max(self.didt(s, current_A), 1e-30) / target)))


@dataclass(frozen=True)
class DidtOutcome:
    """Result of a di/dt trim: the setting used, the measured di/dt, trim history, validity."""

    setting: DidtSetting
    measured_A_per_s: float | None
    valid: bool
    reason: str
    shots: tuple[tuple[DidtSetting, float | None], ...] = field(default=())


def control_didt(
    target: float,
    current_A: float,
    fire: Callable[[DidtSetting], float | None],
    model: DidtModel,
    *,
    tolerance: float,
    max_trims: int = 3,
    resistors_ohm: Sequence[float] = (),
    drive_V: float | None = None,
    drive_range_V: tuple[float, float] | None = None,
) -> DidtOutcome:
    """Set, trim and verify di/dt (module docstring).  ``fire(setting)`` takes one trim shot
    and returns its measured di/dt (None: no measurement)."""
    if target <= 0 or tolerance <= 0:
        raise ValueError("target di/dt and tolerance must be positive")
    history: list[tuple[DidtSetting, float | None]] = []
    choose = {"resistors_ohm": resistors_ohm, "drive_V": drive_V, "drive_range_V": drive_range_V}
    setting = model.choose(target, current_A, **choose)
    measured = None
    for _ in range(max(max_trims, 1)):
        measured = fire(setting)
        history.append((setting, measured))
        if measured is None:
            return DidtOutcome(setting, None, False, "di/dt not measurable on the trim shot",
                               tuple(history))
        if abs(measured - target) <= tolerance * target:
            return DidtOutcome(setting, measured, True, "", tuple(history))
        model = model.learn(setting, current_A, measured)
        nxt = model.choose(target, current_A, **choose)
        if nxt == setting:
            break  # the fixture cannot get closer: a resistor set's nearest value, or a limit
        setting = nxt
    return DidtOutcome(
        setting, measured, False,
        f"di/dt {measured / 1e6:.0f} A/us outside {100 * tolerance:g} % of the requested "
        f"{target / 1e6:.0f} A/us after {len(history)} trim shot(s) (nearest this fixture's "
        "setting gives)", tuple(history))
