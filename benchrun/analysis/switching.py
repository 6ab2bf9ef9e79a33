"""Switch turn-on energy in the double-pulse shot, and the part of it the diode recovery causes.

Why it matters: at every commutation the switch that turns on must carry the diode's recovery
current while it still holds (most of) the bus voltage. For a silicon fast-recovery diode that
switch energy is usually larger than the diode's own recovery energy Err.

Definitions (SI units, times by linear interpolation between samples)
-------------------------------------------------------------------
Switch current during the commutation
    The capture has the diode current, not the switch current. During the commutation the load
    inductor holds its current, so by Kirchhoff's current law at the switch node
    ``i_sw = i_load − i_diode`` with ``i_load ≈ IF`` (``recovery.if_A``, the forward current on
    the plateau just before the commutation; the load current changes by a negligible
    ``V·Δt/L`` across the event). This holds only around the commutation analysed; the caller
    builds ``i_sw`` that way (see :func:`switch_current_from_diode`).
Turn-on energy ``eon_J``
    ``∫ v_sw·i_sw dt`` from ``t_eon_start_s`` — the switch current rising through
    ``current_start_fraction·IF`` (10 %) — to ``t_eon_end_s`` — the switch voltage falling
    through ``voltage_end_fraction·Voff`` (2 %), ``Voff`` being the switch's off-state voltage
    just before the turn-on. This is the integration window used for IGBT turn-on energy in
    IEC 60747-9 practice (10 % of the collector current to 2 % of the collector-emitter
    voltage; fractions from memory, both configurable). The integral is evaluated exactly for
    the piecewise-linear interpolants of the samples: on a segment of length h,
    ``∫ v·i = h·(2·v0·i0 + v0·i1 + v1·i0 + 2·v1·i1)/6``.
Ideal-diode turn-on ``eon_ideal_J`` (our model; stated on the report)
    The energy the switch would dissipate with a diode that has no stored charge, at the same
    di/dt and dv/dt:

    * current rise (from ``t_eon_start_s`` to the diode current's zero crossing ``t0``): taken
      as measured — until t0 the diode still conducts forward, so recovery plays no part yet and
      the measured rise already has the real di/dt and the real stray-inductance voltage drop;
    * voltage fall: with an ideal diode the switch voltage would start falling at t0, from its
      value ``V0 = v_sw(t0)``, while the switch carries just the load current IF; modelled as a
      linear fall at the measured rate ``dv/dt`` down to the window end
      ``Vend = voltage_end_fraction·Voff``, which contributes ``IF·(V0² − Vend²)/(2·dv/dt)``.
      ``dv/dt`` is measured on the real fall between ``fall_high_fraction·V0`` and
      ``fall_low_fraction·V0`` (60 % → 20 %): this band keeps a recovery snap or a
      capacitive slow-down at the top of the fall, and the low-voltage tail at the bottom,
      out of the rate. The band is our choice, checked against ngspice runs of the same
      circuit with a charge-free diode (tests/test_switching_ngspice.py).

    For a linear (Miller-plateau-limited) voltage fall the model is exact. What it leaves out
    is counted in the recovery part, so that part is an upper-side figure: a delay between
    the end of the current rise and the start of the voltage fall, the charging of fixture
    capacitance across the diode, and a fall that slows down near the end.

Recovery part ``eon_recovery_J``
    ``eon_J − eon_ideal_J``: the extra switch energy caused by the recovery current and by the
    delay of the voltage fall while the diode recovers (ta). For a SiC Schottky diode it is the
    energy of charging the diode capacitance. A negative value is kept and flagged.
Estimate ``eon_recovery_estimate_J``
    ``VR·Qrr`` (``recovery.vr_V × recovery.qrr_C``): the recovered charge passes through the
    switch while it still holds about the bus voltage (common practice; an upper-side estimate
    because the switch voltage starts falling during tb). Always computed when Qrr and VR are
    known; it is the only switch figure when no switch-voltage channel was captured, flagged
    :data:`FLAG_ESTIMATE_ONLY`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from benchrun.errors import ConfigError, InputDataError

FLAG_ESTIMATE_ONLY = "switch_energy_estimate_only"
FLAG_NO_EVENT = "switch_no_recovery_event"
FLAG_START_NOT_FOUND = "switch_window_start_not_found"
FLAG_END_NOT_FOUND = "switch_window_end_not_found"
FLAG_FALL_NOT_FOUND = "switch_voltage_fall_not_found"
FLAG_VOFF_FROM_DIODE = "switch_off_voltage_from_diode"
FLAG_NEGATIVE = "eon_recovery_negative"
FLAG_NO_ESTIMATE = "eon_recovery_estimate_unavailable"

#: Fewest samples used to read the switch's off-state voltage (common practice).
MIN_OFF_SAMPLES = 8
#: First forward span searched for the window end; grown by 4× until found.
INITIAL_SPAN = 65_536


class RecoveryLike(Protocol):
    """What this module reads from :class:`benchrun.analysis.recovery.RecoveryMetrics`."""

    if_A: float | None
    t0_s: float | None
    qrr_C: float | None
    vr_V: float | None
    didt_A_per_s: float | None


@dataclass(frozen=True)
class SwitchingOptions:
    """Window and model fractions (printed on the report).

    Attributes
    ----------
    current_start_fraction
        Window start: switch current rises through this fraction of IF (0.10).
    voltage_end_fraction
        Window end: switch voltage falls through this fraction of its off-state voltage (0.02).
    fall_high_fraction, fall_low_fraction
        Levels, as fractions of ``v_sw(t0)``, between which the voltage-fall rate is measured
        (0.6 / 0.2: away from a snap at the top and a tail at the bottom of the fall).
    off_voltage_V
        Use this switch off-state (bus) voltage instead of reading it from the capture.
    """

    current_start_fraction: float = 0.10
    voltage_end_fraction: float = 0.02
    fall_high_fraction: float = 0.6
    fall_low_fraction: float = 0.2
    off_voltage_V: float | None = None

    def __post_init__(self) -> None:
        for name in ("current_start_fraction", "voltage_end_fraction"):
            value = getattr(self, name)
            if not 0.0 < value < 1.0:
                raise ConfigError(f"must be between 0 and 1, got {value!r}", field=name)
        if not 0.0 < self.fall_low_fraction < self.fall_high_fraction < 1.0:
            raise ConfigError(
                "need 0 < fall_low_fraction < fall_high_fraction < 1, got "
                f"{self.fall_low_fraction} and {self.fall_high_fraction}",
                field="fall_low_fraction/fall_high_fraction",
            )
        if self.off_voltage_V is not None and not (
            math.isfinite(self.off_voltage_V) and self.off_voltage_V > 0
        ):
            raise ConfigError(f"must be a positive voltage, got {self.off_voltage_V!r}",
                              field="off_voltage_V")


@dataclass(frozen=True)
class SwitchingMetrics:
    """Result of :func:`analyze_switch_turn_on` (SI units; ``None`` where not found).

    ``voff_V`` is the switch off-state voltage the window end refers to and ``dvdt_V_per_s``
    the measured voltage-fall rate used by the ideal-diode model; both are kept as attributes
    for the report and are not part of :meth:`to_dict`.
    """

    eon_J: float | None
    eon_ideal_J: float | None
    eon_recovery_J: float | None
    eon_recovery_estimate_J: float | None
    t_eon_start_s: float | None
    t_eon_end_s: float | None
    voff_V: float | None = None
    dvdt_V_per_s: float | None = None
    flags: tuple[str, ...] = field(default=())

    #: Keys of :meth:`to_dict` besides ``flags``.
    KEYS = (
        "eon_J",
        "eon_ideal_J",
        "eon_recovery_J",
        "eon_recovery_estimate_J",
        "t_eon_start_s",
        "t_eon_end_s",
    )

    @property
    def is_estimate(self) -> bool:
        """True when only the ``VR·Qrr`` estimate is available (no measured switch energy)."""
        return self.eon_recovery_J is None

    def to_dict(self) -> dict[str, Any]:
        """The numeric keys plus ``flags`` (list), JSON-ready."""
        data: dict[str, Any] = {key: getattr(self, key) for key in self.KEYS}
        data["flags"] = list(self.flags)
        return data


# ---------------------------------------------------------------------------------------------
# helpers


class _Time:
    """Sample times as an array, or as ``t_start + k·dt``."""

    def __init__(self, t: np.ndarray | None, dt: float | None, t_start: float, n: int) -> None:
        self.t = t
        self.dt = dt
        self.t_start = t_start
        self.n = n

    def at(self, a: int, b: int) -> np.ndarray:
        if self.t is not None:
            return np.asarray(self.t[a:b], dtype=np.float64)
        return self.t_start + self.dt * np.arange(a, b, dtype=np.float64)

    def index_before(self, time: float) -> int:
        """Largest index k with t[k] <= time (clamped to the record)."""
        if self.t is not None:
            k = int(np.searchsorted(self.t, time, side="right")) - 1
        else:
            k = math.floor((time - self.t_start) / self.dt)
        return min(max(k, 0), self.n - 1)


def _validate(t, v_sw, i_sw, dt, t_start) -> tuple[np.ndarray, Any, _Time]:
    v = np.asarray(v_sw)
    i = i_sw if isinstance(i_sw, SwitchCurrentFromDiode) else np.asarray(i_sw)
    for name, x in (("switch voltage", v), ("switch current", i)):
        if x.ndim != 1:
            raise InputDataError(f"{name} must be a 1-D array, got shape {x.shape}")
        if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
            raise InputDataError(f"{name} must be numeric, got dtype {x.dtype}")
    if v.size != i.size:
        raise InputDataError(f"switch voltage has {v.size} samples but current has {i.size}")
    if v.size < 4:
        raise InputDataError(f"switch record too short: {v.size} samples")
    if t is not None:
        t = np.asarray(t, dtype=np.float64)
        if t.shape != v.shape:
            raise InputDataError(f"time has shape {t.shape}, expected ({v.size},)")
        if not np.all(np.diff(t) > 0):
            raise InputDataError("time is not strictly increasing")
        return v, i, _Time(t, None, 0.0, v.size)
    if dt is None or not (math.isfinite(dt) and dt > 0):
        raise InputDataError(f"give a time array or a sample interval dt > 0, got dt={dt!r}")
    return v, i, _Time(None, float(dt), float(t_start), v.size)


def _interp_at(time: float, tw: np.ndarray, xw: np.ndarray) -> float:
    return float(np.interp(time, tw, xw))


def _crossing(t0: float, t1: float, x0: float, x1: float, level: float) -> float:
    t0, t1, x0, x1 = float(t0), float(t1), float(x0), float(x1)
    if x1 == x0:
        return t1
    return t0 + (level - x0) * (t1 - t0) / (x1 - x0)


def integrate_product(
    t: np.ndarray, v: np.ndarray, i: np.ndarray, t_from: float, t_to: float
) -> float:
    """Exact ∫ v·i dt over [t_from, t_to] of the piecewise-linear interpolants of the samples.

    On each segment both factors are linear, so the product is a quadratic whose integral is
    ``h·(2·v0·i0 + v0·i1 + v1·i0 + 2·v1·i1)/6`` (Simpson's rule is exact for it). End points
    inside a segment are interpolated.
    """
    t = np.asarray(t, dtype=np.float64)
    v = np.asarray(v, dtype=np.float64)
    i = np.asarray(i, dtype=np.float64)
    if t_to <= t_from:
        return 0.0
    inner = (t > t_from) & (t < t_to)
    tt = np.concatenate(([t_from], t[inner], [t_to]))
    vv = np.concatenate(([np.interp(t_from, t, v)], v[inner], [np.interp(t_to, t, v)]))
    ii = np.concatenate(([np.interp(t_from, t, i)], i[inner], [np.interp(t_to, t, i)]))
    h = np.diff(tt)
    v0, v1, i0, i1 = vv[:-1], vv[1:], ii[:-1], ii[1:]
    return float(np.sum(h * (2 * v0 * i0 + v0 * i1 + v1 * i0 + 2 * v1 * i1)) / 6.0)


class SwitchCurrentFromDiode:
    """``IF − i_diode`` evaluated only on the samples read (no pass over a long record).

    Indexing and slicing give float64 values; ``np.asarray`` gives the whole array.
    """

    def __init__(self, i_diode: np.ndarray, if_A: float) -> None:
        self.i_diode = np.asarray(i_diode)
        self.if_A = float(if_A)
        self.shape = self.i_diode.shape
        self.ndim = self.i_diode.ndim
        self.size = self.i_diode.size
        self.dtype = np.dtype(np.float64)

    def __len__(self) -> int:
        return len(self.i_diode)

    def __getitem__(self, index: Any) -> Any:
        return self.if_A - np.asarray(self.i_diode[index], dtype=np.float64)

    def __array__(self, dtype: Any = None, copy: Any = None) -> np.ndarray:
        out = self.if_A - np.asarray(self.i_diode, dtype=np.float64)
        return out if dtype is None else out.astype(dtype)


def switch_current_from_diode(i_diode: np.ndarray, if_A: float) -> SwitchCurrentFromDiode:
    """Switch current during the commutation, ``IF − i_diode`` (Kirchhoff, load current ≈ IF).

    Valid only around the commutation whose plateau current is ``if_A``. Evaluated lazily,
    on the samples the analysis reads.
    """
    return SwitchCurrentFromDiode(i_diode, if_A)


def _estimate(recovery: RecoveryLike) -> float | None:
    qrr, vr = getattr(recovery, "qrr_C", None), getattr(recovery, "vr_V", None)
    if qrr is None or vr is None:
        return None
    return abs(float(vr)) * float(qrr)


def switching_estimate(
    recovery: RecoveryLike, extra_flags: tuple[str, ...] = ()
) -> SwitchingMetrics:
    """Switch metrics when no switch-voltage channel exists: only ``VR·Qrr``, flagged estimate."""
    estimate = _estimate(recovery)
    flags = (FLAG_ESTIMATE_ONLY, *extra_flags)
    if estimate is None:
        flags += (FLAG_NO_ESTIMATE,)
    return SwitchingMetrics(
        eon_J=None,
        eon_ideal_J=None,
        eon_recovery_J=None,
        eon_recovery_estimate_J=estimate,
        t_eon_start_s=None,
        t_eon_end_s=None,
        flags=flags,
    )


# ---------------------------------------------------------------------------------------------
# the analysis


def analyze_switch_turn_on(
    t: np.ndarray | None,
    v_sw: np.ndarray,
    i_sw: np.ndarray | SwitchCurrentFromDiode,
    recovery: RecoveryLike,
    options: SwitchingOptions | None = None,
    *,
    dt: float | None = None,
    t_start: float = 0.0,
) -> SwitchingMetrics:
    """Switch turn-on energy over the 10 % current → 2 % voltage window, and its recovery part.

    Parameters
    ----------
    t
        Sample times [s], strictly increasing; or ``None`` with ``dt`` and ``t_start``.
    v_sw
        Switch voltage (drain-source / collector-emitter) [V].
    i_sw
        Switch current [A] around the commutation, usually ``IF − i_diode``
        (:func:`switch_current_from_diode`).
    recovery
        The diode's :class:`~benchrun.analysis.recovery.RecoveryMetrics` of the same
        commutation (``if_A``, ``t0_s``, ``qrr_C``, ``vr_V`` are used).
    options
        :class:`SwitchingOptions`.
    dt, t_start
        Sample interval and time of the first sample when ``t`` is None.

    Returns
    -------
    SwitchingMetrics
        Definitions in the module docstring. Unfound values are ``None`` with a flag.

    Raises
    ------
    InputDataError
        Arrays of the wrong shape or time not increasing.
    """
    opts = options or SwitchingOptions()
    v, i, time = _validate(t, v_sw, i_sw, dt, t_start)
    estimate = _estimate(recovery)
    flags: list[str] = []
    if estimate is None:
        flags.append(FLAG_NO_ESTIMATE)

    def result(**values: Any) -> SwitchingMetrics:
        base = dict(eon_J=None, eon_ideal_J=None, eon_recovery_J=None, t_eon_start_s=None,
                    t_eon_end_s=None)
        base.update(values)
        return SwitchingMetrics(eon_recovery_estimate_J=estimate, flags=tuple(flags), **base)

    if_A, t0 = recovery.if_A, recovery.t0_s
    if if_A is None or t0 is None or not if_A > 0:
        flags.append(FLAG_NO_EVENT)
        return result()
    if_A, t0 = float(if_A), float(t0)
    k0 = time.index_before(t0)

    # --- window start: last rising crossing of f·IF before t0 --------------------------------
    level_i = opts.current_start_fraction * if_A
    start = _start_crossing(i, time, k0, t0, level_i)
    if start is None:
        flags.append(FLAG_START_NOT_FOUND)
        return result()
    t_a, k_a = start

    # --- switch off-state voltage just before the current starts rising ----------------------
    voff = _off_voltage(v, time, k_a, t0 - t_a, opts, recovery, flags)
    if voff is None:
        return result(t_eon_start_s=t_a)

    # --- window end: first falling crossing of f·Voff after t0 --------------------------------
    level_v = opts.voltage_end_fraction * voff
    end = _first_falling(v, time, k0, level_v)
    if end is None:
        flags.append(FLAG_END_NOT_FOUND)
        return result(t_eon_start_s=t_a)
    t_b, k_b = end

    a = max(k_a - 1, 0)
    b = min(k_b + 2, time.n)
    tw = time.at(a, b)
    vw = np.asarray(v[a:b], dtype=np.float64)
    iw = np.asarray(i[a:b], dtype=np.float64)
    eon = integrate_product(tw, vw, iw, t_a, t_b)

    # --- ideal-diode turn-on: measured rise to t0, linear fall at the measured dv/dt ---------
    e_rise = integrate_product(tw, vw, iw, t_a, min(t0, t_b))
    v0 = _interp_at(t0, tw, vw)
    dvdt = _fall_rate(tw, vw, t0, t_b, v0, opts)
    if dvdt is None:
        flags.append(FLAG_FALL_NOT_FOUND)
        return result(eon_J=eon, t_eon_start_s=t_a, t_eon_end_s=t_b, voff_V=voff)
    e_fall = if_A * max(v0 * v0 - level_v * level_v, 0.0) / (2.0 * dvdt)
    eon_ideal = e_rise + e_fall
    eon_recovery = eon - eon_ideal
    if eon_recovery < 0:
        flags.append(FLAG_NEGATIVE)
    return result(
        eon_J=eon,
        eon_ideal_J=eon_ideal,
        eon_recovery_J=eon_recovery,
        t_eon_start_s=t_a,
        t_eon_end_s=t_b,
        voff_V=voff,
        dvdt_V_per_s=dvdt,
    )


def _start_crossing(
    i: np.ndarray, time: _Time, k0: int, t0: float, level: float
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
            tw = time.at(j, j + 2)
            x0, x1 = float(i[j]), float(i[j + 1])
            if x1 < level:  # the sample after t0 is still below: no rise before t0
                return None
            return float(_crossing(tw[0], tw[1], x0, x1, level)), j
        if lo == 0:
            return None
        span *= 4


def _first_falling(v: np.ndarray, time: _Time, k0: int, level: float) -> tuple[float, int] | None:
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
            tw = time.at(k - 1, k + 1)
            return float(_crossing(tw[0], tw[1], float(v[k - 1]), float(v[k]), level)), k
        a = b - 1
        span *= 4
    return None


def _off_voltage(
    v: np.ndarray,
    time: _Time,
    k_start: int,
    rise_s: float,
    opts: SwitchingOptions,
    recovery: RecoveryLike,
    flags: list[str],
) -> float | None:
    """Switch off-state voltage before the turn-on: median over ~3 rise times before the rise.

    The window stops a quarter rise time before the 10 % point so the stray-inductance drop of
    the rising current is not included.
    """
    if opts.off_voltage_V is not None:
        return float(opts.off_voltage_V)
    tk = float(time.at(k_start, k_start + 1)[0])
    k_hi = time.index_before(tk - 0.25 * max(rise_s, 0.0))
    k_lo = time.index_before(tk - 3.0 * max(rise_s, 0.0))
    k_lo = min(k_lo, k_hi - MIN_OFF_SAMPLES + 1)
    k_lo = max(k_lo, 0)
    seg = np.asarray(v[k_lo : k_hi + 1], dtype=np.float64)
    if seg.size >= MIN_OFF_SAMPLES:
        value = float(np.median(seg))
        if value > 0:
            return value
    vr = getattr(recovery, "vr_V", None)
    if vr is not None and vr > 0:
        flags.append(FLAG_VOFF_FROM_DIODE)
        return float(vr)
    flags.append(FLAG_END_NOT_FOUND)
    return None


def _fall_rate(
    tw: np.ndarray, vw: np.ndarray, t0: float, t_end: float, v0: float, opts: SwitchingOptions
) -> float | None:
    """Voltage-fall rate between ``fall_high·V0`` and ``fall_low·V0`` on the final fall (V/s)."""
    if not v0 > 0:
        return None
    hi = opts.fall_high_fraction * v0
    lo = opts.fall_low_fraction * v0
    m = np.flatnonzero(tw >= t0)
    if m.size < 2:
        return None
    k = int(m[0])
    below = np.flatnonzero(vw[k:] <= lo)
    if not below.size:
        return None
    k_lo = k + int(below[0])
    if k_lo == 0:
        return None
    t_lo = _crossing(tw[k_lo - 1], tw[k_lo], vw[k_lo - 1], vw[k_lo], lo)
    above = np.flatnonzero(vw[:k_lo] >= hi)
    if not above.size:
        return None
    k_hi = int(above[-1])
    t_hi = _crossing(tw[k_hi], tw[k_hi + 1], vw[k_hi], vw[k_hi + 1], hi)
    if t_lo <= t_hi:
        return None
    return float((hi - lo) / (t_lo - t_hi))
