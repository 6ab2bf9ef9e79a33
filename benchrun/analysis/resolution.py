"""Whether a capture's sample interval resolves the recovery's time intervals.

The recovery's intervals are ``ta`` (t0 → peak), ``tb`` (peak → end of trr) and ``trr``
(t0 → end of trr). A fast diode may snap back from Irrm in under a nanosecond; sampled at
2.5 GS/s or slower, tb then spans one or two samples and tb, the softness tb/ta, the steepest
di/dt after the peak (RRSF), Err and the overshoot VRM say more about the sampling than about
the diode. Such metrics are still reported, but the result carries the flag
``undersampled_recovery: <interval> spans <n> samples (need >= 10); not resolved: <keys>``
(the keys from :func:`benchrun.analysis.metrics_meta.metrics_needing`).

Why 10 samples (``MIN_SAMPLES_PER_INTERVAL``)
---------------------------------------------
- Linear-interpolation timing argument. The definitions find instants by linear
  interpolation between samples and the peak as a sample extremum (or a fit over a few
  samples). Interpolation is exact only between two samples on the same straight piece of the
  waveform; across a corner (the reverse-current peak, the snap) or at a sampled extremum an
  instant is known only to within the sample interval dt, i.e. ±dt/2. The two ends of an
  interval n samples long then give a worst-case relative error of dt/(n·dt) = 1/n: n ≥ 10
  keeps it within 10 % (common practice for the 10 % figure). In GUM terms (JCGM 100:2008,
  F.2.2.1, clause number from memory: resolution of a digital indication, u = δ/√12 per
  instant) the interval's standard uncertainty is dt/√6 and its expanded uncertainty
  (k = 2) 0.82·dt, at most 8 % at n = 10. On a triangular recovery with its corners off the
  grid the worst tb error over grid phases is below 1/n at n = 10 and 20 and above 10 % at
  n = 5 (tests/test_undersampled_recovery.py).
- The trr definition itself. The IEC 60747-2 extrapolation line passes through the point
  where the current rises through 0.9·Irrm; on a straight tb ramp that point lies
  (1 − 0.9)·tb after the peak. Linear interpolation finds it on the ramp, not across the
  peak's corner, only if a sample lies between the two: tb ≥ dt/(1 − 0.9) = 10 samples.
- The same count is used for ta (``MIN_SAMPLES_IN_TA`` in :mod:`benchrun.analysis.recovery`,
  flag ``few_samples_in_ta``, common practice).
- The sampling theorem gives only a lower bound, not a sufficient count: an edge lasting tb
  holds frequencies up to about 0.35/tb (rise time × bandwidth ≈ 0.35 for a single pole), so
  the sample rate must exceed 0.7/tb (tb > 0.7 samples) merely to represent it, and then only
  with sin(x)/x reconstruction, not the linear interpolation the definitions prescribe.

A record given as a non-uniform time array (a variable-step simulator's output) is the
piecewise-linear waveform its points define, measured on a uniform grid refined for the
event (:func:`benchrun.analysis.timebase.event_step`); there the samples counted are the
grid's steps, and the flag appears only when the grid's point budget keeps it too coarse.

The count is taken on the *measured* interval. Sampling can only smear a sharp edge over
the samples bracketing it, so an under-sampled snap measures at most about two samples
longer than it is: a measured span of 10 or more means a true span of at least about 8.

Whether the flag makes a shot invalid: it does not. It warns; the shot's validity follows
from its measured conditions, clipping and missing metrics only (``DEVELOPERS.md``).
"""

from __future__ import annotations

from collections.abc import Mapping

from benchrun.analysis.metrics_meta import metrics_needing

#: Fewest samples an interval (ta, tb, trr) must span to be resolved (see module docstring).
MIN_SAMPLES_PER_INTERVAL = 10
#: Flag name; the flag string is ``"undersampled_recovery: ..."`` with the details.
FLAG_UNDERSAMPLED = "undersampled_recovery"
#: The recovery's time intervals, in the order the flag names them.
RECOVERY_INTERVALS = ("ta", "tb", "trr")


def recovery_spans(t0: float | None, t_irrm: float | None, t_trr: float | None,
                   dt: float) -> dict[str, float | None]:
    """Samples of interval ``dt`` spanned by ta (t0 → t_irrm), tb (t_irrm → t_trr) and trr
    (t0 → t_trr); ``None`` where an instant was not found."""

    def span(a: float | None, b: float | None) -> float | None:
        return None if a is None or b is None else (b - a) / dt

    return {"ta": span(t0, t_irrm), "tb": span(t_irrm, t_trr), "trr": span(t0, t_trr)}


def undersampled_flag(
    spans: Mapping[str, float | None],
    minimum: float = MIN_SAMPLES_PER_INTERVAL,
) -> str | None:
    """The ``undersampled_recovery`` flag for the intervals spanning fewer than ``minimum``
    samples, or ``None`` when every interval found is resolved.

    Example: ``"undersampled_recovery: tb spans 2.5 samples (need >= 10); not resolved:
    tb_s, softness, rrsf, err_J, vrm_V"``.
    """
    short = [(name, spans[name]) for name in RECOVERY_INTERVALS
             if spans.get(name) is not None and spans[name] < minimum]
    if not short:
        return None
    spanned = ", ".join(f"{name} spans {max(n, 0.0):.1f} samples" for name, n in short)
    keys = ", ".join(metrics_needing(name for name, _ in short))
    return f"{FLAG_UNDERSAMPLED}: {spanned} (need >= {minimum:g}); not resolved: {keys}"


def is_undersampled_flag(flag: str) -> bool:
    """Whether a flag string is the ``undersampled_recovery`` warning."""
    return flag == FLAG_UNDERSAMPLED or flag.startswith(FLAG_UNDERSAMPLED + ":")
