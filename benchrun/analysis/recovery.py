"""Reverse-recovery metrics of a power diode from a double-pulse capture.

Definitions (all results positive magnitudes, SI units; times by linear interpolation):

- ``if_A``: forward current on the plateau just before the commutation (median).
- ``t0_s``: falling zero crossing of the current at the commutation.
- ``irrm_A``: peak reverse current, ``-min(i)`` during the recovery.
- ``ta_s``: time from t0 to the current minimum.
- ``trr_s``: t0 to the zero crossing of the straight line through the points where the current,
  after its minimum, rises through ``-fit_high·Irrm`` and ``-fit_low·Irrm`` (0.9 / 0.25 by
  default). This is alternative 2 of the JEDEC dictionary's "reverse recovery time (trr)"
  (JESD282-B; its note: IEC 60747-2 has alternatives 2 and 3), the extrapolated current
  reaching zero, "with respect to specified points A and B": the standard leaves the points
  to the test specification. The defaults are the design's choice (from memory of IEC 60747-2
  practice); specifications that use 0.75 / 0.50 set ``fit_high`` / ``fit_low``. With
  ``trr_method="threshold"`` the end is the instant the current rises through
  ``-trr_threshold_fraction·Irrm``: alternative 3 of the same definition, "the reverse current
  reaches a specified low value IR(REC)".
- ``tb_s = trr - ta`` and ``softness = tb / ta``.
- ``rrsf``: reverse-recovery softness factor in the JEDEC (JESD24 / JESD282 style) sense,
  ``|di/dt at t0| / |steepest di/dt after the minimum|``.
- ``qrr_C``: ``-∫ i dt`` from t0 to t2, t2 being the first instant after the minimum at which
  the current rises through ``-integration_end_fraction·Irrm`` (2 % by default, the integration
  end used in IEC 60747-9 practice).
- ``err_J``: ``∫ v·i dt`` over the same interval (energy dissipated in the diode).
- ``didt_A_per_s``: ``(0.5·IF + 0.5·Irrm) / (t_b - t_a)``, t_a the falling crossing of
  ``+0.5·IF``, t_b that of ``-0.5·Irrm``.
- ``vrm_V``: peak reverse voltage ``max(-v)`` from t0 to ``t2 + trr``.
- ``vr_V``: steady reverse voltage after the event (median of ``-v`` after that window).

Measurement approach (see :mod:`benchrun.analysis.events`): the event is located on a coarse
strided pass over the whole record; the metrics are measured on a window around it. On noisy
data a light centred moving average (width ≈ 1/10 of the forward-current fall, ≤ 31 samples)
is used only to *locate* crossings and the minimum; values are measured on the raw samples by
least-squares lines / parabolas through the samples inside the noise band. On clean data the
estimators are plain interpolation and plain sample extrema.

Ringing after the peak: the trr crossings and t2 are the *first* rising crossings after the
minimum, so later ringing cycles never move them, and VRM is taken over t0 … t2 + trr only
(as defined above). A non-uniform time array (a variable-step simulator's output) is
resampled onto a uniform grid for the event location and crossings; Qrr and Err are then the
exact trapezoidal integrals over the given points.

Sampling: when ta, tb or trr spans fewer than 10 sample intervals (for a non-uniform
record, steps of the grid it is measured on) the values are still reported, but the result
carries the flag ``undersampled_recovery: <interval> spans <n> samples (need >= 10); not
resolved: <metric keys>`` (the count and its sources in :mod:`benchrun.analysis.resolution`).
It only warns. ``few_samples_in_ta`` (same count, ta only) is kept as it was.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, fields, replace
from typing import Any

import numpy as np

from benchrun.analysis import events as ev
from benchrun.analysis.conditioning import lowpass
from benchrun.analysis.resolution import (
    FLAG_UNDERSAMPLED,
    recovery_spans,
    undersampled_flag,
)
from benchrun.analysis.timebase import (
    MAX_RESAMPLED,
    MIN_RESAMPLED,
    MIN_SAMPLES,
    UNIFORM_TOLERANCE,
    TimeBase,
    event_step,
    uniform_grid,
    validate_record,
)
from benchrun.errors import ConfigError, NoEventError

#: Samples looked back before the end of the plateau (enough for the fall and a plateau).
PLATEAU_LOOKBACK = 60_000
#: First span after the plateau examined; grown by 4× until the event is complete.
INITIAL_SPAN = 16_384
#: Fewer samples than this across ta make Irrm and ta unreliable (common practice).
MIN_SAMPLES_IN_TA = 10
#: Locator width (samples) used to pin down the reverse-current peak on noisy data.
PEAK_LOCATOR_WIDTH = 5

#: A record whose negated current holds a level with more than this many times the charge
#: (level × duration) of any positive level is taken as a reversed current probe: a freewheel
#: plateau carries far more charge than the recovery's reverse peak (common practice).
REVERSED_AREA_RATIO = 2.0

FLAG_SHORT_PLATEAU = "short_plateau"
FLAG_FEW_SAMPLES_TA = "few_samples_in_ta"
FLAG_NEAR_END = "event_near_record_end"
FLAG_INCOMPLETE = "recovery_incomplete"
FLAG_TRR_NOT_FOUND = "trr_not_found"
FLAG_TRR_LINE = "trr_line_no_crossing"
FLAG_RRSF = "rrsf_not_found"
FLAG_LOW_SNR = "low_signal_to_noise"
FLAG_VR = "reverse_voltage_not_found"

# Names importable from here (input limits live in timebase.py, the sampling check in
# resolution.py).
__all__ = [
    "FLAG_UNDERSAMPLED", "MAX_RESAMPLED", "MIN_RESAMPLED", "MIN_SAMPLES", "MIN_SAMPLES_IN_TA",
    "UNIFORM_TOLERANCE", "RecoveryMetrics", "RecoveryOptions", "analyze_recovery",
]


@dataclass(frozen=True)
class RecoveryOptions:
    """How the recovery is measured (every fraction is printed on the report).

    Attributes
    ----------
    fit_high, fit_low
        Fractions of Irrm defining the trr extrapolation line, points A and B of the JEDEC
        definition (JESD282-B, alternative 2; the values are the test specification's: 0.9
        and 0.25 by default, from memory of IEC 60747-2 practice).
    trr_method
        ``"extrapolate"`` (line through the two points) or ``"threshold"`` (current rises
        through ``-trr_threshold_fraction·Irrm``).
    trr_threshold_fraction
        End criterion of the threshold method, IR(REC) / Irrm of the JEDEC definition
        (JESD282-B, alternative 3: "a specified low value"; 0.25 by default, common practice
        — set it to the value of the test specification).
    integration_end_fraction
        Qrr / Err integration end, fraction of Irrm (0.02, IEC 60747-9 practice).
    commutation
        Which current reversal of the record to analyse (0 = first, -1 = last).
    lowpass_hz
        Optional zero-phase low-pass cut-off applied to the analysis window.
    """

    fit_high: float = 0.9
    fit_low: float = 0.25
    trr_method: str = "extrapolate"
    trr_threshold_fraction: float = 0.25
    integration_end_fraction: float = 0.02
    commutation: int = -1
    lowpass_hz: float | None = None

    def __post_init__(self) -> None:
        if not 0.0 < self.fit_low < self.fit_high < 1.0:
            raise ConfigError(
                f"need 0 < fit_low < fit_high < 1, got {self.fit_low} and {self.fit_high}",
                field="fit_low/fit_high",
            )
        if self.trr_method not in ("extrapolate", "threshold"):
            raise ConfigError(
                f"trr_method must be 'extrapolate' or 'threshold', got {self.trr_method!r}",
                field="trr_method",
            )
        for name in ("trr_threshold_fraction", "integration_end_fraction"):
            value = getattr(self, name)
            if not 0.0 < value < 1.0:
                raise ConfigError(f"must be between 0 and 1, got {value!r}", field=name)
        if self.lowpass_hz is not None and not (
            math.isfinite(self.lowpass_hz) and self.lowpass_hz > 0
        ):
            raise ConfigError(f"must be a positive frequency, got {self.lowpass_hz!r}",
                              field="lowpass_hz")


@dataclass(frozen=True)
class RecoveryMetrics:
    """Result of :func:`analyze_recovery` (SI units; ``None`` where not found)."""

    if_A: float | None
    t0_s: float | None
    irrm_A: float | None
    ta_s: float | None
    tb_s: float | None
    trr_s: float | None
    softness: float | None
    rrsf: float | None
    qrr_C: float | None
    err_J: float | None
    didt_A_per_s: float | None
    vrm_V: float | None
    vr_V: float | None
    t_irrm_s: float | None
    t_trr_s: float | None
    t2_s: float | None
    flags: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """Numeric keys plus ``flags`` as a list (JSON-ready)."""
        data = asdict(self)
        data["flags"] = list(self.flags)
        return data

    @classmethod
    def metric_keys(cls) -> tuple[str, ...]:
        """The numeric keys, in field order."""
        return tuple(f.name for f in fields(cls) if f.name != "flags")


def analyze_recovery(
    t: np.ndarray | float | None,
    v: np.ndarray,
    i: np.ndarray,
    options: RecoveryOptions | None = None,
    *,
    dt: float | None = None,
    t_start: float = 0.0,
) -> RecoveryMetrics:
    """Find the diode's reverse-recovery event in a record and measure it.

    Parameters
    ----------
    t
        Sample times [s], strictly increasing, uniform or not (variable-step simulator
        output is resampled, see the module docstring); or the sample interval [s] as a
        scalar, with ``t_start``; or ``None`` with ``dt`` and ``t_start``.
    v
        Anode-to-cathode voltage [V].
    i
        Forward current [A], anode → cathode positive.
    options
        :class:`RecoveryOptions`; defaults per IEC 60747-2 / IEC 60747-9 practice.
    dt, t_start
        Sample interval and time of the first sample when ``t`` is None.

    Returns
    -------
    RecoveryMetrics
        Definitions in the module docstring; ``flags`` say what makes a value untrustworthy.

    Raises
    ------
    InputDataError
        Arrays of the wrong shape, too short, non-finite, or time not increasing.
    NoEventError
        No forward-current plateau followed by a current reversal in the record, or a
        current that looks reversed (a negative level held far longer than any positive).
    """
    opts = options or RecoveryOptions()
    v, i, timebase = validate_record(t, v, i, dt, t_start)
    if not timebase.uniform:
        return _analyze_nonuniform(timebase.t, v, i, opts)
    return _analyze_record(v, i, timebase, opts)


def _analyze_nonuniform(t: np.ndarray, v: np.ndarray, i: np.ndarray,
                        opts: RecoveryOptions) -> RecoveryMetrics:
    """Variable-step record (a circuit simulator's output): resampled onto a uniform grid.

    Event location and the crossings work on the grid (linear interpolation between the
    given points, as a simulator's own measurements do); where the grid is coarse for the
    recovery found, the record is analysed again on a finer one
    (:func:`benchrun.analysis.timebase.event_step`). Qrr and Err are then the exact
    trapezoidal integrals over the given points between t0 and t2. ``few_samples_in_ta``
    counts the given points; ``undersampled_recovery`` counts the grid's steps: the record
    is the piecewise-linear waveform its points define (a variable-step simulator places
    them by its local-truncation-error control, Nagel's SPICE2 (1975), from memory), so only
    the grid it is measured on can under-sample it (when the point budget caps the grid).
    """

    def on_grid(step: float) -> RecoveryMetrics:
        grid = t[0] + step * np.arange(math.floor((t[-1] - t[0]) / step) + 1, dtype=np.float64)
        v_u = np.interp(grid, t, np.asarray(v, dtype=np.float64))
        i_u = np.interp(grid, t, np.asarray(i, dtype=np.float64))
        return _analyze_record(v_u, i_u, TimeBase(None, step, float(t[0])), opts)

    step, _ = uniform_grid(t)
    m = on_grid(step)
    end = m.t_trr_s if m.t_trr_s is not None else m.t2_s
    if m.t0_s is not None and m.t_irrm_s is not None and end is not None:
        shortest = min(m.t_irrm_s - m.t0_s, end - m.t_irrm_s)
        fine = event_step(t, m.t_irrm_s, end, max(shortest, 0.0), step)
        if fine is not None:
            m = on_grid(fine)
    changes: dict[str, Any] = {}
    flags = [f for f in m.flags if f != FLAG_FEW_SAMPLES_TA]
    if m.t0_s is not None and m.t_irrm_s is not None:
        a, b = np.searchsorted(t, [m.t0_s, m.t_irrm_s])
        if b - a < MIN_SAMPLES_IN_TA:
            flags.append(FLAG_FEW_SAMPLES_TA)
    if m.qrr_C is not None and m.t0_s is not None and m.t2_s is not None:
        a = max(0, int(np.searchsorted(t, m.t0_s)) - 1)
        b = min(t.size, int(np.searchsorted(t, m.t2_s)) + 1)
        tw = t[a : b + 1]
        iw = np.asarray(i[a : b + 1], dtype=np.float64)
        vw = np.asarray(v[a : b + 1], dtype=np.float64)
        changes["qrr_C"] = -ev.integrate(tw, iw, m.t0_s, m.t2_s)
        changes["err_J"] = ev.integrate(tw, vw * iw, m.t0_s, m.t2_s)
    return replace(m, flags=tuple(flags), **changes)


def _analyze_record(v: np.ndarray, i: np.ndarray, timebase: TimeBase,
                    opts: RecoveryOptions) -> RecoveryMetrics:
    """Locate the commutation asked for and measure it."""
    scan = ev.scan_plateaus(i)
    plateaus = scan.plateaus
    if scan.reverse_area > REVERSED_AREA_RATIO * scan.area:
        raise NoEventError(
            f"the current looks reversed: it holds about {-scan.reverse_level:.4g} A far longer "
            "than any positive level (check the current probe's direction: forward current "
            "anode → cathode must be positive; or remove a large negative offset)"
        )
    if not plateaus:
        raise NoEventError(
            "no forward-current plateau in the record (is the current anode → cathode positive?)"
        )
    candidates = [p for p in plateaus if p.ends_in_record]
    if not candidates:
        raise NoEventError("the forward current never commutates before the record ends")
    wanted = opts.commutation if opts.commutation >= 0 else -opts.commutation - 1
    ordered = candidates if opts.commutation >= 0 else candidates[::-1]
    found = 0
    for plateau in ordered:
        metrics = _analyze_plateau_end(plateau, plateau.level, v, i, timebase, opts)
        if metrics is None:
            continue
        if found == wanted:
            return metrics
        found += 1
    if found:
        raise NoEventError(
            f"commutation {opts.commutation} requested but the record holds only {found}"
        )
    raise NoEventError("the forward current falls but never reverses: no recovery event")


_NEED_MORE = object()
_NEED_LOOKBACK = object()


def _analyze_plateau_end(plateau, level, v, i, timebase, opts) -> RecoveryMetrics | None:
    lookback = PLATEAU_LOOKBACK
    hard_stop = plateau.next_start
    span = INITIAL_SPAN + 4 * ev.coarse_step(i.size)
    while True:
        a = max(plateau.start, plateau.end - lookback)
        b = min(hard_stop, plateau.end + span)
        result = _measure_window(a, b, b < hard_stop, plateau, level, v, i, timebase, opts)
        if result is _NEED_LOOKBACK:
            lookback *= 4
        elif result is _NEED_MORE:
            span *= 4
        else:
            return result


def _odd(n: float) -> int:
    k = int(n)
    return k if k % 2 else k + 1


def _minimum(tw, x, s, s_pk, lo, hi, k_wide, width, width_pk, sigma, noisy):
    """Minimum of the raw samples ``x[lo:hi]``: ``(time, value, index)``.

    ``s`` is the wide locator (``width`` samples, robust on noise) and ``k_wide`` its
    minimum; ``s_pk`` a narrow one (``width_pk`` samples). The narrow locator looks near the
    wide minimum, so a rounded peak is measured by the fits of :func:`events.extremum`. A
    peak much narrower than the wide locator (a snap, or the voltage spike of a stray
    inductance) is flattened by it and may lose against a broader but shallower dip
    elsewhere; when the narrow locator's minimum over the whole range lies deeper than the
    one near ``k_wide`` by more than 4 of its noise sigmas, that sharp peak is the extremum;
    and a single raw sample more than 5 noise sigmas beyond the located value (a peak one or
    two samples wide, which both locators flatten) is taken as it is.
    """
    lo_pk, hi_pk = max(lo, k_wide - width), min(hi, k_wide + width + 1)
    k_pk = lo_pk + int(np.argmin(s_pk[lo_pk:hi_pk]))
    locators = [(s, k_wide, 2.0 * sigma, width // 2), (s_pk, k_pk, sigma, width_pk // 2)]
    if noisy and width > width_pk:
        k_sharp = lo + int(np.argmin(s_pk[lo:hi]))
        if s_pk[k_sharp] < s_pk[k_pk] - 4.0 * sigma / math.sqrt(width_pk):
            locators = [(s_pk, k_sharp, sigma, width_pk // 2)]
            k_wide = k_pk = k_sharp
    t_x, value = ev.extremum(tw, x, locators, sigma if noisy else 0.0,
                             width_pk // 2 if noisy else 1)
    if noisy:
        # a peak one or two samples wide is flattened even by the narrow locator; a raw
        # sample more than 5 noise sigmas beyond the located peak is that peak, not noise
        k_raw = lo + int(np.argmin(x[lo:hi]))
        if x[k_raw] < value - 5.0 * sigma:
            return float(tw[k_raw]), float(x[k_raw]), k_raw
    return t_x, value, min(k_wide, k_pk)


def _measure_window(a, b, can_grow, plateau, level, v, i, timebase, opts):
    tw = timebase.window(a, b)
    iw = np.asarray(i[a:b], dtype=np.float64)
    vw = np.asarray(v[a:b], dtype=np.float64)
    n = iw.size
    if opts.lowpass_hz is not None:
        dt_w = (tw[-1] - tw[0]) / (n - 1)
        iw = lowpass(iw, dt_w, opts.lowpass_hz)
        vw = lowpass(vw, dt_w, opts.lowpass_hz)
    flags: list[str] = []
    end_local = min(plateau.end - a, n)

    # Rough pass on the raw samples: where the current leaves the plateau and crosses zero.
    cut = a > plateau.start  # the window starts inside the plateau
    k_half = ev.last_above(iw, 0.5 * level, 0, end_local)
    if k_half is None:
        return _NEED_LOOKBACK if cut else None
    k_zero = ev.first_at_or_below(iw, 0.0, k_half, n)
    if k_zero is None:
        return _NEED_MORE if can_grow else None
    fall = max(1, k_zero - k_half)

    # Plateau just before the fall: IF and the noise level of both channels.
    p_end = k_half - 2 * fall - 2
    p_len = int(min(max(20 * fall, 64), 20_000))
    if cut and p_end < p_len:
        return _NEED_LOOKBACK  # a slow fall: look further back for the plateau
    # stay on the plateau: skip its first quarter (turn-off ringing) and what precedes it
    start_local = max(0, plateau.start - a)
    p_start = max(p_end - p_len, start_local + max(0, p_end - start_local) // 4)
    if p_end - p_start < 8:
        flags.append(FLAG_SHORT_PLATEAU)
        p_start, p_end = 0, max(1, k_half - fall // 2)
    i_if = float(np.median(iw[p_start:p_end]))
    sigma = ev.robust_sigma(iw[p_start:p_end])
    sigma_v = ev.robust_sigma(vw[p_start:p_end])
    if not i_if > 0:
        return None
    noisy = sigma > 1e-6 * i_if
    width = min(_odd(fall / 10), 31) if noisy else 1
    s = ev.moving_average(iw, width)
    sigma_s = sigma / math.sqrt(width) if noisy else 0.0

    # Refined fall: last locator sample above 0.5·IF before the first zero crossing.
    k0 = ev.first_at_or_below(s, 0.0, k_half, n)
    if k0 is None:
        return _NEED_MORE if can_grow else None
    k_half = ev.last_above(s, 0.5 * i_if, 0, k0)
    if k_half is None:
        return None
    k0 = ev.first_at_or_below(s, 0.0, k_half, n)
    band_if = min(2.0 * sigma, 0.1 * i_if) if noisy else 0.0
    t_a, _ = ev.crossing_time(tw, iw, s, k_half + 1, 0.5 * i_if, band_if)
    t0, slope_t0 = ev.crossing_time(tw, iw, s, k0, 0.0, band_if)

    # The reverse-current minimum.
    k_min = k0 + int(np.argmin(s[k0:]))
    if s[k_min] > -max(4.0 * sigma_s, 1e-3 * i_if):
        return _NEED_MORE if can_grow else None
    if k_min >= n - 2 - width and can_grow:
        return _NEED_MORE
    # The peak may be much sharper than the fall (a snap): see _minimum.
    width_pk = min(width, PEAK_LOCATOR_WIDTH)
    s_pk = ev.moving_average(iw, width_pk)
    t_irrm, i_min, k_min = _minimum(tw, iw, s, s_pk, k0, n, k_min, width, width_pk,
                                    sigma, noisy)
    irrm = -i_min
    if not irrm > 0:
        return None
    dt_local = (tw[-1] - tw[0]) / (n - 1)
    if noisy and irrm < 10.0 * sigma:
        flags.append(FLAG_LOW_SNR)

    # Rising crossings after the minimum. The recovery after the peak may be far faster than
    # the forward-current fall (a snap), so the locator width here follows the rise time.
    band_r = min(2.0 * sigma, 0.05 * irrm) if noisy else 0.0
    band_end = min(2.0 * sigma, 0.5 * opts.integration_end_fraction * irrm) if noisy else 0.0
    k_rise = ev.first_at_or_above(s_pk, -0.5 * irrm, k_min, n)
    rise = (k_rise - k_min) if k_rise is not None else n - k_min
    width_r = min(width, _odd(rise / 4))
    s_r = ev.moving_average(iw, width_r) if width_r != width else s
    k_tail = ev.first_at_or_above(s_r, -opts.fit_low * irrm, k_min, n)
    tail = (k_tail - k_min) if k_tail is not None else n - k_min
    width_end = min(width, _odd(tail / 4))
    s_end = ev.moving_average(iw, width_end) if width_end != width else s

    def rising(fraction: float, band: float, loc: np.ndarray = s_r) -> float | None:
        k = ev.first_at_or_above(loc, -fraction * irrm, k_min, n)
        if k is None or k == 0:
            return None
        return ev.crossing_time(tw, iw, loc, k, -fraction * irrm, band)[0]

    t2 = rising(opts.integration_end_fraction, band_end, s_end)
    if t2 is None and can_grow:
        return _NEED_MORE
    t_trr = None
    if opts.trr_method == "extrapolate":
        t_hi = rising(opts.fit_high, band_r)
        t_lo = rising(opts.fit_low, band_r)
        if t_hi is None or t_lo is None:
            flags.append(FLAG_TRR_NOT_FOUND)
        elif t_lo < t_hi:
            flags.append(FLAG_TRR_LINE)
        else:
            t_trr = t_lo + (t_lo - t_hi) * opts.fit_low / (opts.fit_high - opts.fit_low)
    else:
        t_trr = rising(opts.trr_threshold_fraction, band_r)
        if t_trr is None:
            flags.append(FLAG_TRR_NOT_FOUND)

    ta = t_irrm - t0
    trr = t_trr - t0 if t_trr is not None else None
    tb = trr - ta if trr is not None else None
    softness = tb / ta if tb is not None and ta > 0 else None
    if ta < MIN_SAMPLES_IN_TA * dt_local:
        flags.append(FLAG_FEW_SAMPLES_TA)
    # ta, tb, trr spanning too few samples to be resolved (benchrun.analysis.resolution)
    sampling = undersampled_flag(recovery_spans(t0, t_irrm, t_trr, dt_local))
    if sampling is not None:
        flags.append(sampling)

    # di/dt between +0.5·IF and -0.5·Irrm.
    didt = None
    kb = ev.first_at_or_below(s, -0.5 * irrm, k0, k_min + 1)
    if kb is not None and kb > 0:
        t_b, _ = ev.crossing_time(tw, iw, s, kb, -0.5 * irrm, band_r)
        if t_b > t_a:
            didt = (0.5 * i_if + 0.5 * irrm) / (t_b - t_a)

    # Softness factor: slope at t0 over the steepest slope after the minimum.
    rrsf = None
    k_stop = np.searchsorted(tw, t2) if t2 is not None else n
    h = max(1, width_r // 2)
    if k_stop - k_min > 2 * h:
        seg = slice(k_min, int(k_stop))
        lo = np.arange(seg.start, seg.stop) - h
        hi = np.arange(seg.start, seg.stop) + h
        ok = (lo >= 0) & (hi < n)
        lo, hi = lo[ok], hi[ok]
        if lo.size:
            slopes = (s_r[hi] - s_r[lo]) / (tw[hi] - tw[lo])
            steepest = float(slopes.max())
            if steepest > 0 and slope_t0 != 0.0:
                rrsf = abs(slope_t0) / steepest
    if rrsf is None:
        flags.append(FLAG_RRSF)

    # Charge and energy to t2.
    qrr = err = None
    if t2 is None:
        flags.append(FLAG_INCOMPLETE)
    else:
        qrr = -ev.integrate(tw, iw, t0, t2)
        err = ev.integrate(tw, vw * iw, t0, t2)

    # Peak and steady reverse voltage.
    t_last = float(tw[-1])
    t_ref = t2 if t2 is not None else t_irrm
    t_vrm_end = t_ref + (trr if trr is not None else max(t_ref - t0, 0.0))
    vr_span = max(5.0 * (t_ref - t0), 32 * dt_local)
    if t_vrm_end + vr_span > t_last and can_grow:
        return _NEED_MORE
    if t_vrm_end > t_last or t2 is None:
        flags.append(FLAG_NEAR_END)
    noisy_v = sigma_v > 1e-9 * max(1.0, float(np.max(np.abs(vw))))
    width_v = width if noisy_v else 1
    k_v0 = int(np.searchsorted(tw, t0))
    k_v1 = int(np.searchsorted(tw, t_vrm_end, side="right"))
    vrm = None
    if k_v1 > k_v0:
        sv = ev.moving_average(vw, width_v)
        k_vmin = k_v0 + int(np.argmin(sv[k_v0:k_v1]))
        width_vpk = min(width_v, PEAK_LOCATOR_WIDTH)
        sv_pk = ev.moving_average(vw, width_vpk)
        vrm = -_minimum(tw, vw, sv, sv_pk, k_v0, k_v1, k_vmin, width_v, width_vpk,
                        sigma_v, noisy_v)[1]
    k_r1 = int(np.searchsorted(tw, t_vrm_end + vr_span, side="right"))
    vr = None
    if k_r1 - k_v1 >= 8:
        vr = float(-np.median(vw[k_v1:k_r1]))
    else:
        flags.append(FLAG_VR)
        if FLAG_NEAR_END not in flags:
            flags.append(FLAG_NEAR_END)

    return RecoveryMetrics(
        if_A=i_if,
        t0_s=t0,
        irrm_A=irrm,
        ta_s=ta,
        tb_s=tb,
        trr_s=trr,
        softness=softness,
        rrsf=rrsf,
        qrr_C=qrr,
        err_J=err,
        didt_A_per_s=didt,
        vrm_V=vrm,
        vr_V=vr,
        t_irrm_s=t_irrm,
        t_trr_s=t_trr,
        t2_s=t2,
        flags=tuple(flags),
    )
