"""Quality flags of a recovery measurement, the RRSF slopes and the misuse checks.

Each flag warns that a value should not be trusted as it stands; the rules (thresholds are
common practice unless a source is named; the README's metrics section lists them):

- ``offset_large``: the current zero removed exceeds 2 % of IF, or the voltage zero 2 % of VR
  (:mod:`benchrun.analysis.baseline`).
- ``rise_time_limited``: the measurement chain's rise time, root-sum-square of the two
  channels' recorded rise times, exceeds 20 % of the shorter of ta and tb (a Gaussian chain
  lengthens an edge of duration T to √(T² + tr²): more than 2 % at tr = 0.2·T).
- ``deskew_suspect``: the reverse voltage passes VR by more than three noise sigmas before
  the current peak by more than the deskew tolerance. At the current peak di/dt = 0, so the
  loop inductance holds no voltage and the diode holds at most the bus voltage; only after
  the peak does Ls·di/dt add an overshoot (KVL around the commutation loop). A voltage that
  overshoots VR earlier arrives early against the current: uncorrected skew.
- ``rrsf_unresolved``: RRSF not found, or its standard uncertainty exceeds 10 % of it.
- ``vrm_below_vr``: VRM lies below VR by more than 3 standard uncertainties.
- ``trr_beyond_integration``: the trr end lies after t2, the return through
  ``integration_end_fraction·Irrm``, by more than a straight return from the peak would put
  it (``f·(t_trr − t_irrm)``) plus one sample interval or 3 u(t_trr), **and** the diode's
  voltage shows a capacitive recovery: the reverse voltage passes 10 % of the value it
  reaches by the current peak (or 5 noise sigmas of its locator, when higher: a fraction x)
  before (1 + √x)/2 of the charge from t0 to the peak (0.66 at 10 %) has flowed (see
  :func:`voltage_rises_early`).
  A capacitive recovery (e.g. a SiC Schottky) returns the current through zero as a
  displacement current, not by extracting stored charge; trr, tb and S are then not
  meaningful and Qrr / Err are the capacitive charge Qc and energy Ec. A stored-charge (PiN)
  recovery followed by strong loop ringing also puts the extrapolated trr end after t2, but
  it is not capacitive, so it is not flagged (``ringing`` says what happened).
- ``ringing``: after t2 the current (locator) swings beyond 10 % of Irrm (and 5 noise sigmas).
- ``snap``: the steepest current slope after the peak exceeds 3 times the slope at t0
  (RRSF < 1/3) by more than noise alone would lift the largest of the N window slopes
  searched: some window's ``slope − 3·|slope_t0| > z·√(u(slope)² + 9·u(slope_t0)²)`` with
  ``z = Φ⁻¹(1 − α/N)``, α = ``SNAP_FALSE_ALARM`` (1 %), over the RRSF windows and
  windows 2, 4, 8… times as wide, N all of them (see :func:`is_snap`, :func:`snap_margin`).
  On noise-free samples (u = 0) this is the plain threshold 3.
- ``ta_unresolved``: the standard uncertainty of ta exceeds 10 % of ta.
- ``end_in_noise`` (set in :mod:`benchrun.analysis.measure`): the integration end level
  ``integration_end_fraction·Irrm`` lies below ``END_NOISE_MULTIPLE`` (3) current noise
  sigmas; t2 is then found on a wider moving average and the return must hold for its width.
- ``clipped_diode_current`` / ``clipped_diode_voltage``: samples pile up at the extreme
  value of the reverse current (or reverse voltage): at least 5 samples, 3 in a row, at the
  lowest value, at least 3 times as many as at the next value above it, which lies within
  2 % of the channel's span (one ADC code): the screen edge, not a peak.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from benchrun.analysis import flags as fl
from benchrun.errors import NoEventError

OFFSET_LARGE_FRACTION = 0.02
RISE_TIME_FRACTION = 0.2
RRSF_U_FRACTION = 0.1
TA_U_FRACTION = 0.1
RINGING_FRACTION = 0.1
SNAP_MULTIPLE = 3.0
#: Probability, at most, that noise alone raises ``snap`` on a recovery whose steepest slope
#: is exactly at the threshold (common practice: 1 %; see :func:`snap_margin`).
SNAP_FALSE_ALARM = 0.01
#: A capacitive recovery: the reverse voltage passes this fraction x of the voltage it
#: reaches by the current peak (or 5 noise sigmas, when higher) before (1 + √x)/2 of the
#: charge from t0 to the peak has flowed (see :func:`voltage_rises_early`).
CAPACITIVE_VOLTAGE_FRACTION = 0.1
#: A diode commutation: the reverse voltage after it exceeds the plateau voltage before it
#: by this factor (a freewheeling diode conducts at a few volts, then blocks the bus).
COMMUTATION_VOLTAGE_RATIO = 5.0
#: Samples of a plateau used to estimate the ADC code step.
CODE_SAMPLES = 512


@dataclass(frozen=True)
class Evidence:
    """What the flag rules look at (window arrays and indices)."""

    tw: np.ndarray
    iw: np.ndarray
    vw: np.ndarray
    s: np.ndarray
    sv: np.ndarray
    k0: int
    k_min: int
    k_end: int
    dt: float
    sigma: float
    sigma_v: float
    slope_t0: float
    steepest: float | None
    t_end: float | None
    u_slope_t0: float = 0.0
    u_steepest: float = 0.0
    width_v: int = 1
    width_s: int = 3


def code_step(x: np.ndarray) -> float:
    """Smallest step between distinct values of a plateau when they lie on a grid of codes
    (a noise-free quantised record), else 0."""
    values = np.unique(np.asarray(x[:CODE_SAMPLES], dtype=np.float64))
    if values.size < 2 or values.size > CODE_SAMPLES // 4:
        return 0.0
    steps = np.diff(values)
    step = float(steps.min())
    if step <= 0 or not np.allclose(steps / step, np.round(steps / step), atol=0.01):
        return 0.0
    return step


def _piled_low(x: np.ndarray) -> bool:
    if x.size < 8:
        return False
    low = float(x.min())
    at = x == low
    count = int(np.count_nonzero(at))
    if count < 5:
        return False
    above = x[x > low]
    if above.size == 0:
        return False
    nxt = float(above.min())
    if nxt - low > 0.02 * (float(x.max()) - low):
        return False
    if count < 3 * int(np.count_nonzero(x == nxt)):
        return False
    run = np.diff(np.flatnonzero(np.diff(np.concatenate(([0], at.view(np.int8), [0])))))
    return bool(run[::2].max() >= 3)


def clipping_flags(iw: np.ndarray, vw: np.ndarray) -> tuple[str, ...]:
    """``clipped_diode_current`` / ``clipped_diode_voltage`` by the pile-up rule."""
    out = []
    if _piled_low(iw):
        out.append(fl.FLAG_CLIPPED_CURRENT)
    if _piled_low(vw):
        out.append(fl.FLAG_CLIPPED_VOLTAGE)
    return tuple(out)


def _line_slope(t: np.ndarray, x: np.ndarray, sigma: float) -> tuple[float, float] | None:
    if t.size < 3:
        return None
    tc = t - t.mean()
    sxx = float(np.dot(tc, tc))
    if sxx <= 0:
        return None
    return float(np.dot(tc, x - x.mean()) / sxx), sigma / math.sqrt(sxx)


def rrsf_slopes(tw, iw, s, k0, k_min, k_stop, level, width, sigma, band):
    """``((slope_t0, u), (steepest, u))`` or None.

    Slope at t0: least-squares line through the raw samples from the last locator sample
    above ``+band·min(IF, Irrm)`` before t0 to the first at or below ``−band·min(IF, Irrm)``
    after it (``level`` = min(IF, Irrm)). Steepest
    slope after the minimum: the largest least-squares slope over ``width`` consecutive raw
    samples (at least 3) between the minimum and t2, or over the first ``width`` samples
    from the minimum when t2 comes sooner (an abrupt end sampled coarsely: a window wider
    than the snap reads a lower bound of its slope, so ``snap`` stays a safe conclusion).
    Standard uncertainties ``σ/√Σ(t − t̄)²``
    (of one window's slope: the largest of many is biased upwards by noise, see
    :func:`snap_margin` and :func:`selection_bias_bound`). The third item is the number of
    windows searched.
    """
    lo = ev_last_above(s, band * level, max(0, k0 - 100_000), k0)
    hi = ev_first_below(s, -band * level, k0, k_min + 1)
    if lo is None or hi is None:
        return None
    first = _line_slope(tw[lo : hi + 1], iw[lo : hi + 1], sigma)
    w = int(width)
    seg = iw[k_min:max(k_stop, min(iw.size, k_min + w))]
    if first is None or seg.size < w:
        return None
    j = np.arange(w, dtype=np.float64) - 0.5 * (w - 1)
    sjj = float(np.dot(j, j))
    dt = float(tw[1] - tw[0])
    slopes = np.convolve(seg, j[::-1] / (sjj * dt), mode="valid")
    return first, (float(slopes.max()), sigma / (dt * math.sqrt(sjj))), int(slopes.size)


def snap_margin(n_windows: int, alpha: float = SNAP_FALSE_ALARM) -> float:
    """Noise margin ``z`` (in standard uncertainties) of the ``snap`` rule.

    The steepest slope is the largest of ``n_windows`` least-squares slopes over sliding
    windows. Noise alone makes the largest of N slopes, each with standard uncertainty u,
    exceed the true steepest slope: for N independent normal errors its expected excess grows
    like ``u·√(2·ln N)`` (the extreme-value behaviour of the maximum of N standard normals;
    Cramér, *Mathematical Methods of Statistics*, 1946, §28.6; from memory), and overlapping
    windows are not independent. Each window's difference ``slope_k − 3·|slope_t0|`` has a
    normal error of standard deviation ``u_k' = √(u_k² + 9·u(slope_t0)²)`` (the t0 samples are
    not in the window); whatever the windows' dependence, the union (Bonferroni) bound
    ``P(max_k (e_k − z·u_k') > 0) ≤ Σ_k (1 − Φ(z)) = N·(1 − Φ(z))`` holds, so the probability
    that noise alone raises ``snap`` on a recovery at the threshold is at most α for
    ``z = Φ⁻¹(1 − α/N)``.
    """
    from statistics import NormalDist

    return NormalDist().inv_cdf(1.0 - alpha / max(1, int(n_windows)))


def selection_bias_bound(n_windows: int) -> float:
    """Upper bound, in standard uncertainties, of the mean excess of the largest of
    ``n_windows`` window slopes over the true steepest slope: ``√(2·ln N)`` (for any N
    normal errors of equal variance, whatever their correlation:
    ``E[max e_k] ≤ u·√(2·ln N)`` from Jensen's inequality on ``E[exp(λ·max e_k)]``; a
    standard bound, from memory). The reported RRSF keeps the definition's largest slope
    (biased low by up to this much on noisy data); its uncertainty includes this bound."""
    n = max(1, int(n_windows))
    return math.sqrt(2.0 * math.log(n)) if n > 1 else 0.0


def window_slopes(iw: np.ndarray, dt: float, width: int) -> tuple[np.ndarray, float]:
    """Least-squares slopes of every run of ``width`` consecutive samples of ``iw`` and the
    standard uncertainty of one of them per unit noise sigma (``1/(dt·√Σj²)``)."""
    j = np.arange(width, dtype=np.float64) - 0.5 * (width - 1)
    sjj = float(np.dot(j, j))
    return np.convolve(iw, j[::-1] / (sjj * dt), mode="valid"), 1.0 / (dt * math.sqrt(sjj))


def is_snap(slope_t0: float, u_slope_t0: float, steepest: float, u_steepest: float,
            segment: np.ndarray | None = None, dt: float = 0.0, width: int = 3,
            sigma: float = 0.0) -> bool:
    """The ``snap`` rule of the module docstring.

    Noise-free (``u_steepest`` = 0): ``steepest > 3·|slope_t0|``. Otherwise the windows of
    ``width`` samples over ``segment`` (the raw samples from the peak to t2) and of 2, 4, 8…
    times that width are all searched: a least-squares slope over uniform samples is a
    positively weighted mean of the successive differences, so without noise no window's
    slope exceeds the steepest local slope, and a wide window's lower bound is as valid as a
    narrow one's while its noise is lower (a snap spread over many samples is resolved on
    noisy data). ``snap`` when some window's ``slope − 3·|slope_t0|`` exceeds
    ``z·√(u² + 9·u(slope_t0)²)``, z from :func:`snap_margin` over all windows searched.
    """
    if not slope_t0:
        return False
    threshold = SNAP_MULTIPLE * abs(slope_t0)
    if u_steepest <= 0 or segment is None or dt <= 0 or sigma <= 0:
        return steepest > threshold
    found, w = [], max(3, int(width))
    while w <= segment.size:
        slopes, u_unit = window_slopes(segment, dt, w)
        found.append((float(slopes.max()), sigma * u_unit, slopes.size))
        w = 2 * w
    if not found:
        return False
    z = snap_margin(sum(n for _, _, n in found))
    # the t0 samples are not among the window's: independent errors, combined in quadrature
    return any(top - threshold > z * math.hypot(u_w, SNAP_MULTIPLE * u_slope_t0)
               for top, u_w, _ in found)


def capacitive_charge_limit(x: float) -> float:
    """Largest fraction of Qa a capacitive diode has taken when its voltage passes the
    fraction ``x`` of its peak-time value, as :func:`voltage_rises_early` uses it:
    ``(1 + √x)/2``, the midpoint between ``√x`` (a depletion capacitance with grading
    coefficient ½, ``q ∝ √V``) and 1 (a diode that holds its voltage until the peak)."""
    return 0.5 * (1.0 + math.sqrt(x))


def voltage_rises_early(tw: np.ndarray, iw: np.ndarray, sv: np.ndarray, sigma_sv: float,
                        k0: int, k_pk: int) -> bool:
    """True when the diode charges like a capacitor during ta: the reverse voltage passes
    the level ``x·V_pk`` — x = ``CAPACITIVE_VOLTAGE_FRACTION`` (10 %) of the reverse voltage
    V_pk it reaches by the current peak, raised to 5 noise sigmas of the voltage locator
    ``sv`` (noise ``sigma_sv``) when that is higher — before the charge ``q = −∫ i dt`` from
    t0 reaches :func:`capacitive_charge_limit` (x) of its value Qa at the peak (0.66 at 10 %).

    Physics: a capacitive diode (Schottky, SiC) carries the reverse current as displacement
    current, ``i = C(v)·dv/dt``, so its junction charges from the current zero t0 on and its
    voltage is a function of the charge alone, whatever the current's shape. With a depletion
    capacitance ``C ∝ (Vj + V)^(−m)`` (grading coefficient m ≤ 1/2 for an abrupt junction;
    Sze, *Physics of Semiconductor Devices*, depletion capacitance) ``q ∝ V^(1−m)``, so the
    fraction x of the peak-time voltage is reached after at most ``x^(1−m) ≤ √x`` of Qa
    (32 % at x = 10 %; x for a constant capacitance; less still when Vj is not negligible).
    A stored-charge (PiN) diode stays forward biased, at a few volts, while its excess
    carriers near the junction are extracted, and supports reverse voltage only once the
    carrier density at the junction has fallen to zero, close to the current peak (Baliga,
    *Fundamentals of Power Semiconductor Devices*, 2008, ch. 5 on reverse recovery; in the
    Lauritzen–Ma model, IEEE Trans. Power Electronics 6(2), 1991, the junction charge stays
    positive until near the peak; both from memory): nearly all of Qa has flowed before its
    voltage rises. The split is the midpoint between the two (common practice). A record
    whose reverse voltage does not rise above that level by the peak is not capacitive.
    """
    if k_pk <= k0 + 1:
        return False
    v_pk = float(-np.min(sv[k0 : k_pk + 1]))
    level = max(CAPACITIVE_VOLTAGE_FRACTION * v_pk, 5.0 * sigma_sv)
    if not v_pk > level:
        return False
    k_v = k0 + int(np.argmax(sv[k0 : k_pk + 1] < -level))
    q = -np.concatenate(([0.0], np.cumsum(0.5 * (iw[k0 + 1 : k_pk + 1] + iw[k0:k_pk])
                                          * np.diff(tw[k0 : k_pk + 1]))))
    q_a = float(q[-1])
    return q_a > 0 and float(q[k_v - k0]) < capacitive_charge_limit(level / v_pk) * q_a


def ev_last_above(s, level, start, stop):
    hits = np.flatnonzero(s[start:stop] > level)
    return int(start + hits[-1]) if hits.size else None


def ev_first_below(s, level, start, stop):
    hits = np.flatnonzero(s[start:stop] <= level)
    return int(start + hits[0]) if hits.size else None


def check_commutation(v_plateau: np.ndarray, v_after: np.ndarray, i_if: float) -> None:
    """Refuse a record that holds no forward-then-reverse commutation of a diode.

    Before the commutation the diode conducts (a few volts forward); after it, it blocks the
    bus (anode-to-cathode negative). ``v_after`` is the (smoothed) voltage from t0 on: its
    reverse peak must exceed :data:`COMMUTATION_VOLTAGE_RATIO` times the plateau voltage.
    Raises :class:`NoEventError` otherwise: naming a reversed voltage probe when the voltage
    goes that far positive instead.
    """
    v_pl = abs(float(np.median(v_plateau))) if v_plateau.size else 0.0
    if v_after.size == 0:
        return
    reverse, forward = float(-v_after.min()), float(v_after.max())
    if reverse > COMMUTATION_VOLTAGE_RATIO * v_pl and reverse > 0.0:
        return
    if forward > COMMUTATION_VOLTAGE_RATIO * v_pl and forward > 0.0:
        raise NoEventError(
            f"the diode voltage goes positive (to {forward:.4g} V), not reverse, after the "
            "current reverses: the voltage probe looks reversed (anode → cathode must be "
            "negative while the diode blocks); Err would come out negative"
        )
    raise NoEventError(
        f"no diode commutation: the current plateau of {i_if:.4g} A flows at {v_pl:.4g} V "
        f"and the voltage reaches only {reverse:.4g} V reverse afterwards; a diode conducts at "
        "a few volts, then blocks the bus. This looks like a switch current or a blocking "
        "phase (analyse the diode's current and its anode-to-cathode voltage)"
    )


def quality_flags(values: dict[str, Any], u: dict[str, Any], corrections: dict[str, Any],
                  e: Evidence, opts: Any) -> list[str]:
    """The flags of the module docstring that apply."""
    out: list[str] = []
    i_if, vr, irrm = values["if_A"], values["vr_V"], values["irrm_A"]
    ta, tb = values["ta_s"], values["tb_s"]
    if abs(corrections["current_offset_A"]) > OFFSET_LARGE_FRACTION * i_if or (
            vr is not None and abs(corrections["voltage_offset_V"]) > OFFSET_LARGE_FRACTION * vr):
        out.append(fl.FLAG_OFFSET_LARGE)
    rise = [x for x in (opts.current_rise_time_s, opts.voltage_rise_time_s) if x]
    spans = [x for x in (ta, tb) if x is not None and x > 0]
    if rise and spans and math.hypot(*rise) > RISE_TIME_FRACTION * min(spans):
        out.append(fl.FLAG_RISE_TIME)
    if vr is not None and values["t_irrm_s"] is not None:
        level = -(vr + 3.0 * e.sigma_v)
        k = ev_first_below(e.sv, level, e.k0, e.k_min + 1)
        tol = max(opts.deskew_tolerance_s, 2.0 * e.dt)
        if k is not None and float(e.tw[k]) < values["t_irrm_s"] - tol:
            out.append(fl.FLAG_DESKEW)
    rrsf, u_rrsf = values["rrsf"], u.get("rrsf")
    if rrsf is None or u_rrsf is None or u_rrsf > RRSF_U_FRACTION * rrsf:
        out.append(fl.FLAG_RRSF_UNRESOLVED)
    vrm = values["vrm_V"]
    if vrm is not None and vr is not None:
        u_both = math.hypot(u.get("vrm_V") or 0.0, u.get("vr_V") or 0.0)
        if vrm < vr - 3.0 * u_both:
            out.append(fl.FLAG_VRM_BELOW_VR)
    t_trr, t_pk = values["t_trr_s"], values["t_irrm_s"]
    if t_trr is not None and e.t_end is not None and t_trr > e.t_end + (
            opts.integration_end_fraction * (t_trr - t_pk)
            + max(e.dt, 3.0 * (u.get("t_trr_s") or 0.0))) and (
            voltage_rises_early(e.tw, e.iw, e.sv, e.sigma_v / math.sqrt(e.width_v), e.k0,
                                int(np.searchsorted(e.tw, t_pk)))):
        out.append(f"{fl.FLAG_TRR_BEYOND}: the trr end lies after t2 (capacitive recovery); "
                   "trr_s, tb_s and softness are not meaningful, qrr_C and err_J are the "
                   "capacitive charge Qc and energy Ec")
    if e.t_end is not None:
        k2 = int(np.searchsorted(e.tw, e.t_end))
        if e.k_end - k2 > 2:
            swing = float(np.max(np.abs(e.s[k2 : e.k_end])))
            if swing > RINGING_FRACTION * irrm and swing > 5.0 * e.sigma:
                out.append(fl.FLAG_RINGING)
    k_stop = int(np.searchsorted(e.tw, e.t_end)) if e.t_end is not None else e.iw.size
    if e.steepest is not None and is_snap(e.slope_t0, e.u_slope_t0, e.steepest, e.u_steepest,
                                          e.iw[e.k_min : k_stop], e.dt, e.width_s, e.sigma):
        out.append(fl.FLAG_SNAP)
    u_ta = u.get("ta_s")
    if ta is not None and ta > 0 and u_ta is not None and u_ta > TA_U_FRACTION * ta:
        out.append(fl.FLAG_TA_UNRESOLVED)
    return out


def flag_name(flag: str) -> str:
    """The name part of a flag string (before ``": "``)."""
    return flag.split(":", 1)[0]
