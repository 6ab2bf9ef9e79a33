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
  it (``f·(t_trr − t_irrm)``) plus one sample interval or 3 u(t_trr) (a capacitive
  recovery, e.g. a SiC Schottky: the current returns through zero as a displacement
  current, not by extracting stored charge); trr, tb and S are then not meaningful and
  Qrr / Err are the capacitive charge Qc and energy Ec.
- ``ringing``: after t2 the current (locator) swings beyond 10 % of Irrm (and 5 noise sigmas).
- ``snap``: the steepest current slope after the peak exceeds 3 times the slope at t0
  (RRSF < 1/3).
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
    samples (at least 3) between the minimum and t2. Standard uncertainties ``σ/√Σ(t − t̄)²``.
    """
    lo = ev_last_above(s, band * level, max(0, k0 - 100_000), k0)
    hi = ev_first_below(s, -band * level, k0, k_min + 1)
    if lo is None or hi is None:
        return None
    first = _line_slope(tw[lo : hi + 1], iw[lo : hi + 1], sigma)
    w = int(width)
    seg = iw[k_min:k_stop]
    if first is None or seg.size < w:
        return None
    j = np.arange(w, dtype=np.float64) - 0.5 * (w - 1)
    sjj = float(np.dot(j, j))
    dt = float(tw[1] - tw[0])
    slopes = np.convolve(seg, j[::-1] / (sjj * dt), mode="valid")
    return first, (float(slopes.max()), sigma / (dt * math.sqrt(sjj)))


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
            + max(e.dt, 3.0 * (u.get("t_trr_s") or 0.0))):
        out.append(f"{fl.FLAG_TRR_BEYOND}: the trr end lies after t2 (capacitive recovery); "
                   "trr_s, tb_s and softness are not meaningful, qrr_C and err_J are the "
                   "capacitive charge Qc and energy Ec")
    if e.t_end is not None:
        k2 = int(np.searchsorted(e.tw, e.t_end))
        if e.k_end - k2 > 2:
            swing = float(np.max(np.abs(e.s[k2 : e.k_end])))
            if swing > RINGING_FRACTION * irrm and swing > 5.0 * e.sigma:
                out.append(fl.FLAG_RINGING)
    if e.steepest is not None and e.slope_t0 and e.steepest > SNAP_MULTIPLE * abs(e.slope_t0):
        out.append(fl.FLAG_SNAP)
    u_ta = u.get("ta_s")
    if ta is not None and ta > 0 and u_ta is not None and u_ta > TA_U_FRACTION * ta:
        out.append(fl.FLAG_TA_UNRESOLVED)
    return out


def flag_name(flag: str) -> str:
    """The name part of a flag string (before ``": "``)."""
    return flag.split(":", 1)[0]
