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
    The energy the same switch would dissipate with a diode that holds no charge. Basis: the
    inductive-load turn-on of a MOS-gated switch (gate-charge description: Baliga, *Fundamentals
    of Power Semiconductor Devices*, ch. 6; idealised turn-on waveforms with diode recovery:
    Mohan, Undeland, Robbins, *Power Electronics*, ch. 2 and 22 — from memory). While the
    current rises the gate charges Ciss, ``di/dt = gm·Ig/Ciss``; the voltage falls once the
    gate current goes into the Miller capacitance. With an ideal diode that happens when the
    switch current reaches the load current ``IL`` (= IF). With a real diode the gate goes on
    charging until the current stops rising (the diode starts to support voltage) and gives
    that charge back as the current decays. At a given switch voltage the Miller charge is the
    same with either diode, so the real switch reaches each voltage level later by the time
    the gate needed to raise the current from IL to its present value at the rise rate:

        ``ΔT(t) = (i_sw(t) − IL) / (di/dt)``    (first order in the gate-charge balance)

    ``di/dt`` is the commutation rate (``recovery.didt_A_per_s``; measured on the switch
    current when absent). The model is then:

    * current rise (``t_eon_start_s`` → the diode current's zero crossing ``t0``): as measured —
      until t0 the diode conducts forward and recovery plays no part;
    * voltage fall: for each voltage level ``v`` below ``V0 = v_sw(t0)`` the real switch falls
      through it (first passage) at ``T(v)`` carrying ``i_sw``; the ideal switch falls through
      it at ``T(v) − ΔT`` carrying IL. ``IL·∫ v dt`` over these ideal level-crossing times, down
      to the window end ``Vend``, is the ideal fall energy (exact trapezoids: on a sampled
      segment v and the ideal time are both linear);
    * where the circuit, not the gate, drives the fall (a snappy diode pulls the switch voltage
      down through the loop inductance: a 5 % band of the fall traversed faster than
      ``forced_rate_factor`` × the duration-weighted median rate), the gate-charge relation
      does not hold there (the switch's output-capacitance current is not the load current);
      the ideal level-crossing times are then bounded by the physics of a Miller fall that
      never speeds up as the voltage falls (Cgd grows at low voltage): ``T_ideal(y)/y`` is made
      non-decreasing in the fall depth ``y = V0 − v``.

    Checked against ngspice runs of the same double-pulse circuits with a charge-free diode
    (tests/test_switching_ngspice.py). Second-order effects left out: the gate current is
    lower while the switch carries the extra current (adds delay: the recovery part comes out
    somewhat low when Irrm is comparable to the switch's current headroom gm·(Vgg − Vplateau)),
    a square-law channel (less gate charge per ampere: somewhat high), and the current of the
    switch's output capacitance during a fall much faster than the gate-driven one.

Recovery part ``eon_recovery_J``
    ``eon_J − eon_ideal_J`` = ``∫ v_sw·(i_sw − IL) dt`` over the fall (the recovery or
    displacement current passing the switch at the voltage it holds) + ``IL·∫ ΔT dv`` (the
    load current held longer at each voltage level). For a capacitive (SiC Schottky) diode the
    first term is about ``Vbus·Qc − Ec`` (charge drawn from the bus minus the energy left in
    the diode capacitance), the second the delay of the fall while the switch current rises to
    supply the displacement current. A negative value is kept and flagged.
Estimate ``eon_recovery_estimate_J``
    ``VR·Qrr`` (``recovery.vr_V × recovery.qrr_C``): the recovered charge passes through the
    switch while it still holds about the bus voltage (common practice, e.g. the ``Qrr·VDD``
    term of datasheet-based MOSFET loss budgets — from memory). Only an estimate: it counts
    the charge recovered during tb at the full voltage (high side) and leaves out the load
    current held at the bus voltage while the fall is delayed (low side), so it can be above
    or below the measured part. Always computed when Qrr and VR are known; it is the only
    switch figure when no switch-voltage channel was captured, flagged
    :data:`FLAG_ESTIMATE_ONLY`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from benchrun.analysis.switch_edges import (
    SampleTimes,
    commutation_rate,
    first_falling,
    forced_bands,
    start_crossing,
)
from benchrun.analysis.timebase import check_signals
from benchrun.errors import ConfigError, InputDataError

FLAG_ESTIMATE_ONLY = "switch_energy_estimate_only"
FLAG_NO_EVENT = "switch_no_recovery_event"
FLAG_START_NOT_FOUND = "switch_window_start_not_found"
FLAG_END_NOT_FOUND = "switch_window_end_not_found"
FLAG_FALL_NOT_FOUND = "switch_voltage_fall_not_found"
FLAG_VOFF_FROM_DIODE = "switch_off_voltage_from_diode"
FLAG_NEGATIVE = "eon_recovery_negative"
FLAG_NO_ESTIMATE = "eon_recovery_estimate_unavailable"
FLAG_DIDT_NOT_FOUND = "switch_didt_not_found"

#: Fewest samples used to read the switch's off-state voltage (common practice).
MIN_OFF_SAMPLES = 8

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
    forced_rate_factor
        A 5 % band of the voltage fall traversed faster than this multiple of the fall's
        duration-weighted median rate is taken as driven by the circuit (diode snap through
        the loop inductance), not by the gate (3.0; our choice, see the module docstring).
    off_voltage_V
        Use this switch off-state (bus) voltage instead of reading it from the capture.
    """

    current_start_fraction: float = 0.10
    voltage_end_fraction: float = 0.02
    forced_rate_factor: float = 3.0
    off_voltage_V: float | None = None

    def __post_init__(self) -> None:
        for name in ("current_start_fraction", "voltage_end_fraction"):
            value = getattr(self, name)
            if not 0.0 < value < 1.0:
                raise ConfigError(f"must be between 0 and 1, got {value!r}", field=name)
        if not (math.isfinite(self.forced_rate_factor) and self.forced_rate_factor > 1.0):
            raise ConfigError(f"must be a number above 1, got {self.forced_rate_factor!r}",
                              field="forced_rate_factor")
        if self.off_voltage_V is not None and not (
            math.isfinite(self.off_voltage_V) and self.off_voltage_V > 0
        ):
            raise ConfigError(f"must be a positive voltage, got {self.off_voltage_V!r}",
                              field="off_voltage_V")


@dataclass(frozen=True)
class SwitchingMetrics:
    """Result of :func:`analyze_switch_turn_on` (SI units; ``None`` where not found).

    ``voff_V`` is the switch off-state voltage the window end refers to, ``dvdt_V_per_s`` the
    duration-weighted median rate of the measured voltage fall, ``didt_A_per_s`` the
    commutation rate the ideal-diode model used and ``fall_forced`` whether part of the fall
    was found circuit-driven (see the module docstring); these are attributes for the report,
    not part of :meth:`to_dict`.
    """

    eon_J: float | None
    eon_ideal_J: float | None
    eon_recovery_J: float | None
    eon_recovery_estimate_J: float | None
    t_eon_start_s: float | None
    t_eon_end_s: float | None
    voff_V: float | None = None
    dvdt_V_per_s: float | None = None
    didt_A_per_s: float | None = None
    fall_forced: bool = False
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


def _validate(t, v_sw, i_sw, dt, t_start) -> tuple[np.ndarray, Any, SampleTimes]:
    v = np.asarray(v_sw)
    i = i_sw if isinstance(i_sw, SwitchCurrentFromDiode) else np.asarray(i_sw)
    check_signals(("switch voltage", v), ("switch current", i))
    if v.size < 4:
        raise InputDataError(f"switch record too short: {v.size} samples")
    if t is not None:
        t = np.asarray(t, dtype=np.float64)
        if t.shape != v.shape:
            raise InputDataError(f"time has shape {t.shape}, expected ({v.size},)")
        if not np.all(np.diff(t) > 0):
            raise InputDataError("time is not strictly increasing")
        return v, i, SampleTimes(t, None, 0.0, v.size)
    if dt is None or not (math.isfinite(dt) and dt > 0):
        raise InputDataError(f"give a time array or a sample interval dt > 0, got dt={dt!r}")
    return v, i, SampleTimes(None, float(dt), float(t_start), v.size)


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
    start = start_crossing(i, time, k0, t0, level_i)
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
    end = first_falling(v, time, k0, level_v)
    if end is None:
        flags.append(FLAG_END_NOT_FOUND)
        return result(t_eon_start_s=t_a)
    t_b, k_b = end

    a = max(k_a - 1, 0)
    b = min(k_b + 2, time.n)
    tw = time.window(a, b)
    vw = np.asarray(v[a:b], dtype=np.float64)
    iw = np.asarray(i[a:b], dtype=np.float64)
    eon = integrate_product(tw, vw, iw, t_a, t_b)

    # --- ideal-diode turn-on: measured rise to t0, gate-charge-shifted fall (docstring) -----
    e_rise = integrate_product(tw, vw, iw, t_a, min(t0, t_b))
    didt = commutation_rate(getattr(recovery, "didt_A_per_s", None), tw, iw, t0, if_A)
    if didt is None:
        flags.append(FLAG_DIDT_NOT_FOUND)
        return result(eon_J=eon, t_eon_start_s=t_a, t_eon_end_s=t_b, voff_V=voff)
    fall = _ideal_fall(tw, vw, iw, t0, t_b, if_A, level_v, didt, opts)
    if fall is None:
        flags.append(FLAG_FALL_NOT_FOUND)
        return result(eon_J=eon, t_eon_start_s=t_a, t_eon_end_s=t_b, voff_V=voff,
                      didt_A_per_s=didt)
    e_fall, dvdt, forced = fall
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
        didt_A_per_s=didt,
        fall_forced=forced,
    )


def _off_voltage(
    v: np.ndarray,
    time: SampleTimes,
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
    tk = float(time.window(k_start, k_start + 1)[0])
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


def _ideal_fall(
    tw: np.ndarray,
    vw: np.ndarray,
    iw: np.ndarray,
    t0: float,
    t_end: float,
    if_A: float,
    v_end: float,
    didt: float,
    opts: SwitchingOptions,
) -> tuple[float, float, bool] | None:
    """Ideal-diode fall energy ``IL·∫ v dt``, the median fall rate and the forced-fall finding.

    Works on the first passages of the measured fall through each voltage level (the samples
    that set a new running minimum, plus t0 and the window end), shifted earlier by
    ``ΔT = (i_sw − IL)/(di/dt)`` (module docstring).
    """
    inner = (tw > t0) & (tw < t_end)
    t = np.concatenate(([t0], tw[inner], [t_end]))
    v = np.concatenate(([np.interp(t0, tw, vw)], vw[inner], [v_end]))
    i = np.concatenate(([np.interp(t0, tw, iw)], iw[inner], [np.interp(t_end, tw, iw)]))
    v0 = float(v[0])
    if not v0 > v_end:
        return None
    # first passages: samples where the running minimum falls (below V0)
    running = np.minimum.accumulate(v)
    new_min = np.concatenate(([True], running[1:] < running[:-1]))
    keep = new_min & (v <= v0)
    t, v, i = t[keep], v[keep], i[keep]
    if t.size < 2:
        return None
    depth = v0 - v  # y = V0 − v, increasing, 0 at t0
    elapsed = t - t0
    t_ideal = elapsed - (i - if_A) / didt
    t_ideal[0] = 0.0

    rate, forced = forced_bands(depth, elapsed, opts.forced_rate_factor)
    if forced:
        # a Miller fall never speeds up as the voltage falls: T_ideal(y)/y non-decreasing
        slope = t_ideal[1:] / depth[1:]
        slope = np.minimum.accumulate(slope[::-1])[::-1]
        t_ideal[1:] = np.minimum(t_ideal[1:], depth[1:] * slope)
    t_ideal = np.maximum.accumulate(np.maximum(t_ideal, 0.0))
    energy = if_A * float(np.sum(0.5 * (v[1:] + v[:-1]) * np.diff(t_ideal)))
    return energy, rate, forced
