"""Input checks and the time base of a record, for :mod:`benchrun.analysis.recovery`.

A record's times are an array (uniform, or a variable-step simulator's output to be resampled)
or ``t_start + k·dt``; :func:`validate_record` checks the arrays and says which.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from benchrun.errors import InputDataError

#: Fewest samples accepted for a record.
MIN_SAMPLES = 16
#: A time array whose largest step exceeds its smallest by this factor is non-uniform (a
#: variable-step simulator's output) and is resampled; below it, timestamp rounding.
UNIFORM_TOLERANCE = 1.1
#: Limits on the points of the uniform grid a non-uniform record is resampled onto.
MIN_RESAMPLED = 1 << 20
MAX_RESAMPLED = 1 << 24
#: A finer grid for the event (:func:`event_step`) is worth a second pass from this factor.
REFINE_FACTOR = 1.5
#: Grid steps :func:`event_step` aims for across the shortest recovery interval: twice the
#: 10 samples :mod:`benchrun.analysis.resolution` asks for, as the first grid's estimate of
#: the interval may be long by a few of its steps.
GRID_STEPS_PER_INTERVAL = 20


class TimeBase:
    """Times of the record, given as an array or as ``t_start + k·dt``."""

    def __init__(self, t: np.ndarray | None, dt: float | None, t_start: float,
                 uniform: bool = True) -> None:
        self.t = t
        self.dt = dt
        self.t_start = t_start
        self.uniform = uniform

    def window(self, a: int, b: int) -> np.ndarray:
        if self.t is not None:
            return np.asarray(self.t[a:b], dtype=np.float64)
        return self.t_start + self.dt * np.arange(a, b, dtype=np.float64)


def _check_finite(name: str, x: np.ndarray) -> None:
    if np.issubdtype(x.dtype, np.integer):
        return
    if math.isfinite(float(np.sum(x))):
        return
    bad = np.flatnonzero(~np.isfinite(x))
    if bad.size:
        raise InputDataError(f"{name} has a non-finite value (NaN or inf) at sample {bad[0]}")
    raise InputDataError(f"{name} values are too large to be physical")


def _check_increasing(t: np.ndarray) -> tuple[float, float]:
    """Raise unless ``t`` strictly increases; return the smallest and largest step."""
    chunk = 1 << 20
    lo, hi = math.inf, 0.0
    for a in range(0, t.size - 1, chunk):
        seg = t[a : a + chunk + 1]
        steps = seg[1:] - seg[:-1]
        ok = steps > 0
        if not ok.all():
            k = a + int(np.argmin(ok)) + 1
            raise InputDataError(f"time is not strictly increasing at sample {k}")
        lo, hi = min(lo, float(steps.min())), max(hi, float(steps.max()))
    return lo, hi


def uniform_grid(t: np.ndarray) -> tuple[float, int]:
    """Step and length of the uniform grid a non-uniform record is resampled onto.

    The step is the 10th percentile of the record's steps (a variable-step simulator takes
    its small steps where the waveform changes fast, so this keeps the detail of the event),
    but not so fine that the grid holds more than ``4·n`` points (at least MIN_RESAMPLED,
    at most MAX_RESAMPLED): breakpoints make a simulator take a few tiny steps too.
    """
    span = float(t[-1] - t[0])
    steps = np.diff(t)
    step = float(np.quantile(steps, 0.1))
    step = max(step, span / (grid_budget(t.size) - 1))
    return step, math.floor(span / step) + 1


def grid_budget(n: int) -> int:
    """Most points of the uniform grid a record of ``n`` points is resampled onto."""
    return min(max(4 * n, MIN_RESAMPLED), MAX_RESAMPLED)


def event_step(t: np.ndarray, start: float, end: float, shortest: float,
               step: float) -> float | None:
    """A finer grid step for a non-uniform record, or ``None`` when ``step`` will do.

    A simulator crowds its points where the waveform changes fast, but when those points
    are a small share of the record the grid of :func:`uniform_grid` is coarser than they
    are (a sub-nanosecond snap then spans a few grid steps while the simulator gave it
    many points). The step returned is the finer of the given points' median spacing over
    ``start … end`` (the recovery after the peak) and ``shortest / GRID_STEPS_PER_INTERVAL``
    (``shortest``: the shortest recovery interval found on the first grid), within the same
    point budget, when it is at least ``REFINE_FACTOR`` times finer than ``step``.
    """
    a = max(0, int(np.searchsorted(t, start)) - 1)
    b = min(t.size, int(np.searchsorted(t, end, side="right")) + 1)
    fine = shortest / GRID_STEPS_PER_INTERVAL
    if b - a >= 3:
        fine = min(fine, float(np.median(np.diff(t[a:b]))))
    fine = max(fine, float(t[-1] - t[0]) / (grid_budget(t.size) - 1))
    return fine if fine * REFINE_FACTOR < step else None


def check_signals(voltage: tuple[str, Any], current: tuple[str, Any]) -> None:
    """Raise :class:`InputDataError` unless the named voltage and current are 1-D, numeric
    and of one length (anything with ``ndim``, ``dtype`` and ``size``)."""
    for name, x in (voltage, current):
        if x.ndim != 1:
            raise InputDataError(f"{name} must be a 1-D array, got shape {x.shape}")
        if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
            raise InputDataError(f"{name} must be numeric, got dtype {x.dtype}")
    if voltage[1].size != current[1].size:
        raise InputDataError(f"{voltage[0]} has {voltage[1].size} samples but current has "
                             f"{current[1].size}")


def validate_record(t, v, i, dt, t_start) -> tuple[np.ndarray, np.ndarray, TimeBase]:
    """Checked voltage and current arrays and their :class:`TimeBase`.

    Raises :class:`InputDataError` for arrays of the wrong shape or type, too short,
    non-finite, or a time that does not strictly increase. A scalar ``t`` is the sample
    interval; a time array whose steps differ by more than ``UNIFORM_TOLERANCE`` gives a
    non-uniform time base (``uniform=False``).
    """
    v = np.asarray(v)
    i = np.asarray(i)
    check_signals(("voltage", v), ("current", i))
    if i.size < MIN_SAMPLES:
        raise InputDataError(f"record too short: {i.size} samples, need at least {MIN_SAMPLES}")
    _check_finite("voltage", v)
    _check_finite("current", i)
    if t is not None and np.ndim(t) == 0:  # a scalar t is the sample interval
        if dt is not None:
            raise InputDataError("give the sample interval either as t or as dt, not both")
        t, dt = None, float(t)
    if t is not None:
        t = np.asarray(t, dtype=np.float64)
        if t.ndim != 1 or t.size != i.size:
            raise InputDataError(f"time has shape {t.shape}, expected ({i.size},)")
        _check_finite("time", t)
        lo, hi = _check_increasing(t)
        if hi > UNIFORM_TOLERANCE * lo:
            return v, i, TimeBase(t, None, 0.0, uniform=False)
        return v, i, TimeBase(t, None, 0.0)
    if dt is None or not (math.isfinite(dt) and dt > 0):
        raise InputDataError(f"give a time array or a sample interval dt > 0, got dt={dt!r}")
    if not math.isfinite(t_start):
        raise InputDataError(f"t_start must be finite, got {t_start!r}")
    return v, i, TimeBase(None, float(dt), float(t_start))
