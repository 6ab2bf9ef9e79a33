"""Offset removal: where each channel's zero is taken from (the stated rule).

In an inductive double-pulse test the freewheeling diode is shunted by the load inductor, so
before the first pulse (no inductor current) it carries no current and holds no voltage, and
while the switch is on during the first pulse it carries no current either (it blocks). After
the recovery it blocks again and its current settles to zero. The rule:

- **Before the first pulse.** When the record begins before the first pulse (its leading
  voltage lies within :data:`VOLTAGE_ZERO_FRACTION` of the following step to the blocked bus
  voltage away from zero), both channels are zeroed by their medians over that leading
  window (up to :data:`BASELINE_MAX` samples, less a guard of an eighth, at least
  :data:`GUARD_MIN` samples, before the step).
- **Else, during the first pulse.** The current is zeroed by its median over the last
  :data:`BASELINE_MAX` samples before the first forward-current plateau (same guard): the
  diode blocks, so this also removes its leakage current at the bus voltage (small against
  Irrm for a diode fit to test). The voltage is not corrected (the diode blocks the bus: no
  zero-voltage window); ``corrections["voltage_offset_rule"]`` says so.
- **Else** (the record starts on the freewheel plateau; fewer than :data:`BASELINE_MIN`
  samples before it), the current is zeroed by its median over the quiet window after the
  recovery that VR is taken from (the diode blocks; its current has settled).

The median ignores the displacement-current spike at the first turn-on (common practice).
The residual after correction is the standard uncertainty of that median,
``1.2533·σ/√n`` (σ the channel noise, n the samples; the median's efficiency for normal
data), and enters the capture uncertainty ``u`` (:mod:`benchrun.analysis.capture_uncertainty`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from benchrun.analysis import events as ev

#: Most samples of a baseline window (bounded so a long record costs no more).
BASELINE_MAX = 4096
#: Fewest samples of a pre-event baseline; with fewer the quiet window after the event is used.
BASELINE_MIN = 64
#: Samples always left between the baseline window and the first plateau.
GUARD_MIN = 16
#: The leading voltage is taken as the diode's zero only within this fraction of VR of zero.
VOLTAGE_ZERO_FRACTION = 0.05
#: ``offset_large``: a correction above this fraction of IF (current) or VR (voltage)
#: (common practice: a 2 % offset moves Qrr of a capacitive part by tens of percent).
OFFSET_LARGE_FRACTION = 0.02

RULE_PRE_PULSE = "median before the first pulse (no voltage, no current)"
RULE_PRE_EVENT = ("median during the first pulse (the diode blocks: its leakage at the bus "
                  "voltage is removed with the offset)")
RULE_QUIET = "median of the quiet window after the recovery (VR window: diode current settled)"
RULE_V_PRE = "median before the first pulse (diode shunted by the unenergised load inductor)"
RULE_V_NONE = ("not corrected: the record starts during the first pulse, where the diode "
               "blocks the bus; no zero-voltage window")


@dataclass(frozen=True)
class Baseline:
    """A zero estimate: ``value`` (SI), its standard uncertainty and the samples behind it."""

    value: float
    u: float
    count: int
    sigma: float = 0.0


def _median_baseline(x: np.ndarray) -> Baseline:
    x = np.asarray(x, dtype=np.float64)
    sigma = ev.robust_sigma(x)
    return Baseline(ev.level_of(x, sigma), sigma / math.sqrt(max(x.size, 1)), int(x.size),
                    sigma)


def pre_event_window(first_plateau_start: int) -> tuple[int, int] | None:
    """Sample range ``[a, b)`` of the pre-event baseline, or None when too short."""
    guard = max(GUARD_MIN, first_plateau_start // 8)
    b = first_plateau_start - guard
    a = max(0, b - BASELINE_MAX)
    return (a, b) if b - a >= BASELINE_MIN else None


def _pre_pulse_end(v: np.ndarray, first_plateau_start: int) -> int | None:
    """End (exclusive, guard left) of the leading zero-voltage window, or None.

    The record begins before the first pulse when its leading voltage lies within
    :data:`VOLTAGE_ZERO_FRACTION` of the voltage step that follows (to the bus voltage the
    diode blocks during the first pulse) away from zero.
    """
    guard = max(GUARD_MIN, first_plateau_start // 8)
    b = min(first_plateau_start - guard, BASELINE_MAX)
    if b < BASELINE_MIN:
        return None
    lead = np.asarray(v[:b], dtype=np.float64)
    head = float(np.median(lead[:BASELINE_MIN]))
    noise = max(ev.robust_sigma(lead[:BASELINE_MIN]), 1e-12)
    low = float(lead.min())
    if head - low > 10.0 * noise:
        k = int(np.argmax(lead < 0.5 * (head + low)))
    else:
        # no step inside the capped window: compare with the level just before the plateau
        c = first_plateau_start - guard
        low = float(np.median(np.asarray(v[max(0, c - BASELINE_MIN) : c], dtype=np.float64)))
        if not head - low > 10.0 * noise:
            return None
        k = b + max(GUARD_MIN, b // 8)
    if abs(head) > VOLTAGE_ZERO_FRACTION * (head - low):
        return None
    end = k - max(GUARD_MIN, k // 8)
    return end if end >= BASELINE_MIN else None


def zeros(i: np.ndarray, v: np.ndarray, first_plateau_start: int):
    """``(current zero, its rule, voltage zero, its rule)`` by the module's rule; a zero is a
    :class:`Baseline` or None (current: then the quiet window after the event is used)."""
    end = _pre_pulse_end(v, first_plateau_start)
    if end is not None:
        return (_median_baseline(i[:end]), RULE_PRE_PULSE, _median_baseline(v[:end]),
                RULE_V_PRE)
    window = pre_event_window(first_plateau_start)
    if window is None:
        return None, None, None, RULE_V_NONE
    return _median_baseline(i[window[0] : window[1]]), RULE_PRE_EVENT, None, RULE_V_NONE


def quiet_zero(i: np.ndarray) -> Baseline | None:
    """Current zero from the quiet window after the recovery."""
    if i.size < 8:
        return None
    return _median_baseline(i)
