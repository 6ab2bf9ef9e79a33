"""Signal conditioning between raw scope data and the recovery analysis.

Pure numpy/scipy helpers, no I/O:

- :func:`codes_to_volts` and :func:`scale`: ADC codes → channel volts → physical units
  (probe attenuation in V/V, shunt or current-sensor transimpedance in A/V).
- :func:`detect_clipping`: samples sitting at the ADC limits (over-range).
- :func:`baseline_offset` / :func:`remove_offset`: offset from the pre-event baseline.
- :func:`deskew`: compensate a probe's propagation delay.
- :func:`lowpass`: optional zero-phase Butterworth low-pass (``scipy.signal.sosfiltfilt``),
  which removes noise without shifting edges in time (a causal filter would bias trr).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

from benchrun.errors import ConfigError, InputDataError


def codes_to_volts(codes: np.ndarray, gain: float, offset: float) -> np.ndarray:
    """Channel volts from ADC codes: ``codes * gain + offset`` (float64)."""
    out = np.multiply(codes, gain, dtype=np.float64)
    if offset:
        out += offset
    return out


def scale(x: np.ndarray, factor: float) -> np.ndarray:
    """Multiply by a probe scale (V/V or A/V); returns a new float64 array."""
    if not math.isfinite(factor) or factor == 0.0:
        raise ConfigError(f"probe scale must be finite and non-zero, got {factor!r}")
    return np.multiply(x, factor, dtype=np.float64)


def detect_clipping(codes: np.ndarray, code_min: int, code_max: int) -> dict[str, int]:
    """Count samples at the ADC limits.

    A sample at the lowest or highest code means the input was at or beyond full scale, so
    its true value is unknown (scope over-range; common practice).

    Returns
    -------
    dict
        ``{"low": count at code_min, "high": count at code_max}``.
    """
    codes = np.asarray(codes)
    return {
        "low": int(np.count_nonzero(codes <= code_min)),
        "high": int(np.count_nonzero(codes >= code_max)),
    }


def baseline_offset(x: np.ndarray, n_baseline: int) -> float:
    """Offset of a channel from its pre-event baseline: median of the first ``n_baseline``
    samples (the median ignores spikes; common practice)."""
    if n_baseline < 1 or n_baseline > x.size:
        raise InputDataError(
            f"baseline of {n_baseline} samples does not fit a record of {x.size} samples"
        )
    return float(np.median(x[:n_baseline]))


def remove_offset(x: np.ndarray, n_baseline: int) -> np.ndarray:
    """``x`` minus :func:`baseline_offset` (new float64 array)."""
    return np.subtract(x, baseline_offset(x, n_baseline), dtype=np.float64)


def deskew(x: np.ndarray, dt: float, delay_s: float) -> np.ndarray:
    """Compensate a probe delay: returns ``y`` with ``y(t) = x(t + delay_s)``.

    A probe whose signal arrives ``delay_s`` late is moved earlier by that delay. Whole
    samples are shifted exactly; a fractional remainder is linearly interpolated. Samples
    shifted in from beyond the record repeat the end value.
    """
    if not math.isfinite(delay_s) or not dt > 0:
        raise ConfigError(f"deskew needs a finite delay and dt > 0, got {delay_s!r}, {dt!r}")
    x = np.asarray(x, dtype=np.float64)
    if delay_s == 0.0 or x.size == 0:
        return x.copy()
    shift = delay_s / dt
    whole = math.floor(shift)
    frac = shift - whole
    n = x.size
    idx_lo = np.clip(np.arange(n) + whole, 0, n - 1)
    y = x[idx_lo]
    if frac > 1e-12:
        idx_hi = np.clip(idx_lo + 1, 0, n - 1)
        y = y * (1.0 - frac) + x[idx_hi] * frac
    return y


def lowpass(x: np.ndarray, dt: float, cutoff_hz: float, order: int = 4) -> np.ndarray:
    """Zero-phase Butterworth low-pass (forward-backward, ``scipy.signal.sosfiltfilt``).

    Parameters
    ----------
    x
        Samples (uniform interval ``dt``).
    cutoff_hz
        -3 dB frequency of one pass; the forward-backward pair gives -6 dB there and zero
        phase shift, so edges stay where they are.
    order
        Butterworth order of one pass.
    """
    nyquist = 0.5 / dt
    if not (math.isfinite(cutoff_hz) and 0.0 < cutoff_hz < nyquist):
        raise ConfigError(
            f"low-pass cut-off must be between 0 and the Nyquist frequency {nyquist:.4g} Hz, "
            f"got {cutoff_hz!r}",
            field="lowpass_hz",
        )
    sos = signal.butter(order, cutoff_hz, btype="low", fs=1.0 / dt, output="sos")
    x = np.asarray(x, dtype=np.float64)
    padlen = min(x.size - 1, 3 * (2 * len(sos) + 1))
    return signal.sosfiltfilt(sos, x, padlen=padlen)
