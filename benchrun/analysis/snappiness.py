"""Snappy recovery: what follows the recovery, and the worst-case snappiness assessment (pure).

Two parts:

* :func:`analyze_oscillation` measures, on one capture, what follows the reverse-recovery
  event: the peak overshoot of the reverse voltage above the steady VR, the current's
  oscillation after t2 (amplitude, frequency, envelope decay time constant) and how long the
  reverse voltage dwells near its peak (a flat top is how an avalanche clamp looks).  These are
  per-shot metrics (``overshoot_V``, ``ring_amplitude_A``, ``ring_frequency_Hz``,
  ``ring_decay_s``, ``vrm_dwell_s``), recorded with the other metrics.
* :func:`assess_snappiness` grades one shot at a worst-case snappiness point against
  :class:`SnappinessLimits`: the peak reverse voltage VRM against the inductive expectation
  VR + Ls·di/dt (KVL around the commutation loop: a soft recovery adds about Ls·|di/dt| to the
  bus; an abrupt end of the reverse current adds Ls times the much larger slope of the snap),
  the oscillation amplitude (relative to Irrm) and its decay time, the slope after the peak
  (the analysis' ``snap`` flag, RRSF < 1/3, and ``ringing`` flag, see
  :mod:`benchrun.analysis.quality`), and *dynamic avalanche suspected* when VRM reaches a set
  fraction of the rated VRRM and holds there (a clamp rather than a peak).  Thresholds are the
  limits file's (``worst_case`` block); the rules here are common practice for a qualification
  of snap-off (the snappy-recovery indicators described for PiN diodes by B. J. Baliga,
  *Fundamentals of Power Semiconductor Devices*, ch. 5, and J. Lutz et al., *Semiconductor
  Power Devices*, ch. 5; from memory).

Definitions (ours, stated so a reader can repeat them):

* oscillation window: from t2 (end of the Qrr integration) over ``RING_WINDOW_MULTIPLE`` times
  (t2 − t0), at least ``RING_WINDOW_MIN_S``, cut at the record end; the current's level there
  is the median of the window's last third.
* half-cycles: the current minus that level is split where it crosses ±``RING_HYSTERESIS`` of
  its largest excursion (hysteresis keeps noise from splitting a lobe); each lobe's largest
  |deviation| is its amplitude; the hysteresis is at least ``RING_NOISE_MULTIPLE`` noise
  sigmas (robust, from the settled third), so noise and quantisation steps form no lobes.
  ``ring_amplitude_A``: the largest excursion; ``ring_frequency_Hz``:
  1 / (2 × mean spacing of successive lobe peaks); ``ring_decay_s``: −1/slope of the
  least-squares line through ln(amplitude) against time of the lobe peaks (exponential
  envelope of a damped L-C ring), with at least 3 lobes and a falling envelope whose time
  constant is at most ``RING_DECAY_MAX_MULTIPLE`` window spans, else None.
* ``vrm_dwell_s``: how long the reverse voltage stays within ``DWELL_FRACTION`` of VRM around
  its peak, contiguous samples × dt.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from benchrun.analysis import flags as fl

#: Oscillation window after t2, in multiples of (t2 − t0), and its minimum [s].
RING_WINDOW_MULTIPLE = 10.0
RING_WINDOW_MIN_S = 200e-9
#: Hysteresis of the half-cycle split, fraction of the largest excursion, and at least this
#: many noise sigmas (a lobe must stand out of the noise to count).
RING_HYSTERESIS = 0.1
RING_NOISE_MULTIPLE = 5.0
#: A decay time constant beyond this many window spans is not resolved (the envelope barely
#: falls within the window): reported as None, the amplitude limit judges such a ring.
RING_DECAY_MAX_MULTIPLE = 20.0
#: A voltage "at its peak" lies within this fraction of VRM (flat-top dwell).
DWELL_FRACTION = 0.02

#: The qualification a test point carries to be graded as the worst-case snappiness step
#: (``TestPointSpec.qualification`` / ``TestPoint.qualification``).
WORST_CASE_SNAPPINESS = "worst_case_snappiness"


@dataclass(frozen=True)
class OscillationMetrics:
    """What follows the recovery (SI units; None where not measurable)."""

    overshoot_V: float | None
    ring_amplitude_A: float | None
    ring_frequency_Hz: float | None
    ring_decay_s: float | None
    vrm_dwell_s: float | None

    def to_dict(self) -> dict[str, float | None]:
        return asdict(self)


def _lobes(dev: np.ndarray, threshold: float) -> list[int]:
    """Index of the largest |dev| in each half-cycle split by ±threshold hysteresis."""
    peaks: list[int] = []
    state = 0
    best = -1
    for k, x in enumerate(dev):
        sign = 1 if x > threshold else (-1 if x < -threshold else 0)
        if sign and sign != state:
            if best >= 0:
                peaks.append(best)
            state, best = sign, k
        elif sign == state and state and abs(x) > abs(dev[best]):
            best = k
    if best >= 0:
        peaks.append(best)
    return peaks


def analyze_oscillation(t: np.ndarray, v: np.ndarray, i: np.ndarray, *, t0_s: float | None,
                        t2_s: float | None, vr_V: float | None,
                        vrm_V: float | None) -> OscillationMetrics:
    """Measure the after-recovery oscillation and overshoot of one capture.

    ``t`` uniform time axis [s], ``v`` anode-to-cathode voltage [V], ``i`` forward current [A],
    and the recovery's t0, t2, VR and VRM (:class:`~benchrun.analysis.recovery.RecoveryMetrics`).
    Definitions in the module docstring.
    """
    t = np.asarray(t, dtype=float)
    v = np.asarray(v, dtype=float)
    i = np.asarray(i, dtype=float)
    overshoot = None if vr_V is None or vrm_V is None else float(vrm_V - vr_V)
    dwell = None
    if vrm_V is not None and vrm_V > 0 and t.size > 1:
        dt = float(t[1] - t[0])
        k = int(np.argmin(v))
        near = -v >= vrm_V * (1.0 - DWELL_FRACTION)
        lo = k
        while lo > 0 and near[lo - 1]:
            lo -= 1
        hi = k
        while hi + 1 < near.size and near[hi + 1]:
            hi += 1
        dwell = float((hi - lo + 1) * dt) if near[k] else 0.0
    amplitude = frequency = decay = None
    if t0_s is not None and t2_s is not None and t2_s > t0_s:
        span = max(RING_WINDOW_MULTIPLE * (t2_s - t0_s), RING_WINDOW_MIN_S)
        m = (t >= t2_s) & (t <= t2_s + span)
        if np.count_nonzero(m) >= 8:
            tw, iw = t[m], i[m]
            tail = iw[2 * iw.size // 3:]
            level = float(np.median(tail))
            dev = iw - level
            largest = float(np.max(np.abs(dev)))
            amplitude = largest
            # noise: robust sigma of sample-to-sample steps of the settled third (white noise:
            # std(diff) = √2·σ; 1.4826·MAD estimates σ of a normal distribution)
            steps = np.diff(tail)
            sigma = 1.4826 * float(np.median(np.abs(steps - np.median(steps)))) / math.sqrt(2.0)
            floor = max(RING_HYSTERESIS * largest, RING_NOISE_MULTIPLE * sigma)
            peaks = [k for k in _lobes(dev, floor) if abs(dev[k]) > floor] if largest > 0 else []
            if len(peaks) >= 2:
                frequency = float(1.0 / (2.0 * np.mean(np.diff(tw[peaks]))))
            if len(peaks) >= 3:
                tp = tw[peaks]
                lna = np.log(np.abs(dev[peaks]))
                tc = tp - tp.mean()
                slope = float(np.dot(tc, lna - lna.mean()) / np.dot(tc, tc))
                if slope < 0 and -1.0 / slope <= RING_DECAY_MAX_MULTIPLE * span:
                    decay = -1.0 / slope
    return OscillationMetrics(overshoot, amplitude, frequency, decay, dwell)


@dataclass(frozen=True)
class SnappinessLimits:
    """Limits of the worst-case snappiness step (SI; fractions as plain ratios).

    ``max_overshoot_excess``: largest allowed (VRM − (VR + Ls·di/dt)) / (VR + Ls·di/dt);
    ``max_ring_fraction``: largest oscillation amplitude after the recovery over Irrm;
    ``max_ring_decay_s``: largest envelope decay time constant of that oscillation;
    ``allow_snap``: whether the ``snap`` flag (RRSF < 1/3) is tolerated;
    ``avalanche_fraction`` × ``rated_voltage_V`` (VRRM) and ``clamp_time_s``: VRM at or above
    that fraction of VRRM, held within 2 % for at least the clamp time, is dynamic avalanche
    suspected (a fail).
    """

    rated_voltage_V: float
    max_overshoot_excess: float
    max_ring_fraction: float
    max_ring_decay_s: float
    avalanche_fraction: float = 0.9
    clamp_time_s: float = 5e-9
    allow_snap: bool = False


@dataclass(frozen=True)
class SnappinessAssessment:
    """The worst-case snappiness verdict of one shot (see :func:`assess_snappiness`)."""

    passed: bool
    reasons: tuple[str, ...]
    severity: float
    vrm_V: float | None
    vr_V: float | None
    didt_A_per_s: float | None
    stray_inductance_H: float
    vrm_expected_V: float | None
    overshoot_excess: float | None
    ring_amplitude_A: float | None
    ring_fraction: float | None
    ring_decay_s: float | None
    rrsf: float | None
    snap: bool
    ringing: bool
    avalanche_suspected: bool

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["reasons"] = list(self.reasons)
        return data


def _number(metrics: Mapping[str, Any], key: str) -> float | None:
    value = metrics.get(key)
    if value is None or isinstance(value, bool):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def assess_snappiness(metrics: Mapping[str, Any], flags: Sequence[str], *,
                      stray_inductance_H: float,
                      limits: SnappinessLimits) -> SnappinessAssessment:
    """Grade one shot's snappiness (pure).

    ``metrics``: the shot's metrics (``vrm_V``, ``vr_V``, ``didt_A_per_s``, ``irrm_A``,
    ``rrsf`` and the oscillation metrics of :func:`analyze_oscillation`); ``flags``: its flags
    (``snap``, ``ringing``); ``stray_inductance_H``: the fixture's loop stray inductance Ls.
    ``severity`` is the largest ratio of a finding to its limit (> 1: beyond a limit), used to
    pick a device's worst shot.  A quantity that could not be measured fails the step with
    the reason (the step cannot pass on missing evidence).
    """
    names = {f.split(":", 1)[0] for f in flags}
    snap, ringing = fl.FLAG_SNAP in names, fl.FLAG_RINGING in names
    vrm, vr = _number(metrics, "vrm_V"), _number(metrics, "vr_V")
    didt, irrm = _number(metrics, "didt_A_per_s"), _number(metrics, "irrm_A")
    ring, decay = _number(metrics, "ring_amplitude_A"), _number(metrics, "ring_decay_s")
    dwell, rrsf = _number(metrics, "vrm_dwell_s"), _number(metrics, "rrsf")
    reasons: list[str] = []
    ratios: list[float] = []
    expected = excess = ring_fraction = None
    if vrm is None or vr is None or didt is None:
        reasons.append("VRM, VR or di/dt not measured: the overshoot cannot be judged")
        ratios.append(math.inf)
    else:
        expected = vr + stray_inductance_H * abs(didt)
        excess = (vrm - expected) / expected
        ratios.append(max(excess, 0.0) / limits.max_overshoot_excess)
        if excess > limits.max_overshoot_excess:
            reasons.append(
                f"VRM {vrm:.4g} V exceeds VR + Ls·di/dt = {vr:.4g} V + "
                f"{stray_inductance_H * 1e9:.3g} nH × {abs(didt) * 1e-6:.4g} A/us = "
                f"{expected:.4g} V by {excess * 100:.1f} % "
                f"(limit {limits.max_overshoot_excess * 100:g} %)")
    if ring is not None and irrm:
        ring_fraction = ring / irrm
        ratios.append(ring_fraction / limits.max_ring_fraction)
        if ring_fraction > limits.max_ring_fraction:
            reasons.append(f"oscillation after the recovery {ring:.3g} A = "
                           f"{ring_fraction * 100:.1f} % of Irrm (limit "
                           f"{limits.max_ring_fraction * 100:g} %)")
    if decay is not None:
        ratios.append(decay / limits.max_ring_decay_s)
        if decay > limits.max_ring_decay_s:
            reasons.append(f"oscillation decays with {decay * 1e9:.3g} ns "
                           f"(limit {limits.max_ring_decay_s * 1e9:g} ns)")
    if snap and not limits.allow_snap:
        ratios.append(1.0 / (3.0 * rrsf) if rrsf else math.inf)
        reasons.append("snap: the current's slope after its peak exceeds 3 times the "
                       "commutation slope" + (f" (RRSF {rrsf:.3g} < 1/3)" if rrsf else ""))
    avalanche = bool(vrm is not None and vrm >= limits.avalanche_fraction * limits.rated_voltage_V
                     and dwell is not None and dwell >= limits.clamp_time_s)
    if vrm is not None:
        ratios.append(vrm / (limits.avalanche_fraction * limits.rated_voltage_V))
    if avalanche:
        reasons.append(f"dynamic avalanche suspected: VRM {vrm:.4g} V is at or above "
                       f"{limits.avalanche_fraction * 100:g} % of VRRM "
                       f"{limits.rated_voltage_V:.4g} V and holds within 2 % for "
                       f"{(dwell or 0.0) * 1e9:.3g} ns "
                       f"(clamp, limit {limits.clamp_time_s * 1e9:g} ns)")
    severity = max(ratios) if ratios else 0.0
    return SnappinessAssessment(
        passed=not reasons, reasons=tuple(reasons), severity=float(severity), vrm_V=vrm,
        vr_V=vr, didt_A_per_s=didt, stray_inductance_H=stray_inductance_H,
        vrm_expected_V=expected, overshoot_excess=excess, ring_amplitude_A=ring,
        ring_fraction=ring_fraction, ring_decay_s=decay, rrsf=rrsf, snap=snap,
        ringing=ringing, avalanche_suspected=avalanche)
