"""Event location in a whole double-pulse record, and the local estimators used around it.

A double-pulse capture of the freewheeling diode's current looks like this (anode → cathode
positive)::

    first pulse   | switch off: freewheel |  second turn-on: recovery  | second pulse ...
    i ≈ 0         | i ≈ +IF (plateau)     |  i falls through 0 to -Irrm, returns to 0

The commutations worth analysing are the *ends of forward-current plateaus* after which the
current reverses. :func:`find_plateaus` finds the plateaus on a coarse, strided view of the
record (no full-length float copy), with hysteresis on fractions of the plateau level and a
three-sample erosion/dilation so single-sample spikes neither start nor end a plateau. The
detailed measurement (:mod:`benchrun.analysis.recovery`) then works only on a window around
the chosen event.

The local estimators below share one idea: a light centred moving average is used only to
*locate* a crossing or an extremum robustly on noisy data; the value is then *measured* on the
raw samples (a least-squares line through the samples inside the noise band of a crossing, or
a least-squares parabola through the samples inside the noise band of an extremum). On clean
data (noise estimate zero) the estimators reduce to plain linear interpolation and the plain
sample extremum, i.e. exactly the textbook definitions.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Coarse pass length: records longer than this are examined on a strided view first.
COARSE_TARGET = 131_072
#: Hysteresis thresholds as fractions of the coarse plateau level (common practice).
ENTER_FRACTION = 0.3
LEAVE_FRACTION = 0.15
#: Runs above the hysteresis holding less than this fraction of the largest run's charge
#: (median level × duration) are ringing lobes or spikes, not a freewheel interval (common
#: practice).
MIN_PLATEAU_FRACTION = 0.2
#: Cap on the samples searched on either side of a crossing or extremum band.
BAND_CAP = 4096
#: Cap on the samples either side of a crossing used for its least-squares line.
CROSSING_CAP = 64
#: √12: a reading quantised to steps δ has standard uncertainty δ/√12 (GUM F.2.2.1).
SQRT12 = math.sqrt(12.0)


@dataclass(frozen=True)
class Plateau:
    """A forward-current plateau found by the coarse pass (indices into the full record).

    Attributes
    ----------
    start, end
        First sample of the plateau and first sample after it (where the current has left it).
    next_start
        Start of the following plateau, or the record length.
    ends_in_record
        False when the plateau runs to the end of the record (no commutation follows).
    level
        Coarse level of this plateau (median of its coarse samples).
    """

    start: int
    end: int
    next_start: int
    ends_in_record: bool
    level: float


def _erode3(x: np.ndarray) -> np.ndarray:
    out = x.copy()
    if x.size >= 3:
        np.minimum(out[1:-1], x[:-2], out=out[1:-1])
        np.minimum(out[1:-1], x[2:], out=out[1:-1])
    return out


def _dilate3(x: np.ndarray) -> np.ndarray:
    out = x.copy()
    if x.size >= 3:
        np.maximum(out[1:-1], x[:-2], out=out[1:-1])
        np.maximum(out[1:-1], x[2:], out=out[1:-1])
    return out


def coarse_step(n: int) -> int:
    """Stride of the coarse pass for a record of ``n`` samples."""
    return max(1, n // COARSE_TARGET)


def held_level(coarse: np.ndarray) -> tuple[float, float]:
    """Level the signal holds longest: the tallest-by-widest rectangle under the curve.

    For block sizes 1, 2, 4, ... coarse samples the signal is min-pooled (after a
    three-sample erosion, so single-sample spikes do not count); the largest block minimum
    times the block size is the "charge" of the best rectangle of that width. The level of
    the best rectangle over all sizes is returned with its area (level × samples).

    A freewheel plateau wins over ringing lobes or a reverse-recovery peak that are taller
    but far shorter (the plateau's charge IF·t exceeds them), and over a small offset held
    for long (common practice; no published source).
    """
    m = _erode3(coarse)
    best_area, best_level = 0.0, 0.0
    size = 1
    while m.size:
        level = float(m.max())
        if level > 0.0 and level * size > best_area:
            best_area, best_level = level * size, level
        if m.size < 2:
            break
        half = m.size // 2
        m = np.minimum(m[0 : 2 * half : 2], m[1 : 2 * half : 2])
        size *= 2
    return best_level, best_area


@dataclass(frozen=True)
class PlateauScan:
    """Result of :func:`scan_plateaus`.

    Attributes
    ----------
    plateaus
        Forward-current plateaus in time order.
    level
        Held level of the record (see :func:`held_level`), the reference of the hysteresis.
    step
        Coarse stride.
    area, reverse_area, reverse_level
        Held-level areas (level × coarse samples) of the current and of the negated current,
        and the negated current's held level: a reversed current probe shows a reverse
        plateau that dominates.
    """

    plateaus: list[Plateau]
    level: float
    step: int
    area: float
    reverse_area: float
    reverse_level: float


def scan_plateaus(i: np.ndarray) -> PlateauScan:
    """Find the forward-current plateaus of a record (see :func:`find_plateaus`)."""
    n = i.size
    step = coarse_step(n)
    coarse = np.ascontiguousarray(i[::step], dtype=np.float64)
    level, area = held_level(coarse)
    reverse_level, reverse_area = held_level(-coarse)

    def result(plateaus: list[Plateau]) -> PlateauScan:
        return PlateauScan(plateaus, level, step, area, reverse_area, reverse_level)

    if not level > 0.0:
        return result([])
    low_env = _erode3(coarse)
    high_env = _dilate3(coarse)
    enter = low_env > ENTER_FRACTION * level
    leave = high_env < LEAVE_FRACTION * level
    idx = np.arange(coarse.size)
    last_enter = np.maximum.accumulate(np.where(enter, idx, -1))
    last_leave = np.maximum.accumulate(np.where(leave, idx, -1))
    state = last_enter > last_leave
    edges = np.flatnonzero(np.diff(state.astype(np.int8)))
    starts = list(edges[state[edges + 1]] + 1)
    ends = list(edges[~state[edges + 1]] + 1)
    if state[0]:
        starts.insert(0, 0)
    if state[-1]:
        ends.append(coarse.size)
    runs = [(s, e, float(np.median(coarse[s:e]))) for s, e in zip(starts, ends, strict=True)]
    if not runs:
        return result([])
    # a plateau carries a sizeable part of the largest plateau's charge (level × duration);
    # ringing lobes and spikes above the hysteresis thresholds do not
    # the reference is the largest run complete in the record: a run cut by the record's
    # start or end (a long capture after the second pulse freewheels again to its end) may
    # hold any charge and would hide the freewheel plateau of the commutation
    complete = [lv * (e - s) for s, e, lv in runs if s > 0 and e < coarse.size]
    largest = max(complete) if complete else max(lv * (e - s) for s, e, lv in runs)
    runs = [(s, e, lv) for s, e, lv in runs
            if e - s >= 1 and lv * (e - s) >= MIN_PLATEAU_FRACTION * largest]
    plateaus = []
    for k, (s, e, lv) in enumerate(runs):
        nxt = runs[k + 1][0] * step if k + 1 < len(runs) else n
        plateaus.append(
            Plateau(
                start=int(s * step),
                end=int(min(e * step, n)),
                next_start=int(nxt),
                ends_in_record=bool(e < coarse.size),
                level=lv,
            )
        )
    return result(plateaus)


def find_plateaus(i: np.ndarray) -> tuple[list[Plateau], float, int]:
    """Find the forward-current plateaus of a record.

    Parameters
    ----------
    i
        Diode current, anode → cathode positive (any float dtype; not copied in full).

    Returns
    -------
    plateaus, level, step
        The plateaus in time order, the held level of the record (:func:`held_level`) and
        the coarse stride used. Runs above the hysteresis whose charge (median × duration)
        is below :data:`MIN_PLATEAU_FRACTION` of the largest run's are ringing, not plateaus.
    """
    scan = scan_plateaus(i)
    return scan.plateaus, scan.level, scan.step


def moving_average(x: np.ndarray, width: int) -> np.ndarray:
    """Centred moving average over ``width`` (odd) samples, edges padded with the end values."""
    if width <= 1 or x.size < 2:
        return x
    half = width // 2
    padded = np.pad(x, half, mode="edge")
    csum = np.concatenate(([0.0], np.cumsum(padded)))
    return (csum[width:] - csum[:-width]) / width


def first_at_or_below(s: np.ndarray, level: float, start: int, stop: int) -> int | None:
    """First index in ``[start, stop)`` with ``s <= level``, or None."""
    if start >= stop:
        return None
    hits = np.flatnonzero(s[start:stop] <= level)
    return int(start + hits[0]) if hits.size else None


def first_at_or_above(s: np.ndarray, level: float, start: int, stop: int) -> int | None:
    """First index in ``[start, stop)`` with ``s >= level``, or None."""
    if start >= stop:
        return None
    hits = np.flatnonzero(s[start:stop] >= level)
    return int(start + hits[0]) if hits.size else None


def first_held_at_or_above(s: np.ndarray, level: float, start: int, stop: int,
                           hold: int = 1) -> int | None:
    """First index in ``[start, stop)`` from which ``s >= level`` holds for ``hold``
    consecutive samples (fewer where the range ends first), or None."""
    if hold <= 1:
        return first_at_or_above(s, level, start, stop)
    if start >= stop:
        return None
    above = (s[start:stop] >= level).astype(np.int32)
    csum = np.concatenate(([0], np.cumsum(above)))
    idx = np.arange(above.size)
    end = np.minimum(idx + hold, above.size)
    hits = np.flatnonzero(above.astype(bool) & (csum[end] - csum[idx] == end - idx))
    return int(start + hits[0]) if hits.size else None


def last_above(s: np.ndarray, level: float, start: int, stop: int) -> int | None:
    """Last index in ``[start, stop)`` with ``s > level``, or None."""
    if start >= stop:
        return None
    hits = np.flatnonzero(s[start:stop] > level)
    return int(start + hits[-1]) if hits.size else None


def _band_extent(s: np.ndarray, centre_lo: int, centre_hi: int, inside) -> tuple[int, int]:
    """Grow ``[centre_lo, centre_hi]`` while ``inside(s[k])`` holds (capped at BAND_CAP)."""
    lo_start = max(0, centre_lo - BAND_CAP)
    left = s[lo_start:centre_lo]
    out_left = np.flatnonzero(~inside(left))
    lo = lo_start + int(out_left[-1]) + 1 if out_left.size else lo_start
    hi_stop = min(s.size, centre_hi + 1 + BAND_CAP)
    right = s[centre_hi + 1 : hi_stop]
    out_right = np.flatnonzero(~inside(right))
    hi = centre_hi + int(out_right[0]) if out_right.size else hi_stop - 1
    return lo, hi


def crossing_time(
    t: np.ndarray, x: np.ndarray, s: np.ndarray, k: int, level: float, band: float
) -> tuple[float, float]:
    """Time at which the signal passes ``level`` between samples ``k-1`` and ``k``.

    Parameters
    ----------
    t, x, s
        Time, raw samples and the locator (smoothed) samples of the same window.
    k
        Index where the locator has just passed ``level`` (``s[k-1]`` and ``s[k]`` on
        opposite sides, or ``s[k] == level``).
    level
        The level crossed.
    band
        Noise band: samples whose locator value lies within ``level ± band`` around ``k`` are
        used for a least-squares line through the *raw* samples. ``band <= 0`` (clean data)
        gives plain linear interpolation.

    Returns
    -------
    time, slope
        Crossing instant and the local slope dx/dt there.
    """
    tc, slope, _ = crossing_fit(t, x, s, k, level, band)
    return tc, slope


def crossing_fit(
    t: np.ndarray, x: np.ndarray, s: np.ndarray, k: int, level: float, band: float
) -> tuple[float, float, int]:
    """:func:`crossing_time` with the number of raw samples behind the estimate.

    Returns ``(time, slope, count)``: ``count`` is the number of samples of the least-squares
    line, or 0 for plain interpolation. With white noise of standard deviation σ the instant's
    standard uncertainty is ``σ / (|slope|·√count)`` (the line's value at the centre of its
    samples has variance σ²/count, converted to time by the slope; the crossing lies close to
    that centre) — :mod:`benchrun.analysis.capture_uncertainty`.
    """
    k = int(min(max(k, 1), x.size - 1))
    if band > 0.0:
        lo, hi = _band_extent(s, k - 1, k, lambda y: np.abs(y - level) <= band)
        lo, hi = max(lo, k - 1 - CROSSING_CAP), min(hi, k + CROSSING_CAP)
        if hi - lo + 1 >= 4:
            tt = t[lo : hi + 1]
            t_mid = 0.5 * (tt[0] + tt[-1])
            slope, intercept = np.polyfit(tt - t_mid, x[lo : hi + 1], 1)
            if slope != 0.0:
                tc = t_mid + (level - intercept) / slope
                if tt[0] - (t[k] - t[k - 1]) <= tc <= tt[-1] + (t[k] - t[k - 1]):
                    return float(tc), float(slope), int(hi - lo + 1)
    y0, y1 = s[k - 1], s[k]
    t0, t1 = t[k - 1], t[k]
    if y1 == y0:
        return float(t1), 0.0, 0
    frac = (level - y0) / (y1 - y0)
    frac = min(max(frac, 0.0), 1.0)
    return float(t0 + frac * (t1 - t0)), float((y1 - y0) / (t1 - t0)), 0


def extremum(
    t: np.ndarray,
    x: np.ndarray,
    locators: list[tuple[np.ndarray, int, float, int]],
    sigma: float,
    half_width: int,
) -> tuple[float, float]:
    """Minimum of the raw signal (negate inputs for a maximum).

    Parameters
    ----------
    t, x
        Time and raw samples.
    locators
        ``(s, k, band, smear)``, widest locator first: a locator signal, the index of its
        minimum, a band height and the locator's half-width in samples. For each, a
        least-squares cubic (a parabola with room for an asymmetric peak) is fitted through
        the raw samples whose locator value lies within ``s[k] + band``. The first fit that
        explains the data to within the noise (residual variance at most
        σ²·(1 + 3·√(2/dof)), a chi-square check), has an interior minimum and rises by at
        least a quarter of the band towards the region's edges gives the estimate. This is
        unbiased by noise for a rounded peak; a sharp (snapping) peak that no such fit
        explains falls through to the next locator.
    sigma
        Noise standard deviation; ``0`` (clean data) skips the fits.
    half_width
        When no fit is accepted: on noisy data the median of the raw samples within
        ``half_width`` of the last locator's minimum (a median does not pick the noisiest
        sample, and ignores the one sample a snap puts on the steep side) unless the smallest
        raw sample there lies more than 4 sigma below that median (a peak only a sample or two
        wide); on clean data the smallest raw sample there.

    Returns
    -------
    time, value
    """
    tx, value, _, _ = extremum_fit(t, x, locators, sigma, half_width)
    return tx, value


def extremum_fit(
    t: np.ndarray,
    x: np.ndarray,
    locators: list[tuple[np.ndarray, int, float, int]],
    sigma: float,
    half_width: int,
) -> tuple[float, float, float, float]:
    """:func:`extremum` with the standard uncertainties of its value and instant.

    Returns ``(time, value, u_value, u_time)`` from white noise σ: for an accepted cubic fit
    the least-squares covariance σ²·(XᵀX)⁻¹ propagated to the fitted value and (through
    ``δu* = −δp'(u*)/p''(u*)``) to the stationary point, with the fit's model error in the
    value (the residual variance beyond the noise, and a rectangular bound as wide as the
    distance from the fitted peak to the most extreme raw sample of the fit region, GUM
    4.3.7); for the median of ``m`` samples
    ``1.2533·σ/√m`` (the median's efficiency for normal data) and the locator's half-width as a
    rectangular bound on the instant; for a single raw sample σ and ``Δt/√12``. Clean data:
    value 0, instant ``Δt/√12``.
    """
    dt_local = float(t[1] - t[0]) if t.size > 1 else 0.0
    for s, k, band, smear in locators if sigma > 0.0 else ():
        floor = s[k] + band
        lo, hi = _band_extent(s, k, k, lambda y, f=floor: y <= f)
        # a moving average shifts an asymmetric peak: widen by the locator's half-width
        lo, hi = max(0, lo - smear), min(x.size - 1, hi + smear)
        count = hi - lo + 1
        if count < 7:
            continue
        tt = t[lo : hi + 1]
        t_mid = 0.5 * (tt[0] + tt[-1])
        t_half = 0.5 * (tt[-1] - tt[0])
        u = (tt - t_mid) / t_half
        coef, resid, *_ = np.polyfit(u, x[lo : hi + 1], 3, full=True)
        dof = count - 4
        rss = float(resid[0]) if resid.size else 0.0
        if rss / dof > sigma * sigma * (1.0 + 3.0 * math.sqrt(2.0 / dof)):
            continue
        stationary = np.roots(np.polyder(coef))
        stationary = stationary[np.isreal(stationary)].real
        stationary = stationary[(stationary > -1.0) & (stationary < 1.0)]
        if stationary.size == 0:
            continue
        values = np.polyval(coef, stationary)
        j = int(np.argmin(values))
        uv, xv = float(stationary[j]), float(values[j])
        # a genuine peak rises by about the band at the region's edges; a near-flat fit means
        # the band caught a plateau with a small bump on it, which a fit cannot locate
        rise = min(np.polyval(coef, -1.0), np.polyval(coef, 1.0)) - xv
        curvature = np.polyval(np.polyder(coef, 2), uv)
        if curvature > 0.0 and rise >= 0.25 * band:
            design = np.vander(u, 4)
            cov = sigma * sigma * np.linalg.pinv(design.T @ design)
            xvec = np.array([uv**3, uv**2, uv, 1.0])
            dvec = np.array([3.0 * uv**2, 2.0 * uv, 1.0, 0.0])
            # residual variance beyond the noise: the cubic does not quite describe the peak
            # (a corner); its size bounds the model error of the value, and the instant moves
            # by as much as the fitted peak is that flat
            excess = math.sqrt(max(rss / dof - sigma * sigma, 0.0))
            # model error of the cubic at a sharp-cornered peak (the ramp meeting the tail):
            # a smooth fit rounds the corner off and under-reads it by up to the distance to
            # the most extreme raw sample of the region; that distance is taken as the
            # half-width of a rectangular bound (GUM 4.3.7: u = a/√3)
            model = max(xv - float(np.min(x[lo : hi + 1])), 0.0) / math.sqrt(3.0)
            u_value = math.hypot(math.sqrt(max(float(xvec @ cov @ xvec), 0.0)), excess, model)
            u_time = math.hypot(math.sqrt(max(float(dvec @ cov @ dvec), 0.0)) / curvature,
                                math.sqrt(2.0 * excess / curvature)) * t_half
            return float(t_mid + uv * t_half), xv, u_value, math.hypot(u_time,
                                                                       dt_local / SQRT12)
    s, k, _, _ = locators[-1]
    if sigma > 0.0 and half_width > 0:
        # median of the samples under the narrow locator: no selection of the noisiest sample;
        # but a peak narrower than the locator (one or two samples of a snap) that stands
        # out of that median by more than 4 sigma is signal, not noise: its raw sample counts
        lo = max(0, k - half_width)
        hi = min(x.size, k + half_width + 1)
        j = lo + int(np.argmin(x[lo:hi]))
        median = float(np.median(x[lo:hi]))
        if x[j] < median - 4.0 * sigma:
            return float(t[j]), float(x[j]), sigma, dt_local / SQRT12
        return (float(t[k]), median, 1.2533 * sigma / math.sqrt(hi - lo),
                max(half_width, 0.5) * dt_local / math.sqrt(3.0))
    lo = max(0, k - half_width)
    hi = min(x.size, k + half_width + 1)
    j = lo + int(np.argmin(x[lo:hi]))
    return float(t[j]), float(x[j]), 0.0, dt_local / SQRT12


def integrate(t: np.ndarray, y: np.ndarray, t_from: float, t_to: float) -> float:
    """Trapezoidal integral of the sampled ``y(t)`` from ``t_from`` to ``t_to``.

    The end points are linearly interpolated, so the result does not depend on where the
    limits fall between samples.
    """
    if t_to <= t_from:
        return 0.0
    a = int(np.searchsorted(t, t_from, side="right"))
    b = int(np.searchsorted(t, t_to, side="left"))
    y_from = float(np.interp(t_from, t, y))
    y_to = float(np.interp(t_to, t, y))
    tt = np.concatenate(([t_from], t[a:b], [t_to]))
    yy = np.concatenate(([y_from], y[a:b], [y_to]))
    return float(np.sum((yy[1:] + yy[:-1]) * np.diff(tt)) * 0.5)


def level_of(x: np.ndarray, sigma: float) -> float:
    """Level of a plateau: the mean of the samples within 4σ of their median.

    Unlike the median it is not pulled to an ADC code on quantised, noisy data (the noise
    dithers the codes; the mean of dithered codes is unbiased), and spikes beyond 4σ do not
    count (common practice). With σ = 0 it is the median.
    """
    x = np.asarray(x, dtype=np.float64)
    median = float(np.median(x))
    if sigma <= 0.0 or x.size < 8:
        return median
    kept = x[np.abs(x - median) <= 4.0 * sigma]
    return float(kept.mean()) if kept.size else median


#: Width of the moving average a plateau is detrended with before its noise is measured.
NOISE_DETREND_WIDTH = 15


def robust_sigma(x: np.ndarray) -> float:
    """Noise standard deviation of a plateau.

    The plateau is detrended by a centred moving average over :data:`NOISE_DETREND_WIDTH`
    samples, which removes its level, a droop, and ringing or ripple much slower than the
    average (a decaying turn-off oscillation is signal, not noise). The residuals are screened
    at 4 sigmas (the larger of the MAD estimate, Hampel's, and an iteratively clipped standard
    deviation; common practice) and the standard deviation of those kept is returned, scaled
    for the part of white noise the average itself takes out. Rare spikes are dropped, and
    unlike the MAD alone the estimate is not stuck to multiples of the ADC step on quantised
    data where most residuals sit near one code. Short stretches fall back to the residuals
    of a straight line.
    """
    if x.size < 8:
        return 0.0
    x = np.asarray(x, dtype=np.float64)
    w = NOISE_DETREND_WIDTH
    if x.size >= w + 8:
        csum = np.concatenate(([0.0], np.cumsum(x)))
        mean = (csum[w:] - csum[:-w]) / w
        resid = x[w // 2 : w // 2 + mean.size] - mean
        gain = math.sqrt(1.0 - 1.0 / w)  # residual std of white noise after the average
    else:
        k = np.arange(x.size, dtype=np.float64)
        slope, intercept = np.polyfit(k, x, 1)
        resid = x - (slope * k + intercept)
        gain = 1.0
    centre = float(np.median(resid))
    dev = np.abs(resid - centre)
    mad_sigma = 1.4826 * float(np.median(dev))
    # On quantised data with little noise most residuals sit near one code and the MAD
    # understates the spread; a standard deviation clipped iteratively at 4 sigma does not,
    # and still drops rare spikes. The larger of the two is kept.
    spread = float(np.std(resid))
    for _ in range(4):
        kept = resid[dev <= 4.0 * spread]
        if kept.size < 8:
            break
        spread = float(np.std(kept))
    spread = max(spread, mad_sigma)
    kept = resid[dev <= 4.0 * spread]
    sigma = float(np.std(kept)) if kept.size >= 8 else spread
    return sigma / gain
