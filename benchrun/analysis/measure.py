"""The measurement of one commutation (a window of the record around it).

:func:`measure_plateau_end` grows a window around the end of a forward-current plateau until
the recovery event is complete, zeroes the channels (:mod:`benchrun.analysis.baseline`),
measures every metric (definitions in :mod:`benchrun.analysis.recovery`), their capture
uncertainties (:mod:`benchrun.analysis.capture_uncertainty`) and the quality flags
(:mod:`benchrun.analysis.quality`). Returns the keyword arguments of ``RecoveryMetrics``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from benchrun.analysis import baseline as bl
from benchrun.analysis import events as ev
from benchrun.analysis import quality as qa
from benchrun.analysis.capture_uncertainty import (
    crossing_u,
    finite_u,
    rss,
    softness_u,
)
from benchrun.analysis.conditioning import lowpass
from benchrun.analysis.conventions import Convention
from benchrun.analysis.flags import (
    FLAG_END_IN_NOISE,
    FLAG_FEW_SAMPLES_TA,
    FLAG_INCOMPLETE,
    FLAG_LOW_SNR,
    FLAG_NEAR_END,
    FLAG_RRSF,
    FLAG_SHORT_PLATEAU,
    FLAG_TRR_LINE,
    FLAG_TRR_NOT_FOUND,
    FLAG_VR,
)
from benchrun.analysis.resolution import recovery_spans, undersampled_flag
from benchrun.errors import NoEventError

#: Samples looked back before the end of the plateau (enough for the fall and a plateau).
PLATEAU_LOOKBACK = 60_000
#: First span after the plateau examined; grown by 4× until the event is complete.
INITIAL_SPAN = 16_384
#: Fewer samples than this across ta make Irrm and ta unreliable (common practice).
MIN_SAMPLES_IN_TA = 10
#: Locator width (samples) used to pin down the reverse-current peak on noisy data.
PEAK_LOCATOR_WIDTH = 5
#: The slope at t0 is the least-squares line through the raw samples between the falling
#: crossings of ``±T0_SLOPE_BAND·min(IF, Irrm)``: JEDEC's "diRR/dt when the current is passing
#: through zero" (JESD282-B, RRSF), the same window as the runner's di/dt condition
#: (:func:`benchrun.runner.didt.commutation_didt`). Symmetric about zero it reads the tangent
#: there; half of min(IF, Irrm) keeps it clear of the reverse peak and holds enough samples at
#: low current (band and window ours, common practice).
T0_SLOPE_BAND = 0.5

#: The forward plateau must exceed this many noise sigmas, else the record is refused as noise
#: (common practice).
MIN_PLATEAU_SNR = 3.0

#: The integration end level f·Irrm below this many current noise sigmas flags
#: ``end_in_noise`` (common practice).
END_NOISE_MULTIPLE = 3.0

_NEED_MORE = object()
_NEED_LOOKBACK = object()


def measure_plateau_end(plateau, v, i, timebase, opts, zeros) -> dict | None:
    """Measure the commutation at the end of ``plateau`` (None: no recovery there).

    ``zeros`` is :func:`benchrun.analysis.baseline.zeros`'s result; when it holds no current
    zero, the quiet window after the event gives it and the window is measured again.
    """
    lookback = PLATEAU_LOOKBACK
    hard_stop = plateau.next_start
    span = INITIAL_SPAN + 4 * ev.coarse_step(i.size)
    while True:
        a = max(plateau.start, plateau.end - lookback)
        b = min(hard_stop, plateau.end + span)
        result = _measure_window(a, b, b < hard_stop, plateau, plateau.level, v, i, timebase,
                                 opts, zeros)
        if result is _NEED_LOOKBACK:
            lookback *= 4
        elif result is _NEED_MORE:
            span *= 4
        else:
            break
    if result is None:
        return None
    values, quiet = result
    if zeros[0] is None and quiet is not None and (
            values["if_A"] < MIN_PLATEAU_SNR * quiet.sigma):
        raise NoEventError(
            f"no forward-current plateau stands out of the noise: the level found "
            f"({values['if_A']:.4g} A) is under {MIN_PLATEAU_SNR:g} times the noise after it "
            f"({quiet.sigma:.4g} A rms) (is this channel the diode current?)"
        )
    if zeros[0] is None and quiet is not None:
        again = _measure_window(a, b, False, plateau, plateau.level, v, i, timebase, opts,
                                (quiet, bl.RULE_QUIET, zeros[2], zeros[3]))
        if again is not None and again is not _NEED_MORE and again is not _NEED_LOOKBACK:
            values = again[0]
    return values


def _odd(n: float) -> int:
    k = int(n)
    return k if k % 2 else k + 1


def _minimum(tw, x, s, s_pk, lo, hi, k_wide, width, width_pk, sigma, noisy):
    """Minimum of the raw samples ``x[lo:hi]``: ``(time, value, index, u_value, u_time)``.

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
    t_x, value, u_value, u_time = ev.extremum_fit(tw, x, locators, sigma if noisy else 0.0,
                                                  width_pk // 2 if noisy else 1)
    if noisy:
        # a peak one or two samples wide is flattened even by the narrow locator; a raw
        # sample more than 5 noise sigmas beyond the located peak is that peak, not noise
        k_raw = lo + int(np.argmin(x[lo:hi]))
        if x[k_raw] < value - 5.0 * sigma:
            dt = float(tw[1] - tw[0])
            return float(tw[k_raw]), float(x[k_raw]), k_raw, sigma, dt / ev.SQRT12
    return t_x, value, min(k_wide, k_pk), u_value, u_time


def _measure_window(a, b, can_grow, plateau, level, v, i, timebase, opts, zeros):
    i_base, i_rule, v_base, v_rule = zeros
    i_off = i_base.value if i_base is not None else 0.0
    v_off = v_base.value if v_base is not None else 0.0
    tw = timebase.window(a, b)
    iw = np.asarray(i[a:b], dtype=np.float64)
    vw = np.asarray(v[a:b], dtype=np.float64)
    n = iw.size
    clip_flags = qa.clipping_flags(iw, vw)
    if i_off:
        iw = iw - i_off
    if v_off:
        vw = vw - v_off
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
    sigma = ev.robust_sigma(iw[p_start:p_end])
    i_if = ev.level_of(iw[p_start:p_end], sigma)
    sigma_v = ev.robust_sigma(vw[p_start:p_end])
    if not i_if > 0:
        return None
    noise = max(sigma, i_base.sigma if i_base is not None else 0.0)
    if FLAG_SHORT_PLATEAU in flags:  # too few plateau samples: the window's own noise
        noise = max(noise, ev.robust_sigma(iw[:: max(1, n // 4096)]))
    if i_if < MIN_PLATEAU_SNR * noise:
        raise NoEventError(
            f"no forward-current plateau stands out of the noise: the level found "
            f"({i_if:.4g} A) is {i_if / noise:.2g} times the noise ({noise:.4g} A rms), need "
            f"at least {MIN_PLATEAU_SNR:g} (is this channel the diode current, and is the "
            "probe connected?)"
        )
    noisy = sigma > 1e-6 * i_if
    # noise-free quantised data: the code step is the resolution (GUM F.2.2.1)
    sigma_u = max(sigma, qa.code_step(iw[p_start:p_end]) / ev.SQRT12)
    sigma_vu = max(sigma_v, qa.code_step(vw[p_start:p_end]) / ev.SQRT12)
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
    dt_local = (tw[-1] - tw[0]) / (n - 1)
    t_a, slope_a, m_a = ev.crossing_fit(tw, iw, s, k_half + 1, 0.5 * i_if, band_if)
    t0, slope_t0, m_t0 = ev.crossing_fit(tw, iw, s, k0, 0.0, band_if)
    u_t0 = crossing_u(sigma_u, slope_t0, m_t0, sigma_s or sigma_u, dt_local)
    u_ta_cross = crossing_u(sigma_u, slope_a, m_a, sigma_s or sigma_u, dt_local)

    # The reverse-current minimum.
    k_min = k0 + int(np.argmin(s[k0:]))
    if s[k_min] > -max(4.0 * sigma_s, 1e-3 * i_if):
        return _NEED_MORE if can_grow else None
    if k_min >= n - 2 - width and can_grow:
        return _NEED_MORE
    # The peak may be much sharper than the fall (a snap): see _minimum.
    width_pk = min(width, PEAK_LOCATOR_WIDTH)
    s_pk = ev.moving_average(iw, width_pk)
    t_irrm, i_min, k_min, u_irrm, u_tirrm = _minimum(tw, iw, s, s_pk, k0, n, k_min, width,
                                                      width_pk, sigma, noisy)
    irrm = -i_min
    if not irrm > 0:
        return None
    u_irrm = rss(u_irrm, 0.0 if noisy else sigma_u)
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
    # The integration end's level below END_NOISE_MULTIPLE noise sigmas (end_in_noise): a
    # noise excursion of the locator would end the integration early. The locator then
    # averages enough samples to bring its noise to half the level (at most the tail's
    # quarter, at least the usual width) and the crossing must hold for that many samples.
    end_level = opts.integration_end_fraction * irrm
    end_in_noise = noisy and end_level < END_NOISE_MULTIPLE * sigma
    hold_end = 1
    if end_in_noise:
        width_end = max(width_end, min(_odd((2.0 * sigma / end_level) ** 2), _odd(tail / 2)))
        hold_end = width_end
        flags.append(f"{FLAG_END_IN_NOISE}: the integration end level "
                     f"{opts.integration_end_fraction:g}·Irrm = {end_level:.3g} A lies below "
                     f"{END_NOISE_MULTIPLE:g} noise sigmas ({sigma:.3g} A rms)")
    s_end = ev.moving_average(iw, width_end) if width_end != width else s

    def rising(fraction: float, band: float, loc: np.ndarray = s_r, hold: int = 1):
        """(instant, its noise u, its slope) of the rise through −fraction·Irrm, or None
        (with ``hold`` > 1 the locator must stay at or above the level for ``hold``
        samples)."""
        k = ev.first_held_at_or_above(loc, -fraction * irrm, k_min, n, hold)
        if k is None or k == 0:
            return None
        tc, slope, m = ev.crossing_fit(tw, iw, loc, k, -fraction * irrm, band)
        sig_loc = sigma / math.sqrt(max(1, (loc is s_r and width_r) or width_end)) if noisy else 0
        u_noise = crossing_u(sigma_u, slope, m, sig_loc or sigma_u, dt_local)
        if noisy and slope:
            # the locator's first passage through the level picks the fit's samples, so its
            # own noise (σ over the locator width, over the slope) moves the instant too
            u_noise = rss(u_noise, sig_loc / abs(slope))
        # the level −f·Irrm moves with Irrm: ∂t/∂Irrm = −f/slope
        u_level = fraction * u_irrm / abs(slope) if slope else 0.0
        return tc, u_noise, u_level, slope, m

    end = rising(opts.integration_end_fraction, band_end, s_end, hold_end)
    if end is None and can_grow:
        return _NEED_MORE
    t_trr = u_ttrr = None
    if opts.trr_method == "extrapolate":
        hi_c = rising(opts.fit_high, band_r)
        lo_c = rising(opts.fit_low, band_r)
        if hi_c is None or lo_c is None:
            flags.append(FLAG_TRR_NOT_FOUND)
        elif lo_c[0] < hi_c[0]:
            flags.append(FLAG_TRR_LINE)
        else:
            fh, fl = opts.fit_high, opts.fit_low
            ca, cb = fh / (fh - fl), fl / (fh - fl)
            t_trr = ca * lo_c[0] - cb * hi_c[0]
            # Irrm moves both levels together (correlated): signed sum of the level terms
            level_term = ca * lo_c[2] - cb * hi_c[2]
            u_ttrr = rss(ca * lo_c[1], cb * hi_c[1], level_term)
    else:
        thr = rising(opts.trr_threshold_fraction, band_r)
        if thr is None:
            flags.append(FLAG_TRR_NOT_FOUND)
        else:
            t_trr, u_ttrr = thr[0], rss(thr[1], thr[2])
    if end_in_noise and end is not None and end[0] > t_irrm:
        # The local slope at a level inside the noise is not resolved, so the end instant's
        # noise term uses the slope of an exponential tail (Lauritzen–Ma: the current decays
        # exponentially after the junction blocks) through the peak and the end:
        # f·Irrm/τ with τ = (t2 − t_Irrm)/ln(1/f); the hold rule may delay the end by up to
        # its length (a rectangular distribution of that width, GUM 4.3.7); the noise term
        # is σ over the root of the samples behind the instant, over that slope
        f_end = opts.integration_end_fraction
        slope_tail = end_level * math.log(1.0 / f_end) / (end[0] - t_irrm)
        u_hold = hold_end * dt_local / math.sqrt(12.0)
        m_end = max(end[4], width_end)  # samples behind the instant (line fit or locator)
        end = (end[0], rss(sigma_u / math.sqrt(m_end) / slope_tail, u_hold),
               f_end * u_irrm / slope_tail, end[3], end[4])

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
    didt = u_didt = None
    kb = ev.first_at_or_below(s, -0.5 * irrm, k0, k_min + 1)
    if kb is not None and kb > 0:
        t_b, slope_b, m_b = ev.crossing_fit(tw, iw, s, kb, -0.5 * irrm, band_r)
        if t_b > t_a:
            delta_i = 0.5 * i_if + 0.5 * irrm
            didt = delta_i / (t_b - t_a)
            u_tb_cross = rss(crossing_u(sigma_u, slope_b, m_b, sigma_s or sigma_u, dt_local),
                             0.5 * u_irrm / abs(slope_b) if slope_b else 0.0)
            u_if = 1.2533 * sigma_u / math.sqrt(max(p_end - p_start, 1))
            u_didt = rss(didt / (t_b - t_a) * u_ta_cross, didt / (t_b - t_a) * u_tb_cross,
                         0.5 * u_if / (t_b - t_a), 0.5 * u_irrm / (t_b - t_a))

    # Integration end by the window convention (RecoveryOptions.integration_window).
    t2 = end[0] if end is not None else None
    u_t2 = rss(end[1], end[2]) if end is not None else None
    i_t2 = -opts.integration_end_fraction * irrm
    if opts.integration_window != "fraction":
        t2, u_t2 = t_trr, u_ttrr
        i_t2 = float(np.interp(t2, tw, iw)) if t2 is not None else 0.0

    # Softness factor: least-squares slopes at t0 and after the minimum (qa.rrsf_slopes).
    k_stop = int(np.searchsorted(tw, end[0])) if end is not None else n
    slopes = qa.rrsf_slopes(tw, iw, s, k0, k_min, k_stop, min(irrm, i_if), max(3, width_r),
                            sigma_u,
                            T0_SLOPE_BAND)
    rrsf = u_rrsf = None
    if slopes is not None:
        (s0, u_s0), (s1, u_s1), n_win = slopes
        if s1 > 0 and s0 != 0.0:
            rrsf = abs(s0) / s1
            # the largest of n_win noisy slopes exceeds the true steepest one by up to
            # √(2·ln n_win)·u on average (qa.selection_bias_bound): an uncertainty component
            u_s1_all = u_s1 * math.hypot(1.0, qa.selection_bias_bound(n_win))
            u_rrsf = rrsf * rss(u_s0 / abs(s0), u_s1_all / s1)
    if rrsf is None:
        flags.append(FLAG_RRSF)

    # Charge and energy over the window.
    qrr = err = None
    u_qrr = u_err = None
    u_i0 = i_base.u if i_base is not None else sigma_u
    u_v0 = v_base.u if v_base is not None else 0.0
    if t2 is None or t2 <= t0:
        if end is None:
            flags.append(FLAG_INCOMPLETE)
    else:
        qrr = -ev.integrate(tw, iw, t0, t2)
        err = ev.integrate(tw, vw * iw, t0, t2)
        ka, kb2 = int(np.searchsorted(tw, t0)), int(np.searchsorted(tw, t2))
        v_seg, i_seg = vw[ka:kb2], iw[ka:kb2]
        count = max(kb2 - ka, 1)
        v_t2 = float(np.interp(t2, tw, vw))
        v_int = abs(float(np.sum(v_seg)) * dt_local)
        u_qrr = rss(sigma_u * dt_local * math.sqrt(count), abs(i_t2) * u_t2,
                    u_i0 * (t2 - t0))
        u_err = rss(sigma_u * dt_local * math.sqrt(float(np.dot(v_seg, v_seg))),
                    sigma_vu * dt_local * math.sqrt(float(np.dot(i_seg, i_seg))),
                    abs(v_t2 * i_t2) * u_t2, u_i0 * v_int, u_v0 * abs(qrr))
        if opts.integration_window == "triangle" and trr is not None:
            qrr = 0.5 * irrm * trr
            u_qrr = 0.5 * rss(trr * u_irrm, irrm * rss(u_ttrr, u_t0))

    # Peak and steady reverse voltage: VRM searched until the reverse voltage has settled.
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
    k_r1 = int(np.searchsorted(tw, t_vrm_end + vr_span, side="right"))
    vr = u_vr = None
    quiet = None
    sv = ev.moving_average(vw, width_v)
    if k_r1 - k_v1 >= 8:
        vr = -ev.level_of(vw[k_v1:k_r1], sigma_v)
        u_vr = rss(1.2533 * sigma_vu / math.sqrt(k_r1 - k_v1), u_v0)
        if i_base is None:  # only needed when no pre-event zero exists
            quiet = bl.quiet_zero(iw[k_v1:k_r1] + i_off)
        k_v1 = k_r1  # VRM until the voltage has settled: to the end of the VR window
    else:
        flags.append(FLAG_VR)
        if FLAG_NEAR_END not in flags:
            flags.append(FLAG_NEAR_END)
    vrm = u_vrm = None
    if k_v1 > k_v0:
        k_vmin = k_v0 + int(np.argmin(sv[k_v0:k_v1]))
        width_vpk = min(width_v, PEAK_LOCATOR_WIDTH)
        sv_pk = ev.moving_average(vw, width_vpk)
        _, vmin, _, u_vrm, _ = _minimum(tw, vw, sv, sv_pk, k_v0, k_v1, k_vmin, width_v,
                                       width_vpk, sigma_v, noisy_v)
        vrm = -vmin
        u_vrm = rss(u_vrm, 0.0 if noisy_v else sigma_vu, u_v0)

    qa.check_commutation(vw[p_start:p_end], sv[k_v0:], i_if)

    u_tirrm_ = u_tirrm
    u = {
        "if_A": rss(1.2533 * sigma_u / math.sqrt(max(p_end - p_start, 1)), u_i0),
        "t0_s": u_t0,
        "irrm_A": rss(u_irrm, u_i0),
        "ta_s": rss(u_t0, u_tirrm_),
        "tb_s": rss(u_ttrr, u_tirrm_) if tb is not None else None,
        "trr_s": rss(u_ttrr, u_t0) if trr is not None else None,
        "softness": (softness_u(ta, tb, u_t0, u_tirrm_, u_ttrr)
                     if softness is not None else None),
        "rrsf": u_rrsf,
        "qrr_C": u_qrr,
        "err_J": u_err,
        "didt_A_per_s": u_didt,
        "vrm_V": u_vrm,
        "vr_V": u_vr,
        "t_irrm_s": u_tirrm_,
        "t_trr_s": u_ttrr,
        "t2_s": u_t2 if t2 is not None else None,
    }
    values: dict[str, Any] = {
        "if_A": i_if, "t0_s": t0, "irrm_A": irrm, "ta_s": ta, "tb_s": tb, "trr_s": trr,
        "softness": softness, "rrsf": rrsf, "qrr_C": qrr, "err_J": err, "didt_A_per_s": didt,
        "vrm_V": vrm, "vr_V": vr, "t_irrm_s": t_irrm, "t_trr_s": t_trr, "t2_s": t2,
    }
    corrections = {
        "current_offset_A": i_off,
        "current_offset_u_A": i_base.u if i_base is not None else None,
        "current_offset_rule": i_rule or "not corrected: no pre-event or quiet window",
        "voltage_offset_V": v_off,
        "voltage_offset_u_V": v_base.u if v_base is not None else None,
        "voltage_offset_rule": v_rule,
        "current_rise_time_s": opts.current_rise_time_s,
        "voltage_rise_time_s": opts.voltage_rise_time_s,
        "deskew_s": None,
        "convention": Convention.of(opts).to_dict(),
        "noise_current_A": sigma_u,
        "noise_voltage_V": sigma_vu,
    }
    evidence = qa.Evidence(
        tw=tw, iw=iw, vw=vw, s=s, sv=sv, k0=k0, k_min=k_min, k_end=k_r1, dt=dt_local,
        sigma=sigma_u, sigma_v=sigma_vu, slope_t0=slopes[0][0] if slopes else slope_t0,
        steepest=slopes[1][0] if slopes else None, t_end=end[0] if end is not None else None,
        u_slope_t0=slopes[0][1] if slopes else 0.0, u_steepest=slopes[1][1] if slopes else 0.0,
        width_v=width_v, width_s=max(3, width_r),
    )
    flags.extend(qa.quality_flags(values, u, corrections, evidence, opts))
    flags.extend(f for f in clip_flags if f not in flags)
    return {**values, "flags": tuple(flags), "u": finite_u(u),
            "corrections": corrections}, quiet
