"""Edges of the switch's turn-on in a record: sample times, level crossings, the current's
commutation rate and the circuit-driven bands of the voltage fall. Helpers of
:mod:`benchrun.analysis.switching` (definitions in its docstring); pure, no I/O."""

from __future__ import annotations

import math

import numpy as np

from benchrun.analysis.timebase import TimeBase

#: First forward span searched for the window end; grown by 4× until found.
INITIAL_SPAN = 65_536
#: Bands the voltage fall is divided into to find circuit-driven parts (5 % each).
FALL_BANDS = 20
#: Top bands left out of the reference (median) fall rate: they hold the current-rise delay.
REFERENCE_SKIP_BANDS = 2


class SampleTimes(TimeBase):
    """A record's sample times (:class:`~benchrun.analysis.timebase.TimeBase`) and its
    length ``n``, for finding the sample before an instant."""

    def __init__(self, t: np.ndarray | None, dt: float | None, t_start: float, n: int) -> None:
        super().__init__(t, dt, t_start)
        self.n = n

    def index_before(self, time: float) -> int:
        """Largest index k with t[k] <= time (clamped to the record)."""
        if self.t is not None:
            k = int(np.searchsorted(self.t, time, side="right")) - 1
        else:
            k = math.floor((time - self.t_start) / self.dt)
        return min(max(k, 0), self.n - 1)


def interp_at(time: float, tw: np.ndarray, xw: np.ndarray) -> float:
    return float(np.interp(time, tw, xw))


def crossing(t0: float, t1: float, x0: float, x1: float, level: float) -> float:
    t0, t1, x0, x1 = float(t0), float(t1), float(x0), float(x1)
    if x1 == x0:
        return t1
    return t0 + (level - x0) * (t1 - t0) / (x1 - x0)


def start_crossing(
    i: np.ndarray, time: SampleTimes, k0: int, t0: float, level: float
) -> tuple[float, int] | None:
    """Last rising crossing of ``level`` by the switch current at or before t0."""
    span = 4096
    hi = k0 + 1
    while True:
        lo = max(hi - span, 0)
        seg = np.asarray(i[lo : hi + 1], dtype=np.float64)
        below = np.flatnonzero(seg[:-1] < level) if seg.size > 1 else np.array([], dtype=int)
        if below.size:
            j = lo + int(below[-1])
            if j + 1 > k0 + 1:
                return None
            tw = time.window(j, j + 2)
            x0, x1 = float(i[j]), float(i[j + 1])
            if x1 < level:  # the sample after t0 is still below: no rise before t0
                return None
            return float(crossing(tw[0], tw[1], x0, x1, level)), j
        if lo == 0:
            return None
        span *= 4


def first_falling(v: np.ndarray, time: SampleTimes, k0: int, level: float
                  ) -> tuple[float, int] | None:
    """First instant after sample k0 at which ``v`` falls through ``level``."""
    span = INITIAL_SPAN
    a = k0
    while a < time.n - 1:
        b = min(a + span, time.n)
        seg = np.asarray(v[a:b], dtype=np.float64)
        hits = np.flatnonzero(seg <= level)
        if hits.size:
            k = a + int(hits[0])
            if k == k0:
                return None  # already below at t0: not a turn-on of a blocking switch
            tw = time.window(k - 1, k + 1)
            return float(crossing(tw[0], tw[1], float(v[k - 1]), float(v[k]), level)), k
        a = b - 1
        span *= 4
    return None


def commutation_rate(
    didt: float | None, tw: np.ndarray, iw: np.ndarray, t0: float, if_A: float
) -> float | None:
    """Switch-current rise rate at the commutation (A/s).

    ``didt`` (the recovery's di/dt, measured across t0) when known; else the mean rate of
    the switch current from 50 % of IF to t0.
    """
    if didt is not None and math.isfinite(didt) and didt > 0:
        return float(didt)
    k0 = int(np.searchsorted(tw, t0, side="right")) - 1
    below = np.flatnonzero(iw[: k0 + 1] < 0.5 * if_A)
    if not below.size or below[-1] + 1 >= tw.size:
        return None
    j = int(below[-1])
    t_half = crossing(tw[j], tw[j + 1], iw[j], iw[j + 1], 0.5 * if_A)
    if not t0 > t_half:
        return None
    return 0.5 * if_A / (t0 - t_half)


def forced_bands(depth: np.ndarray, elapsed: np.ndarray, factor: float) -> tuple[float, bool]:
    """Median fall rate (duration-weighted, top bands left out) and whether any band is forced.

    The fall ``0 … depth[-1]`` is cut into :data:`FALL_BANDS` equal voltage bands; the time
    the measured fall takes across each is read from the first-passage curve.
    """
    total = float(depth[-1])
    edges = np.linspace(0.0, total, FALL_BANDS + 1)
    times = np.interp(edges, depth, elapsed)
    dur = np.diff(times)
    width = total / FALL_BANDS
    rate = np.full(FALL_BANDS, np.inf)
    np.divide(width, dur, out=rate, where=dur > 0)
    ref_rate, ref_dur = rate[REFERENCE_SKIP_BANDS:], dur[REFERENCE_SKIP_BANDS:]
    order = np.argsort(ref_rate)
    cumulative = np.cumsum(ref_dur[order])
    if not cumulative[-1] > 0:
        return math.inf, False
    median = float(ref_rate[order][int(np.searchsorted(cumulative, 0.5 * cumulative[-1]))])
    return median, bool(np.any(rate > factor * median))
